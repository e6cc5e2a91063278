"""Hybrid sigma-pressure model levels (CF appendix D), both a*p0 + b*ps and ap + b*ps forms."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from circtrack import config, synthetic
from circtrack import output as O
from circtrack.errors import InputError
from circtrack.inputs import dataset as D
from circtrack.inputs.model_levels import column_pressure, interpolate_log_p, parse_formula_terms
from tests.conftest import CALENDAR
from tests.layout_helpers import LAT, LON, PLEV, assert_rows_close, baseline, make_dataset, run_cfg, write
from tests.metrics.test_surface_fallback import WIND, _with_surface_wind

P0 = 100000.0


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    return baseline(tmp_path_factory.mktemp("base"))


def _coefficients(p_ref_pa):
    """Invented hybrid coefficients: pure pressure above 0.3 p0, terrain-following below."""
    sigma = np.asarray(p_ref_pa, float) / P0
    b = np.clip((sigma - 0.3) / 0.7, 0.0, 1.0) ** 1.5
    ap = np.asarray(p_ref_pa, float) - b * P0
    return ap, b


def _hybrid_file(path, ua, va, ps_pa, p_ref_pa, form, top_first, dim="lev"):
    """Write ua/va (T, L, J, I) on hybrid levels whose pressure at ps = p0 is p_ref_pa."""
    ap, b = _coefficients(p_ref_pa)
    order = np.argsort(p_ref_pa) if top_first else np.argsort(p_ref_pa)[::-1]
    ap, b, ua, va = ap[order], b[order], ua[:, order], va[:, order]
    lev_attrs = {"standard_name": "atmosphere_hybrid_sigma_pressure_coordinate", "units": "1", "positive": "down",
                 "long_name": "hybrid sigma pressure coordinate"}
    data = {}
    if form == "a*p0":
        lev_attrs["formula_terms"] = "a: a b: b p0: p0 ps: ps"
        data["a"] = (dim, ap / P0, {"long_name": "vertical coordinate formula term: a(k)"})
        data["p0"] = ((), P0, {"units": "Pa"})
    else:
        lev_attrs["formula_terms"] = "ap: ap b: b ps: ps"
        data["ap"] = (dim, ap, {"units": "Pa", "long_name": "vertical coordinate formula term: ap(k)"})
    data["b"] = (dim, b, {"long_name": "vertical coordinate formula term: b(k)"})
    data["ps"] = (("time", "lat", "lon"), ps_pa.astype("float32"), {"standard_name": "surface_air_pressure", "units": "Pa"})
    dims = ("time", dim, "lat", "lon")
    data["ua"] = (dims, ua.astype("float32"), {"standard_name": "eastward_wind", "units": "m s-1"})
    data["va"] = (dims, va.astype("float32"), {"standard_name": "northward_wind", "units": "m s-1"})
    ntime = ua.shape[0]
    ds = xr.Dataset(data, coords={
        "time": ("time", synthetic.monthly_times(2000, 1, CALENDAR)[:ntime], {"standard_name": "time"}),
        dim: (dim, ap / P0 + b, lev_attrs),
        "lat": ("lat", LAT, {"standard_name": "latitude", "units": "degrees_north"}),
        "lon": ("lon", LON, {"standard_name": "longitude", "units": "degrees_east"})})
    ds.to_netcdf(str(path), encoding=synthetic.time_encoding(CALENDAR))
    return str(path)


@pytest.mark.parametrize("form,top_first,dim", [("a*p0", False, "lev"), ("ap", True, "model_level")],
                         ids=["a_p0_bottom_first", "ap_top_first"])
def test_hybrid_levels_through_the_baseline_pressures_give_the_baseline_rows(tmp_path, base, form, top_first, dim):
    # surface pressure 1000 hPa everywhere: the model levels sit exactly on the baseline's pressures,
    # so interpolating to the levels the metrics need must reproduce the pressure-level file
    rows, metrics = base
    ds = make_dataset(3)
    ps = np.full((3, LAT.size, LON.size), P0)
    path = _hybrid_file(tmp_path / "hybrid.nc", ds["ua"].values, ds["va"].values, ps, PLEV * 100.0, form, top_first, dim)
    out = run_cfg(path, metric_ids=metrics)
    assert O.sorted_lines(out)[1:] == rows
    info = out.provenance["inputs"][0]
    assert "hybrid sigma-pressure" in info["pressure_units_in_file"]
    assert info["pressure_levels_hpa"]["va"] == sorted(PLEV.tolist())    # defaults down from the model top
    jets = run_cfg(path, metric_ids=["subtropical_jet_lat"])
    assert jets.provenance["inputs"][0]["pressure_levels_hpa"]["ua"] == [200.0, 850.0]   # exactly what is needed


def _varying_surface_case(tmp_path, form="ap"):
    """30 model levels, surface pressure 983..1023 hPa varying with longitude; the field is the
    analytic one evaluated at every column's own model-level pressures."""
    eta = np.linspace(0.03, 1.0, 30)
    p_ref = eta * P0
    ap, b = _coefficients(p_ref)
    ps_lon = 100300.0 + 2000.0 * np.cos(np.deg2rad(LON))                  # no column at exactly 1000 hPa
    ntime = 2
    ua = np.empty((ntime, eta.size, LAT.size, LON.size))
    va = np.empty_like(ua)
    for i, ps_i in enumerate(ps_lon):
        p_col = (ap + b * ps_i) / 100.0
        u_i, v_i, _ = synthetic.fields(LAT, LON, p_col, ntime=ntime)
        ua[..., i], va[..., i] = u_i[..., i], v_i[..., i]
    ps = np.broadcast_to(ps_lon, (ntime, LAT.size, LON.size))
    path = _hybrid_file(tmp_path / "hybrid_ps.nc", ua, va, ps, p_ref, form, top_first=False)
    return path, ps_lon


def test_hybrid_levels_with_varying_surface_pressure(tmp_path, base):
    rows, metrics = base
    path, ps_lon = _varying_surface_case(tmp_path)
    cfg = config.load()
    ds = D.open_dataset(path, cfg)
    det = D.detect(ds, path)
    assert det.vertical == "hybrid" and det.hybrid["form"] == "ap + b*ps"
    reader, plev = D.standardise(ds, det, "ua", [1000.0, 850.0, 500.0], cfg)
    read_levels = reader.selection["lev"]
    assert 10 < len(read_levels) < 30 and 0 in read_levels              # from above 500 hPa down to the surface
    arr = reader.read(ds, 0, 2)
    ds.close()
    assert arr.shape == (2, 3, LAT.size, LON.size) and list(plev) == [500.0, 850.0, 1000.0]
    below = ps_lon < 100000.0
    assert below.sum() == 11
    assert np.isnan(arr[:, 2][..., below]).all()                         # 1000 hPa under the ground: NaN
    assert np.isfinite(arr[:, :2]).all() and np.isfinite(arr[:, 2][..., ~below]).all()
    exact, _, _ = synthetic.fields(LAT, LON, plev, ntime=2)
    err = np.nanmax(np.abs(arr - exact), axis=(0, 2, 3))                 # per target level, m s-1
    assert err[0] < 0.02 and err[2] < 0.02                               # log-p interpolation of a smooth profile
    assert err[1] < 0.5      # 850 hPa: the invented subtropical jet's profile has a kink there (clip at 850 hPa)
    # reading is checked here, not the column balance: 1000 hPa lies below the ground at 11 of 36
    # longitudes, where the invented wave in v has no zero mean over the rest, and removing the
    # column's net flux (cells.balance) carries that residual up to 500 hPa (the Ferrel zero moves
    # 0.3 deg; tests/kernels/test_vertical.py checks the balance itself)
    cfg["cells"]["balance"] = "none"
    out = run_cfg(path, cfg=cfg, metric_ids=metrics)
    two = run_cfg(write(make_dataset(2), tmp_path / "two.nc"), cfg=cfg, metric_ids=metrics)   # same number of steps
    # positions to 0.15 deg and amounts to 1 % (the 850 hPa kink moves the half-maximum points a little)
    assert_rows_close(O.sorted_lines(out)[1:], O.sorted_lines(two)[1:], atol_lat=0.15, rtol=0.01, atol=1e-3)


def test_log_p_interpolation_is_exact_for_fields_linear_in_log_p():
    rng = np.random.default_rng(3)
    ap, b = _coefficients(np.linspace(0.05, 1.0, 20) * P0)
    ps = rng.uniform(60000.0, 104000.0, size=(2, 5, 7))                 # (t, J, I) incl. high ground
    p = column_pressure(ap[::-1], b[::-1], ps)                            # bottom first
    values = 3.0 - 7.5 * np.log(p)
    targets = np.array([5000.0, 20000.0, 50000.0, 85000.0, 100000.0])
    got = interpolate_log_p(values, p, targets)
    want = 3.0 - 7.5 * np.log(targets)[None, :, None, None]
    inside = (targets[None, :, None, None] <= ps[:, None]) & (targets[None, :, None, None] >= p.min(axis=1)[:, None])
    assert inside.any() and (~inside).any()
    np.testing.assert_allclose(got[inside], np.broadcast_to(want, got.shape)[inside], rtol=0, atol=1e-10)
    assert np.isnan(got[~inside]).all()
    values[0, 3, 0, 0] = np.nan                                           # a missing bracketing value
    got = interpolate_log_p(values, p, targets)
    assert np.isnan(got[0, :, 0, 0]).sum() >= 1


def test_formula_terms_parsing():
    assert parse_formula_terms("a: hyam b: hybm p0: P0 ps: PS") == {"a": "hyam", "b": "hybm", "p0": "P0", "ps": "PS"}
    assert parse_formula_terms("ap:ap b:b ps:ps") == {"ap": "ap", "b": "b", "ps": "ps"}


def test_hybrid_levels_without_surface_pressure_is_one_clear_error(tmp_path):
    ds = make_dataset(1)
    path = _hybrid_file(tmp_path / "h.nc", ds["ua"].values, ds["va"].values, np.full((1, LAT.size, LON.size), P0),
                        PLEV * 100.0, "ap", False)
    x = xr.open_dataset(path).drop_vars("ps")
    x.to_netcdf(tmp_path / "no_ps.nc")
    x.close()
    with pytest.raises(InputError) as e:
        run_cfg(tmp_path / "no_ps.nc", metric_ids=["eddy_jet_lat"])
    msg = str(e.value)
    assert "\n" not in msg and "no_ps.nc" in msg and "surface pressure 'ps'" in msg and "same file" in msg


def test_lowest_model_level_stands_in_for_uas(tmp_path):
    # a file on hybrid levels without uas: the lowest model level of ua (the one nearest the ground
    # in every column, whatever the surface pressure) stands in for the near-surface wind, as the
    # lowest pressure level does on pressure levels. The surface at 950 hPa lies above the 1000 hPa
    # reference pressure of that level everywhere, so interpolating to 1000 hPa would leave nothing.
    ds, _ = _with_surface_wind(make_dataset(2))
    ps = np.full((2, LAT.size, LON.size), 95000.0)
    path = _hybrid_file(tmp_path / "h.nc", ds["ua"].values, ds["va"].values, ps, PLEV * 100.0, "a*p0", False)
    out = run_cfg(path, metric_ids=WIND)
    plain = run_cfg(write(ds, tmp_path / "levels.nc"), metric_ids=WIND)
    assert O.sorted_lines(out)[1:] == O.sorted_lines(plain)[1:]
    c = out.columns
    for metric, want in (("surface_wind_zero_lat", 30.0), ("polar_easterly_edge_lat", 60.0)):
        got = c["value"][(c["metric"] == metric) & (c["hemisphere"] == "NH")]
        assert got.size and np.allclose(got, want, atol=0.05), (metric, got)
    why = out.provenance["inputs"][0]["found_by"]["uas"]
    assert "lowest model level of ua" in why and "'ua'" in why
