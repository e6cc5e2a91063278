"""Detection from a plain netCDF-4 header (circtrack/inputs/header.py) equals xarray's, and the
planning process of a run on such files imports neither xarray nor pandas.

The whole suite can be run with every header detection compared with xarray's:
``CIRCTRACK_CHECK_HEADERS=1 python -m pytest -q`` (tests/conftest.py, tests/header_check.py).
"""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest

from circtrack import config as C
from circtrack.engine import plan as P
from circtrack.engine import prepare as PR
from circtrack.inputs import header as H
from tests import header_check as HC
from tests import test_layouts_styles as STY
from tests.conftest import make_dataset, write

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _layouts(tmp_path):
    """Files of several layouts: plain CF, CMIP style (bounds, fill values, an odd calendar),
    reanalysis-like names with latitude descending and longitudes -180..180, a scalar height."""
    out = {"plain": write(make_dataset(3), tmp_path / "plain.nc")}
    ds = STY._cmip(STY._masked(make_dataset(3)), "360_day", 2500)
    out["cmip"] = STY._write_cmip(ds, tmp_path / "ua_Amon_X_historical_r1i1p1f1_gn_250001-250003.nc", "360_day")
    ds = make_dataset(3).isel(lat=slice(None, None, -1))
    ds = ds.assign_coords(lon=(((ds.lon + 180) % 360) - 180)).sortby("lon")
    ds = ds.rename({"ua": "u", "va": "v", "plev": "level", "lat": "latitude", "lon": "longitude"})
    ds["level"].attrs = {"units": "millibars", "long_name": "pressure_level"}
    out["reanalysis"] = write(ds, tmp_path / "era.nc")
    ds = make_dataset(3)
    ds["uas"] = ds["ua"].isel(plev=0, drop=True)
    ds = ds.assign_coords(height=2.0)
    ds["uas"].attrs = {"units": "m s-1", "standard_name": "eastward_wind"}
    ds["height"].attrs = {"units": "m", "standard_name": "height"}
    out["scalar"] = write(ds, tmp_path / "scalar.nc")
    return out


@pytest.fixture
def checking(monkeypatch):
    HC.CHECKED.clear()
    if not getattr(PR._on_dataset, "checking", False):       # (CIRCTRACK_CHECK_HEADERS=1: already on)
        monkeypatch.setattr(PR, "_on_dataset", HC.checking_on_dataset(PR._on_dataset))
    return HC.CHECKED


def test_header_detection_equals_xarrays(tmp_path, checking):
    cfg = C.load(None)
    paths = _layouts(tmp_path)
    for name, path in paths.items():
        assert H.open_header(path, cfg) is not None, name
        ids = PR.available_metrics([path], cfg, {}, "stop")         # detect_only
        plan = P.Plan.make(ids, cfg, [])
        try:
            PR.prepare_file(path, plan, cfg, {})
        except PR.MissingRoles:
            pass
    assert set(checking) == set(paths.values())


def test_overrides_and_missing_roles_agree(tmp_path, checking):
    cfg = C.load(None)
    path = write(make_dataset(3), tmp_path / "plain.nc")
    det = PR.detect_only(path, cfg, {"ua": "va", "lat": "nolat"})
    assert det.variables["ua"] == "va" and "lat" in det.problems
    det = PR.detect_only(path, cfg, {"ua": "nothere"})
    assert "ua" in det.problems
    plan = P.Plan.make(["energy_transport_max"], cfg, [])
    with pytest.raises(PR.MissingRoles) as e:                 # no ta, zg, hus: the same error both ways
        PR.prepare_file(write(make_dataset(3)[["ua", "va"]], tmp_path / "uv.nc"), plan, cfg, {})
    assert "not found" in str(e.value)
    assert len(checking) == 3


def test_member_labels_as_text_are_left_to_xarray(tmp_path):
    ds = STY._cmip(STY._masked(make_dataset(3)), "noleap", 2000, members=["r1i1p1f1", "r2i1p1f1"])
    assert H.open_header(STY._write_cmip(ds, tmp_path / "ens.nc", "noleap"), C.load(None)) is None


@pytest.mark.parametrize("case", ["packed", "months", "classic", "time_units", "int_fill", "engine"])
def test_files_the_header_cannot_stand_for_are_opened_with_xarray(tmp_path, case):
    cfg = C.load(None)
    ds = make_dataset(3)
    enc = None
    if case == "packed":
        enc = {"ua": {"dtype": "int16", "scale_factor": 0.01, "_FillValue": -32767}}
    elif case == "int_fill":
        ds["mask"] = (("lat", "lon"), np.ones((ds.sizes["lat"], ds.sizes["lon"]), dtype="int32"))
        enc = {"mask": {"_FillValue": -1}}
    path = str(tmp_path / "f.nc")
    if case == "months":
        ds = ds.assign_coords(time=np.arange(3.0))
        ds["time"].attrs = {"units": "months since 2000-01-01", "calendar": "360_day"}
        ds.to_netcdf(path)
    elif case == "classic":
        ds.to_netcdf(path, format="NETCDF3_64BIT", encoding=None)
    else:
        write(ds, path) if enc is None else ds.to_netcdf(path, encoding={**enc, **_time_enc()})
    if case == "time_units":
        cfg["units"]["time"] = "days since 2000-01-01"
    if case == "engine":
        cfg["run"]["netcdf_engine"] = "h5netcdf"
    assert H.open_header(path, cfg) is None


def _time_enc():
    from circtrack import synthetic
    from tests.conftest import CALENDAR
    return synthetic.time_encoding(CALENDAR)


def test_values_of_data_variables_send_detection_to_xarray(tmp_path):
    head = H.open_header(write(make_dataset(3), tmp_path / "plain.nc"), C.load(None))
    with pytest.raises(H.NeedsFullOpen):
        head["ua"].values
    with pytest.raises(H.NeedsFullOpen):
        head["no_such_variable"]


def test_planning_on_netcdf4_files_imports_no_xarray_nor_pandas(tmp_path):
    paths = [write(make_dataset(3), tmp_path / f"m{k}.nc") for k in range(2)]
    code = ("import sys\n"
            "from circtrack import config, engine\n"
            "cfg = config.load(None)\n"
            "cfg['run']['scheduler'] = 'sync'\n"
            f"out = engine.track({paths!r}, cfg)\n"
            "assert len(out.columns['metric']) > 0\n"
            "print(sorted(m for m in ('xarray', 'pandas', 'dask') if m in sys.modules))\n")
    p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300,
                       env={**os.environ, "PYTHONPATH": ROOT})
    assert p.returncode == 0, p.stderr
    assert p.stdout.strip() == "[]"


def test_small_variables_with_fill_values_leave_their_values_to_xarray(tmp_path):
    """A small 2-D float variable with a _FillValue (e.g. curvilinear latitudes) is read by xarray,
    which masks the fill (raw from the header, 1e20 would stand for a latitude)."""
    import xarray as xr
    ds = make_dataset(3)
    ds["glat"] = (("lat", "lon"), np.ones((ds.sizes["lat"], ds.sizes["lon"]), dtype="float32"))
    ds["glat"][0, 0] = np.nan
    path = str(tmp_path / "fill2d.nc")
    ds.to_netcdf(path, encoding={"glat": {"_FillValue": np.float32(1e20)}, **_time_enc()})
    head = H.open_header(path, C.load(None))
    assert head is not None
    with pytest.raises(H.NeedsFullOpen):
        head["glat"].values
    with xr.open_dataset(path) as ref:
        assert np.isnan(ref["glat"].values[0, 0])
