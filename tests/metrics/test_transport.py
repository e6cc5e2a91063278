"""Eddy momentum flux and energy transport through the engine, on invented fields with answers
computed by hand, and sanity checks against published magnitudes named beside each check."""

import cftime
import numpy as np
import pytest
import scipy.constants
import xarray as xr

from circtrack import config, engine
from circtrack.constants import CP_DRY, EARTH_RADIUS, GRAVITY, LATENT_HEAT_VAPORIZATION, R_DRY

LAT = np.arange(-90.0, 90.1, 1.0)
LON = np.arange(0.0, 360.0, 10.0)
LAM = np.deg2rad(LON)
PLEV = np.arange(100.0, 1001.0, 100.0)       # hPa; layer weights 50, 100 x 8, 50 hPa (the top data level is the
                                             # top of the column, cells.top = "zero_at_top_level")


def _times(n, step_days):
    return np.array([cftime.num2date(step_days * i, "days since 2001-01-01", "noleap") for i in range(n)])


def _write(path, arrays, times):
    """arrays: role -> (L, J, I) field (the same at every time)."""
    names = {"ua": ("ua", "eastward_wind", "m s-1"), "va": ("va", "northward_wind", "m s-1"),
             "ta": ("ta", "air_temperature", "K"), "zg": ("zg", "geopotential_height", "m"),
             "hus": ("hus", "specific_humidity", "1")}
    data = {}
    for role, arr in arrays.items():
        name, sn, units = names[role]
        full = np.broadcast_to(arr[None], (times.size,) + arr.shape).astype("float64")
        data[name] = (("time", "plev", "lat", "lon"), full, {"standard_name": sn, "units": units})
    ds = xr.Dataset(data, coords={
        "time": ("time", times, {"standard_name": "time"}),
        "plev": ("plev", PLEV * 100.0, {"standard_name": "air_pressure", "units": "Pa", "axis": "Z"}),
        "lat": ("lat", LAT, {"standard_name": "latitude", "units": "degrees_north"}),
        "lon": ("lon", LON, {"standard_name": "longitude", "units": "degrees_east"})})
    ds.to_netcdf(path, encoding={"time": {"units": "days since 2001-01-01", "calendar": "noleap", "dtype": "f8"}})
    return str(path)


def _table(out):
    c = out.columns
    return {(c["time"][i], c["hemisphere"][i], c["metric"][i]): (float(c["value"][i]), c["flag"][i])
            for i in range(len(c["metric"]))}


def _first(table, hemi, metric):
    t = sorted({k[0] for k in table})[0]
    return table[(t, hemi, metric)]


# --------------------------------------------------------------------------- eddy momentum flux
def _eddy_winds():
    """u = 20 + A(lat) cos(4 lam), v = B(lat) cos(4 lam + phase): [u'v'] = A B / 2 cos(phase).
    A = 10 g, B = 8 g with g = exp(-((lat - c)/12)^2) and c = 32 (NH), -35 (SH); phase 0 in the NH and
    pi in the SH, so [u'v'] = +40 g^2 (poleward in the NH) and -40 g^2 (poleward in the SH): the
    poleward flux peaks at 32 and -35 with 40 m2 s-2."""
    g = np.where(LAT >= 0, np.exp(-(((LAT - 32.0) / 12.0) ** 2)), np.exp(-(((LAT + 35.0) / 12.0) ** 2)))
    phase = np.where(LAT >= 0, 0.0, np.pi)
    u = 20.0 + 10.0 * g[:, None] * np.cos(4 * LAM)[None, :]
    v = 8.0 * g[:, None] * np.cos(4 * LAM[None, :] + phase[:, None])
    shape = (PLEV.size, LAT.size, LON.size)
    return {"ua": np.broadcast_to(u, shape), "va": np.broadcast_to(v, shape)}


@pytest.mark.parametrize("step_days,flag", [(0.25, "ok"), (1.0, "ok"), (30.0, "time_mean_input")])
def test_eddy_momentum_flux_known_answer(tmp_path, step_days, flag):
    path = _write(tmp_path / "eddy.nc", _eddy_winds(), _times(3, step_days))
    out = engine.track([path], config.load(), metric_ids=["eddy_momentum_flux_lat", "eddy_momentum_flux_max"])
    t = _table(out)
    # 250 hPa is not among the file's levels (every 100 hPa): the winds are interpolated in log-p, which
    # the flag's note says (issue 12); the interpolation is exact here (the fields do not vary with p)
    flag = flag + ";interpolated_level"
    assert _first(t, "NH", "eddy_momentum_flux_lat") == (pytest.approx(32.0, abs=0.02), flag)
    assert _first(t, "SH", "eddy_momentum_flux_lat") == (pytest.approx(-35.0, abs=0.02), flag)
    assert _first(t, "NH", "eddy_momentum_flux_max")[0] == pytest.approx(40.0, abs=0.05)
    assert _first(t, "SH", "eddy_momentum_flux_max")[0] == pytest.approx(40.0, abs=0.05)
    assert set(out.columns["units"][out.columns["metric"] == "eddy_momentum_flux_max"]) == {"m2 s-2"}


def test_eddy_momentum_flux_single_time_step_is_flagged(tmp_path):
    path = _write(tmp_path / "one.nc", _eddy_winds(), _times(1, 1.0))
    t = _table(engine.track([path], config.load(), metric_ids=["eddy_momentum_flux_lat"]))
    assert _first(t, "NH", "eddy_momentum_flux_lat") == (pytest.approx(32.0, abs=0.02),
                                                         "time_step_unknown;interpolated_level")


def test_eddy_momentum_flux_level_missing(tmp_path):
    cfg = config.load()
    cfg["eddies"]["momentum_level_hpa"] = 50.0        # above the top level of the file
    path = _write(tmp_path / "eddy.nc", _eddy_winds(), _times(2, 1.0))
    t = _table(engine.track([path], cfg, metric_ids=["eddy_momentum_flux_lat"]))
    val, flag = _first(t, "NH", "eddy_momentum_flux_lat")
    assert np.isnan(val) and flag == "level_missing"


# --------------------------------------------------------------------------- energy transport
UPPER = PLEV <= 500.0          # layers 100-550 hPa: 50 + 4 x 100 = 450 hPa of mass (0-550 hPa with the old top rule)
T_UP, Z_UP, Q_UP = 230.0, 9000.0, 0.0005
T_LO, Z_LO, Q_LO = 280.0, 1500.0, 0.008


def _hadley_like(sigma, *, v_offset=0.0, t_offset=0.0):
    """Zonally uniform overturning: v = +4.5 sigma(lat) in the upper layers (550 hPa of mass) and
    -5.5 sigma below (450 hPa), so no net mass crosses a latitude (4.5 x 550 = 5.5 x 450 = 2475);
    upper air carries E_up = cp 230 + g 9000 + L 0.0005, lower air E_lo = cp 280 + g 1500 + L 0.008."""
    shape = (PLEV.size, LAT.size, LON.size)
    vprof = np.where(UPPER, 4.5, -5.5)
    v = vprof[:, None, None] * sigma[None, :, None] + v_offset
    col = lambda a, b: np.broadcast_to(np.where(UPPER, a, b)[:, None, None], shape)  # noqa: E731
    return {"va": np.broadcast_to(v, shape), "ta": col(T_UP, T_LO) + t_offset, "zg": col(Z_UP, Z_LO),
            "hus": col(Q_UP, Q_LO)}


def _expected_energy(top="zero_at_top_level"):
    e_up = CP_DRY * T_UP + GRAVITY * Z_UP + LATENT_HEAT_VAPORIZATION * Q_UP
    e_lo = CP_DRY * T_LO + GRAVITY * Z_LO + LATENT_HEAT_VAPORIZATION * Q_LO
    if top == "constant_above_top":
        # integral of [v E] dp = 4.5 * 55000 Pa * E_up - 5.5 * 45000 Pa * E_lo = 247500 (E_up - E_lo) per unit sigma
        return 247500.0 * (e_up - e_lo)
    # from the top data level (issue 12): 45000 Pa of upper and 45000 Pa of lower air; the column carries
    # (4.5 - 5.5) * 45000 = -45000 Pa m/s of net mass flux, removed at the section's mean energy
    # (E_up + E_lo)/2: 45000 (4.5 E_up - 5.5 E_lo) + 45000 (E_up + E_lo)/2 = 225000 (E_up - E_lo)
    return 225000.0 * (e_up - e_lo)


def _sigma():
    """sigma = G / cos(lat) with G = exp(-((|lat| - 40)/15)^2), signed +1 NH / -1 SH, so the transport
    2 pi a cos(lat)/g * sigma * I is 2 pi a / g * I * G: poleward, peaking at exactly +-40 deg."""
    with np.errstate(divide="ignore"):
        s = np.exp(-(((np.abs(LAT) - 40.0) / 15.0) ** 2)) / np.cos(np.deg2rad(LAT))
    s[np.abs(LAT) > 89.5] = 0.0
    return np.sign(LAT) * s


METRICS = ["energy_transport_max", "energy_transport_max_lat"]


def test_energy_transport_known_answer(tmp_path):
    path = _write(tmp_path / "mse.nc", _hadley_like(_sigma()), _times(2, 0.25))
    t = _table(engine.track([path], config.load(), metric_ids=METRICS))
    expected_pw = 2 * np.pi * EARTH_RADIUS / GRAVITY * _expected_energy() / 1e15
    assert expected_pw == pytest.approx(4.188, abs=0.01)      # hand arithmetic of the numbers above
    for hemi, s in (("NH", 1), ("SH", -1)):
        assert _first(t, hemi, "energy_transport_max_lat") == (pytest.approx(40.0 * s, abs=0.02), "ok")
        assert _first(t, hemi, "energy_transport_max") == (pytest.approx(expected_pw, rel=1e-3), "ok")


def test_energy_transport_old_top_rule_and_no_balance(tmp_path):
    # cells.top = "constant_above_top": the top level stands for 0-150 hPa, the column balances
    # (4.5 x 550 = 5.5 x 450 hPa) and the old answer 4.607 PW comes back
    path = _write(tmp_path / "mse.nc", _hadley_like(_sigma()), _times(2, 0.25))
    cfg = config.load()
    cfg["cells"]["top"] = "constant_above_top"
    t = _table(engine.track([path], cfg, metric_ids=METRICS))
    old_pw = 2 * np.pi * EARTH_RADIUS / GRAVITY * _expected_energy("constant_above_top") / 1e15
    assert old_pw == pytest.approx(4.607, abs=0.01)
    assert _first(t, "NH", "energy_transport_max") == (pytest.approx(old_pw, rel=1e-3), "ok")
    # cells.balance = "none": no mass correction; the column's net flux carries its energy along:
    # integral [v E] dp = 45000 (4.5 E_up - 5.5 E_lo) per unit sigma, negative, so with the overturning
    # reversed (-sigma) the uncorrected transport is poleward in both hemispheres, peaking at +-40 deg
    reversed_path = _write(tmp_path / "rev.nc", _hadley_like(-_sigma()), _times(2, 0.25))
    cfg = config.load()
    cfg["cells"]["balance"] = "none"
    t = _table(engine.track([reversed_path], cfg, metric_ids=METRICS))
    e_up = CP_DRY * T_UP + GRAVITY * Z_UP + LATENT_HEAT_VAPORIZATION * Q_UP
    e_lo = CP_DRY * T_LO + GRAVITY * Z_LO + LATENT_HEAT_VAPORIZATION * Q_LO
    raw = 45000.0 * (4.5 * e_up - 5.5 * e_lo)
    assert raw < 0
    for hemi, s in (("NH", 1), ("SH", -1)):
        assert _first(t, hemi, "energy_transport_max") == (
            pytest.approx(-2 * np.pi * EARTH_RADIUS / GRAVITY * raw / 1e15, rel=1e-3), "ok")
        assert _first(t, hemi, "energy_transport_max_lat")[0] == pytest.approx(40.0 * s, abs=0.02)


def test_mass_correction_removes_net_mass_flux_and_energy_offset(tmp_path):
    base = _write(tmp_path / "a.nc", _hadley_like(_sigma()), _times(2, 0.25))
    # a uniform 2 m/s northward drift moves mass across every latitude and would carry E with it;
    # a +15 K offset of T changes E everywhere: the corrected transport sees neither
    shifted = _write(tmp_path / "b.nc", _hadley_like(_sigma(), v_offset=2.0, t_offset=15.0), _times(2, 0.25))
    ta = _table(engine.track([base], config.load(), metric_ids=METRICS))
    tb = _table(engine.track([shifted], config.load(), metric_ids=METRICS))
    for hemi in ("NH", "SH"):
        for m in METRICS:
            assert _first(tb, hemi, m)[0] == pytest.approx(_first(ta, hemi, m)[0], rel=1e-9)


def test_energy_transport_from_monthly_means_is_flagged(tmp_path):
    path = _write(tmp_path / "m.nc", _hadley_like(_sigma()), _times(3, 30.0))
    t = _table(engine.track([path], config.load(), metric_ids=METRICS))
    assert _first(t, "NH", "energy_transport_max")[1] == "time_mean_input"
    assert np.isfinite(_first(t, "NH", "energy_transport_max")[0])      # value kept, the flag says what it is


def test_energy_transport_below_ground_left_out(tmp_path):
    # the 1000 hPa level is below the ground everywhere: it takes its own half layer (950-1000 hPa)
    # with it, as in the streamfunction integral where below-ground wind counts as zero; the other
    # weights stay (50, 100 x 8 hPa), so the upper air is 450 hPa deep and the lower 400 hPa
    # (600, 700, 800, 900 hPa). Now 4.5 x 45000 - 5.5 x 40000 = -17500 Pa m/s of net northward mass
    # flux, which the correction removes at the section's mean energy.
    f = _hadley_like(_sigma())
    f = {k: np.array(v, dtype=float) for k, v in f.items()}
    for k in f:
        f[k][-1] = np.nan
    path = _write(tmp_path / "g.nc", f, _times(2, 0.25))
    t = _table(engine.track([path], config.load(), metric_ids=METRICS))
    e_up = CP_DRY * T_UP + GRAVITY * Z_UP + LATENT_HEAT_VAPORIZATION * Q_UP
    e_lo = CP_DRY * T_LO + GRAVITY * Z_LO + LATENT_HEAT_VAPORIZATION * Q_LO
    s_ve = 4.5 * 45000 * e_up - 5.5 * 40000 * e_lo
    s_v = 4.5 * 45000 - 5.5 * 40000
    s_e = 45000 * e_up + 40000 * e_lo
    corrected = s_ve - s_v * s_e / 85000.0
    expected = 2 * np.pi * EARTH_RADIUS / GRAVITY * corrected / 1e15
    assert _first(t, "NH", "energy_transport_max")[0] == pytest.approx(expected, rel=1e-3)
    uncorrected = 2 * np.pi * EARTH_RADIUS / GRAVITY * s_ve / 1e15
    assert abs(uncorrected - expected) > 10.0          # the correction matters here (tens of PW)


def test_energy_transport_sanity_band(tmp_path):
    """An idealised but physically sized midlatitude storm track: eddies of zonal wavenumber 6 with
    v' = 10 m/s, T' = 4 K (p/1000 hPa) and q' = 1.5 g/kg (p/1000 hPa)^3 in phase, z' in quadrature
    with v' (geostrophic, no flux), all times exp(-((|lat| - 42)/12)^2) (typical synoptic amplitudes,
    common practice). Band from memory: the atmosphere's poleward energy transport peaks at about
    5 PW near 40 deg (Trenberth & Caron 2001, J. Climate 14, 3433)."""
    env = np.exp(-(((np.abs(LAT) - 42.0) / 12.0) ** 2))
    pz = (PLEV / 1000.0)[:, None, None]
    wave = np.cos(6 * LAM)[None, None, :]
    quad = np.sin(6 * LAM)[None, None, :]
    sgn = np.sign(LAT)[None, :, None]           # northward eddy flux in the NH, southward in the SH
    e = env[None, :, None]
    f = {"va": 10.0 * e * wave * sgn,
         "ta": 250.0 + 4.0 * pz * e * wave,
         "zg": 5000.0 * (1 - pz) + 80.0 * e * quad,
         "hus": 0.004 * pz ** 3 + 0.0015 * pz ** 3 * e * wave}
    shape = (PLEV.size, LAT.size, LON.size)
    f = {k: np.broadcast_to(v, shape) for k, v in f.items()}
    path = _write(tmp_path / "storms.nc", f, _times(2, 0.25))
    t = _table(engine.track([path], config.load(), metric_ids=METRICS))
    for hemi, s in (("NH", 1), ("SH", -1)):
        peak, flag = _first(t, hemi, "energy_transport_max")
        lat, _ = _first(t, hemi, "energy_transport_max_lat")
        assert flag == "ok"
        assert 3.5 <= peak <= 6.5, peak
        assert 35.0 <= s * lat <= 45.0, lat


def test_physical_constants_against_named_sources():
    # reference library: scipy.constants.g is standard gravity (CGPM 1901), 9.80665 m s-2
    assert GRAVITY == scipy.constants.g
    # dry-air gas constant: universal gas constant (scipy.constants.R, CODATA) over the molar mass of
    # dry air 0.0289644 kg/mol (U.S. Standard Atmosphere 1976, from memory)
    assert R_DRY == pytest.approx(scipy.constants.R / 0.0289644, abs=0.01)
    # cp of dry air: AMS Glossary of Meteorology gives 1005.7 +- 2.5 J kg-1 K-1 (from memory)
    assert abs(CP_DRY - 1005.7) <= 2.5
    # latent heat of vaporisation at 0 degC: 2.501e6 J/kg (AMS Glossary of Meteorology, from memory)
    assert LATENT_HEAT_VAPORIZATION == pytest.approx(2.501e6, rel=1e-3)
    # Earth's mean radius 6371.0 km (IUGG mean radius R1 = 6371.0088 km, from memory)
    assert EARTH_RADIUS == pytest.approx(6371.0088e3, abs=100.0)


def test_no_eddies_gives_no_flux_latitude(tmp_path):
    # v zonally uniform: [u'v'] = 0 everywhere, so there is no latitude of the strongest flux
    f = _eddy_winds()
    f["va"] = np.zeros_like(f["va"]) + 1.0
    path = _write(tmp_path / "none.nc", f, _times(2, 1.0))
    t = _table(engine.track([path], config.load(), metric_ids=["eddy_momentum_flux_lat", "eddy_momentum_flux_max"]))
    lat, flag = _first(t, "NH", "eddy_momentum_flux_lat")
    assert np.isnan(lat) and flag == "weak_peak"
    assert _first(t, "NH", "eddy_momentum_flux_max")[0] == pytest.approx(0.0, abs=1e-9)


def test_atmosphere_at_rest_transports_nothing(tmp_path):
    f = _hadley_like(np.zeros_like(LAT))
    path = _write(tmp_path / "rest.nc", f, _times(2, 0.25))
    t = _table(engine.track([path], config.load(), metric_ids=METRICS))
    lat, flag = _first(t, "SH", "energy_transport_max_lat")
    assert np.isnan(lat) and flag == "weak_peak"
    assert _first(t, "SH", "energy_transport_max")[0] == pytest.approx(0.0, abs=1e-9)


def test_eddy_momentum_flux_per_ensemble_member(tmp_path):
    # two members, the second with its eddy winds scaled by 0.5 each: [u'v'] scales by 0.25 (40 -> 10 m2 s-2)
    w = _eddy_winds()
    u2 = 20.0 + 0.5 * (w["ua"] - 20.0)
    ua = np.stack([w["ua"], u2])
    va = np.stack([w["va"], 0.5 * w["va"]])
    times = _times(2, 1.0)
    dims = ("time", "member", "plev", "lat", "lon")
    ds = xr.Dataset({"ua": (dims, np.broadcast_to(ua[None], (2,) + ua.shape), {"standard_name": "eastward_wind", "units": "m s-1"}),
                     "va": (dims, np.broadcast_to(va[None], (2,) + va.shape), {"standard_name": "northward_wind", "units": "m s-1"})},
                    coords={"time": times, "member": ["r1", "r2"],
                            "plev": ("plev", PLEV, {"units": "hPa", "axis": "Z"}),
                            "lat": ("lat", LAT, {"units": "degrees_north"}), "lon": ("lon", LON, {"units": "degrees_east"})})
    path = tmp_path / "ens.nc"
    ds.to_netcdf(path, encoding={"time": {"units": "days since 2001-01-01", "calendar": "noleap"}})
    out = engine.track([str(path)], config.load(), metric_ids=["eddy_momentum_flux_max", "eddy_momentum_flux_lat"])
    c = out.columns
    got = {(c["member"][i], c["hemisphere"][i], c["metric"][i]): c["value"][i] for i in range(len(c["metric"]))
           if c["time"][i] == "2001-01-01"}
    assert got[("r1", "NH", "eddy_momentum_flux_max")] == pytest.approx(40.0, abs=0.05)
    assert got[("r2", "NH", "eddy_momentum_flux_max")] == pytest.approx(10.0, abs=0.02)
    assert got[("r2", "SH", "eddy_momentum_flux_lat")] == pytest.approx(-35.0, abs=0.02)


def test_energy_transport_needs_the_whole_circle(tmp_path):
    f = {k: np.asarray(v)[..., :12] for k, v in _hadley_like(_sigma()).items()}      # 0-110 E only
    times = _times(2, 0.25)
    dims = ("time", "plev", "lat", "lon")
    attrs = {"va": ("northward_wind", "m s-1"), "ta": ("air_temperature", "K"), "zg": ("geopotential_height", "m"),
             "hus": ("specific_humidity", "1")}
    ds = xr.Dataset({k: (dims, np.broadcast_to(v[None], (2,) + v.shape), {"standard_name": attrs[k][0], "units": attrs[k][1]})
                     for k, v in f.items()},
                    coords={"time": times, "plev": ("plev", PLEV, {"units": "hPa", "axis": "Z"}),
                            "lat": ("lat", LAT, {"units": "degrees_north"}),
                            "lon": ("lon", LON[:12], {"units": "degrees_east"})})
    path = tmp_path / "regional.nc"
    ds.to_netcdf(path, encoding={"time": {"units": "days since 2001-01-01", "calendar": "noleap"}})
    t = _table(engine.track([str(path)], config.load(), metric_ids=METRICS))
    val, flag = _first(t, "NH", "energy_transport_max")
    assert np.isnan(val) and flag == "too_little_data"
