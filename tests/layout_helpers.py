"""Shared pieces of the layout tests: the plain CF baseline and row comparisons."""

from __future__ import annotations

import math
import os

import cftime
import numpy as np

from circtrack import config, engine
from tests.conftest import LAT, LON, PLEV, csv_rows, make_dataset, write

LABEL = "layout"


def baseline(tmp_dir, ntime=3, **params):
    """CSV rows and metric ids of the plain CF file (time, plev hPa, lat ascending, lon 0..345)."""
    path = write(make_dataset(ntime, **params), tmp_dir / "base.nc")
    out = run_cfg(path)
    rows = csv_rows(out)
    assert len(rows) > 0
    return rows, sorted(set(out.columns["metric"]))


def run_cfg(paths, cfg=None, metric_ids=None, overrides=None, label=LABEL):
    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    cfg = cfg or config.load()
    return engine.track([str(p) for p in paths], cfg, metric_ids=metric_ids, label=label, overrides=overrides)


def rows_of(outcome):
    return csv_rows(outcome)


def keyed(rows):
    """CSV rows -> {(key columns...): (value, flag, units)}; value, units, flag are the last three columns."""
    out = {}
    for r in rows:
        f = r.split(",")
        out[tuple(f[:-3])] = (float(f[-3]) if f[-3] != "NaN" else math.nan, f[-1], f[-2])
    return out


# The synthetic NH Hadley edge sits exactly on a grid latitude (28 deg), and hadley_rossby_number
# averages over the latitudes equatorward of the edge, so a perturbation of 1e-5 m/s can add or drop
# that latitude and move the number by ~5 %: comparisons of perturbed fields leave it out.
# column_net_mass_flux is the quadrature residual of a balanced synthetic column (about 1e-3 of the cell's
# strength), so another vertical sampling (model levels interpolated to other pressures) changes it
# entirely while every other value stays: comparisons across vertical samplings leave it out too.
EDGE_SENSITIVE = ("hadley_rossby_number", "column_net_mass_flux")


def assert_rows_close(rows, base_rows, atol_lat=0.05, rtol=1e-3, atol=1e-9, same_flags=True, skip=EDGE_SENSITIVE,
                      doubtful=True):
    """Same keys and flags; positions and spreads in degrees within ``atol_lat``, other values within
    ``rtol`` or, for values near zero (e.g. the amplitude of a wave the field does not have), ``atol``.
    ``doubtful=False``: values whose flag is not ``ok`` (kept but doubtful) are not compared."""
    rows = [r for r in rows if r.split(",")[-4] not in skip]
    base_rows = [r for r in base_rows if r.split(",")[-4] not in skip]
    assert rows and base_rows
    a, b = keyed(rows), keyed(base_rows)
    assert a.keys() == b.keys()
    for k in b:
        (va, fa, units), (vb, fb, _) = a[k], b[k]
        if same_flags:
            assert fa == fb, (k, fa, fb)
        if math.isnan(vb):
            assert math.isnan(va), (k, va)
            continue
        if not doubtful and fb != "ok":
            continue
        if units in ("degrees_north", "degrees"):
            assert abs(va - vb) <= atol_lat, (k, va, vb)
        else:
            assert abs(va - vb) <= max(rtol * abs(vb), atol), (k, va, vb)


def with_time_column(rows, mapping):
    """Rows with the time column (2nd) renamed through ``mapping``."""
    out = []
    for r in rows:
        f = r.split(",")
        f[1] = mapping.get(f[1], f[1])
        out.append(",".join(f))
    return out


def dates(calendar, year=2000, n=3, day=15):
    return np.array([cftime.datetime(year, m, day, calendar=calendar) for m in range(1, n + 1)])


def extra_fields(ds, plev_name="plev"):
    """Temperature, geopotential and humidity of a simple invented column (for detection only)."""
    p = ds[plev_name].values.astype(float)
    shape = (ds.sizes[ds["ua"].dims[0]], p.size, ds["ua"].shape[2], ds["ua"].shape[3])
    t = np.broadcast_to((288.0 - 70.0 * (1.0 - p / 1000.0))[None, :, None, None], shape)
    z = np.broadcast_to((7000.0 * np.log(1000.0 / p))[None, :, None, None], shape)
    q = np.broadcast_to((0.012 * (p / 1000.0) ** 3)[None, :, None, None], shape)
    return t.astype("float32"), z.astype("float32"), q.astype("float32")


__all__ = ["LAT", "LON", "PLEV", "LABEL", "baseline", "run_cfg", "keyed", "assert_rows_close", "with_time_column",
           "dates", "extra_fields", "make_dataset", "write", "rows_of"]
