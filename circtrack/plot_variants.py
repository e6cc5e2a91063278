"""The variant band of ``circtrack plot``: when a CSV holds several definitions (``track --vary``),
the line is the variant with the packaged default settings and the shading spans the annual means
of all variants (min to max).

:func:`split` separates the table before plotting; :func:`draw` adds the band to one axis.
"""

from __future__ import annotations

from circtrack import stats as S


def default_variant(names):
    """The variant whose settings all equal the packaged defaults, else the first in sorted order."""
    from circtrack.config import defaults
    from circtrack.variants import format_value

    d = defaults()

    def is_default(name):
        for part in name.split(" "):
            key, _, val = part.partition("=")
            section, _, k = key.partition(".")
            if format_value(d.get(section, {}).get(k, None)) != val:
                return False
        return True

    names = sorted(set(names))
    return next((n for n in names if is_default(n)), names[0])


def split(df, calendar="standard", poleward_positive=False):
    """``(table of the default variant without the variant column, band, name)``; without a
    variant column: ``(df, None, None)``. ``band``: annual means per key, year: lo, hi, n."""
    if "variant" not in df.columns:
        return df, None, None
    name = default_variant(df["variant"])
    data = S.clean(df)
    if poleward_positive and not data.empty:
        data = S.poleward_flip(data)
    sea = S.seasonal_means(S.monthly_means(data, calendar)) if not data.empty else data
    ann = sea[sea["season"] == "annual"] if not data.empty else data
    keys = [k for k in S.key_columns(df)[0] if k != "variant"]
    band = None
    if len(ann):
        band = ann.groupby([*keys, "t"], sort=True)["value"].agg(lo="min", hi="max", n="count").reset_index()
    return df[df["variant"] == name].drop(columns="variant"), band, name


def draw(ax, band, row, metric, colour):
    """Min-max shading of the variants' annual means for the line ``row`` (its key values)."""
    if band is None:
        return
    sel = (band["metric"] == metric).to_numpy().copy()
    for k, v in row.items():
        if k in band.columns:
            sel &= (band[k] == v).to_numpy()
    b = band[sel].sort_values("t")
    if b.empty:
        return
    ax.fill_between(b["t"], b["lo"].to_numpy(float), b["hi"].to_numpy(float), color=colour, alpha=0.12, lw=0,
                    label=f"range of {int(b['n'].max())} definitions (annual means)")
