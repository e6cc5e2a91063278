"""Spread across definitions: how far apart the variants of a metric, and the metrics of one
feature, lie. Pure pandas/numpy (no command line here).

In: a tidy circtrack table, either rows of ``track`` (``value``, ``flag``; a ``variant`` column when
it was run with ``--vary``) or of ``trend`` (``slope_per_decade`` per season and method).
Out: a tidy table with, per key (time or season and method, source, extra keys such as member,
hemisphere, sector):

* ``across = variants``: per metric, the statistics over its variants;
* ``across = metrics``: per feature group of the catalogue (:func:`circtrack.metrics.groups`, e.g.
  ``tropical_edge``), the statistics over every variant of every metric of the group; the
  ``metric`` column holds the group id. A group needs usable values of two of its metrics at least.

Statistics: ``n`` (values used), ``min``, ``max``, ``range`` (max - min), ``mean`` and ``std`` (the
sample standard deviation, ddof = 1; NaN for one value). Only rows whose flag is ``ok`` (notes
after ';' allowed) and whose value is finite count. On a trend table the slopes are summarised and
``n_positive``, ``n_negative`` and ``signs_agree`` (true when every slope has the same sign, none
zero) say whether the definitions agree on the direction of the trend.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from circtrack.flags import usable
from circtrack.stats import sort_table

STATS = ("n", "min", "max", "range", "mean", "std")
TREND_KEYS = ("season", "method")


class SpreadInputError(ValueError):
    """The table is not a circtrack track or trend table."""


def _kind(df):
    if "slope_per_decade" in df.columns:
        return "trend"
    if {"value", "flag", "time"} <= set(df.columns):
        return "track"
    raise SpreadInputError("neither a 'track' table (value, flag) nor a 'trend' table (slope_per_decade)")


def _keys(df, kind):
    """The key columns a spread keeps, every key but ``variant``, in the input's order (``metric``
    included, where it holds the metric or group id)."""
    cols = list(df.columns)
    if kind == "track":
        keys = cols[:cols.index("metric") + 1]
    else:
        keys = cols[:cols.index("metric") + 1] + ["hemisphere", "sector", *TREND_KEYS]
    return [k for k in keys if k != "variant"]


def _values(df, kind):
    """Usable rows with a float column ``x``."""
    if kind == "track":
        out = df[usable(df["flag"].astype(str))].copy()
        out["x"] = pd.to_numeric(out["value"], errors="coerce").astype(float)
    else:
        out = df.copy()
        out["x"] = pd.to_numeric(out["slope_per_decade"], errors="coerce").astype(float)
    return out[np.isfinite(out["x"].to_numpy())]


def _stats(g, kind):
    x = g["x"].to_numpy(float)
    row = {"n": x.size, "min": x.min(), "max": x.max(), "range": x.max() - x.min(), "mean": x.mean(),
           "std": x.std(ddof=1) if x.size > 1 else np.nan}
    if kind == "trend":
        pos, neg = int((x > 0).sum()), int((x < 0).sum())
        row.update(n_positive=pos, n_negative=neg, signs_agree="true" if pos == x.size or neg == x.size else "false")
    return row


def spread(df, groups=None):
    """The spread table of ``df`` (see the module docstring); ``groups``: {group id: metric ids}."""
    kind = _kind(df)
    keys = _keys(df, kind)
    data = _values(df, kind)
    extra_cols = ["n_positive", "n_negative", "signs_agree"] if kind == "trend" else []
    cols = [*keys, "across", *STATS, *extra_cols, "units"]
    rows = []
    if "variant" in df.columns:
        for k, g in data.groupby(keys, sort=False, dropna=False):
            rows.append({**dict(zip(keys, k)), "across": "variants", **_stats(g, kind), "units": g["units"].iloc[0]})
    member_of = {m: gid for gid, ids in (groups or {}).items() for m in ids}
    grouped = data[data["metric"].isin(list(member_of))].copy()
    grouped["metric_id"] = grouped["metric"]
    grouped["metric"] = grouped["metric"].map(member_of)
    for k, g in grouped.groupby(keys, sort=False, dropna=False):
        # two metrics at least, of one kind of quantity: else there is nothing to compare
        if g["metric_id"].nunique() < 2 or g["units"].nunique() != 1:
            continue
        rows.append({**dict(zip(keys, k)), "across": "metrics", **_stats(g, kind), "units": g["units"].iloc[0]})
    out = pd.DataFrame(rows, columns=cols)
    if out.empty:
        return out
    for c in ("min", "max", "range", "mean", "std"):
        out[c] = out[c].astype(float)
    return sort_table(out, [*keys, "across"])
