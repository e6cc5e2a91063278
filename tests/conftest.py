"""Shared fixtures: small synthetic netCDF files with closed-form answers (circtrack.synthetic)."""

from __future__ import annotations

import numpy as np
import pytest

from circtrack import config as C
from circtrack import engine
from circtrack import output as O
from circtrack import synthetic

LAT = np.arange(-90.0, 91.0, 1.0)
LON = np.arange(0.0, 360.0, 15.0)
PLEV = np.array([1000, 925, 850, 700, 600, 500, 400, 300, 250, 200, 150, 100, 70, 50], dtype=float)
CALENDAR = "noleap"


def times(n=3):
    return synthetic.monthly_times(2000, 1, CALENDAR)[:n]


def make_dataset(ntime=3, dtype="float32", **params):
    return synthetic.dataset(LAT, LON, PLEV, times(ntime), dtype=dtype, **params)


def write(ds, path):
    ds.to_netcdf(str(path), encoding=synthetic.time_encoding(CALENDAR))
    return str(path)


def run(paths, metric_ids=None, label="synth", overrides=None):
    """Run the full engine and return {(time, hemisphere, metric): (value, flag)} plus the Outcome."""
    if isinstance(paths, str):
        paths = [paths]
    cfg = C.load(None)
    out = engine.track(list(paths), cfg, metric_ids=metric_ids, label=label, overrides=overrides)
    c = out.columns
    table = {(c["time"][i], c["hemisphere"][i], c["metric"][i]): (float(c["value"][i]), c["flag"][i])
             for i in range(len(c["metric"])) if c["sector"][i] == "zonal"}
    return table, out


def csv_rows(outcome):
    """CSV body lines (header dropped) as the writer would produce them."""
    return O.sorted_lines(outcome)[1:]


@pytest.fixture
def make_nc(tmp_path):
    """Factory: make_nc(name, ntime=3, transform=None, **synthetic params) -> path of a netCDF file."""

    def _make(name="synth.nc", ntime=3, transform=None, dtype="float32", **params):
        ds = make_dataset(ntime, dtype=dtype, **params)
        if transform is not None:
            ds = transform(ds)
        return write(ds, tmp_path / name)

    return _make


@pytest.fixture
def default_nc(make_nc):
    return make_nc("default.nc", ntime=3)


@pytest.fixture(autouse=True)
def _check_header_detection(monkeypatch):
    """CIRCTRACK_CHECK_HEADERS=1: every header detection in the suite is compared with xarray's
    (tests/header_check.py)."""
    import os

    if os.environ.get("CIRCTRACK_CHECK_HEADERS") == "1":
        from circtrack.engine import prepare as PR
        from tests.header_check import checking_on_dataset

        monkeypatch.setattr(PR, "_on_dataset", checking_on_dataset(PR._on_dataset))
    yield
