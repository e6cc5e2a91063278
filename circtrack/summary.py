"""The end-of-run summary on stderr (``track`` and ``update``), printed also with ``--quiet``.

- one line per metric that is not all ok: its rows counted per flag (notes after ';' ignored);
- a warning for each metric with no value at all, naming its most common flag;
- one line naming the default metrics left out because a variable is missing, with the ``--var``
  line that would add it.

``--fail-on-empty`` turns a metric without any value into exit status 1 (for cron and make); the
output is written first either way, so nothing is lost.
"""

from __future__ import annotations

import collections

import numpy as np

from circtrack.errors import CircError


def counts(metrics, values, flags):
    """``{metric: (Counter of base flags, rows, rows with a value)}`` in order of first appearance."""
    names = [str(m) for m in metrics]
    pairs = collections.Counter(zip(names, [str(f).split(";", 1)[0] for f in flags]))   # first-seen order
    valued = collections.Counter(m for m, ok in zip(names, np.isfinite(np.asarray(values, dtype=float))) if ok)
    out = {}
    for (m, flag), n in pairs.items():
        c = out.setdefault(m, [collections.Counter(), 0, valued.get(m, 0)])
        c[0][flag] += n
        c[1] += n
    return out


def lines(metrics, values, flags, left_out=()):
    """The summary lines (without the ``circtrack:`` prefix handled here) and the metrics without any value."""
    out, empty = [], []
    for m, (c, rows, valued) in counts(metrics, values, flags).items():
        if set(c) == {"ok"} and valued == rows:
            continue
        parts = [f"{c.get('ok', 0)} ok"] + [f"{n} {flag}" for flag, n in c.most_common() if flag != "ok"]
        out.append(f"circtrack: {m}: {', '.join(parts)} (of {rows} rows)")
        if valued == 0:
            common = next((flag for flag, _ in c.most_common() if flag != "ok"), "ok")
            empty.append(m)
            out.append(f"circtrack: warning: {m} has no value in any of its {rows} rows; most common flag: {common}")
    if left_out:
        parts = []
        for fam, ids, roles, *hint in left_out:
            adds = " and ".join(f"--var {r}=NAME" for r in roles)
            more = f", {hint[0]}" if hint and hint[0] else ""
            parts.append(f"{', '.join(ids)} (need {', '.join(roles)}: add {adds}{more})")
        out.append("circtrack: default metrics left out for want of a variable: " + "; ".join(parts))
    return out, empty


def of_outcome(outcome):
    c = outcome.columns
    return lines(c["metric"], np.asarray(c["value"], float), c["flag"],
                 outcome.provenance.get("metrics_left_out", ()))


def of_csv(text, left_out=()):
    """:func:`lines` of a written tidy CSV (``update``: the whole output, not only the recomputed rows)."""
    rows = [ln.split(",") for ln in text.splitlines() if ln]
    if not rows:
        return [], []
    head = rows[0]
    im, iv, iflag = (head.index(k) for k in ("metric", "value", "flag"))
    body = rows[1:]
    vals = np.array([float(r[iv]) if r[iv] not in ("", "nan", "NaN") else np.nan for r in body], dtype=float)
    return lines([r[im] for r in body], vals, [r[iflag] for r in body], left_out)


def report(summary, echo, fail_on_empty):
    """Print the lines with ``echo(line, err=True)``; with ``fail_on_empty`` an empty metric raises exit 1."""
    text, empty = summary
    for ln in text:
        echo(ln, err=True)
    if fail_on_empty and empty:
        raise CircError(f"--fail-on-empty: {', '.join(empty)} {'has' if len(empty) == 1 else 'have'} no value at all "
                        "(the output was written; see the warnings above)")
