"""WMO lapse-rate tropopause: the U.S. Standard Atmosphere 1976 and a field with a known break."""

import numpy as np
import pytest
import xarray as xr

from circtrack import config, engine, synthetic
from circtrack.kernels.vertical import lapse_rate_tropopause

G0 = 9.80665
R_US76 = 8.31432 / 0.0289644          # U.S. Standard Atmosphere 1976 gas constant for air


def us76(levels_hpa):
    """Temperature of the U.S. Standard Atmosphere 1976 (NOAA/NASA/USAF 1976, table 4) on pressure
    levels: 288.15 K and 1013.25 hPa at sea level, -6.5 K/km to 11 km geopotential (the tropopause,
    216.65 K, 226.32 hPa), isothermal to 20 km, +1 K/km above; pressure integrated hydrostatically."""
    z = np.linspace(0, 30, 30001)
    t = np.where(z <= 11, 288.15 - 6.5 * z, np.where(z <= 20, 216.65, 216.65 + (z - 20)))
    lnp = np.log(1013.25) - np.concatenate([[0], np.cumsum(G0 / (R_US76 * 0.5 * (t[1:] + t[:-1])) * np.diff(z) * 1000)])
    return np.interp(np.log(levels_hpa), lnp[::-1], t[::-1]), np.interp(np.log(levels_hpa), lnp[::-1], z[::-1])


@pytest.mark.parametrize("levels", [np.arange(50, 1001, 10.0),
                                    np.array([10, 20, 30, 50, 70, 100, 125, 150, 175, 200, 225, 250, 300, 350, 400,
                                              450, 500, 550, 600, 650, 700, 750, 775, 800, 825, 850, 875, 900,
                                              925, 950, 975, 1000.0])])
def test_us_standard_atmosphere_1976_tropopause(levels):
    # source: U.S. Standard Atmosphere 1976: tropopause at 11 km geopotential, 226.32 hPa, 216.65 K.
    t, z = us76(levels)
    p_trop, z_trop, why = lapse_rate_tropopause(t, levels)
    assert why == "ok"
    z_ground = np.interp(1000.0, levels, z) * 1000.0         # heights are above the lowest level
    assert p_trop == pytest.approx(226.32, abs=7.0)           # limited by the level spacing
    assert (z_trop + z_ground) / 1000.0 == pytest.approx(11.0, abs=0.25)  # layers are 0.3-0.8 km thick


def test_isothermal_and_no_tropopause():
    levels = np.arange(100, 1001, 50.0)
    # a constant 6.5 K/km troposphere all the way up has no tropopause in the search range
    z = np.linspace(16, 0, levels.size)
    t = 288.15 - 6.5 * z
    p, h, why = lapse_rate_tropopause(t, levels)
    assert np.isnan(p) and np.isnan(h) and why == "no_tropopause_in_range"


def test_truncated_us76_profile_needs_the_2km_above():
    # source: U.S. Standard Atmosphere 1976 (tropopause 11 km, 226.32 hPa). Levels that stop at 215 hPa,
    # about 0.33 km above the tropopause, cannot show that the lapse rate stays below 2 K/km over the
    # 2 km above it (WMO 1957): NaN with the reason (issue 12; it was an ok 226 hPa before).
    short = np.arange(215.0, 1001.0, 5.0)
    t, z = us76(short)
    p, h, why = lapse_rate_tropopause(t, short)
    assert np.isnan(p) and np.isnan(h) and why == "data_end_within_2km"
    # levels reaching 150 hPa (about 13.6 km, 2.6 km above): the tropopause is found
    enough = np.arange(150.0, 1001.0, 10.0)
    t, z = us76(enough)
    p, h, why = lapse_rate_tropopause(t, enough)
    assert why == "ok" and p == pytest.approx(226.32, abs=7.0)
    # a batch: the same profile and one whose top level is missing
    t_short, _ = us76(short)
    t_gap, _ = us76(short)
    t_gap[0] = np.nan                                           # missing top level: the data end even lower
    p, h, why = lapse_rate_tropopause(np.stack([t_short, t_gap]), short)
    assert list(why) == ["data_end_within_2km", "data_end_within_2km"]


def _profile_on_heights(z_km, t):
    """Pressure levels (hPa, top first) of a temperature profile given on heights, integrated with the
    kernel's own hypsometric rule (layer-mean temperature), so heights come back exactly."""
    lnp = np.log(1000.0) - np.concatenate(
        [[0.0], np.cumsum(G0 / (287.05 * 0.5 * (t[1:] + t[:-1])) * np.diff(z_km) * 1000.0)])
    return np.exp(lnp)[::-1], t[::-1]


def test_mean_lapse_rate_above_is_thickness_weighted():
    # 6.5 K/km to 11 km, isothermal 11-11.3 km on ten thin layers (30 m), then ONE thick layer
    # 11.3-13.3 km at 5 K/km, isothermal above. Counted per layer the 2 km above 11 km average
    # (10 x 0 + 5)/11 = 0.45 K/km and would pass; weighted by thickness it is (0.3 x 0 + 1.7 x 5)/2 =
    # 4.25 K/km (about 2.4 K/km with the lapse rate varying linearly between layer mid-heights, as the
    # kernel takes it) > 2, so 11 km is no tropopause (WMO 1957: "the average lapse rate between this
    # level and all higher levels within 2 km"). The next candidate is near the top of the 5 K/km layer.
    z = np.concatenate([np.arange(0.0, 11.0, 0.5), np.linspace(11.0, 11.3, 11), [13.3],
                        np.arange(13.8, 20.01, 0.5)])
    t = np.where(z <= 11.0, 288.15 - 6.5 * z, np.where(z <= 11.3, 216.65, 216.65 - 5.0 * (np.minimum(z, 13.3) - 11.3)))
    p, tt = _profile_on_heights(z, t)
    _, h, why = lapse_rate_tropopause(tt, p, p_top=50.0)
    assert why == "ok"
    assert h / 1000.0 == pytest.approx(13.3, abs=0.6)          # the 3 K/km layer is 2 km thick
    assert h / 1000.0 > 12.0                                    # not the 11 km a per-layer average gives


def test_tropopause_break_and_tropical_pressure(tmp_path):
    """Tropopause height H(lat) = 13.5 - 3.5 tanh((|lat| - 30)/6) km: steepest fall at |lat| = 30
    (recovered within 1.5 deg: the detected height moves in steps of the 10-hPa level spacing).
    T = 300 - 6.5 z below H, isothermal above; levels every 10 hPa."""
    lat = np.arange(-90, 90.1, 1.0)
    levels = np.arange(50, 1001, 10.0)
    zkm = 7.4 * np.log(1000.0 / levels)          # scale-height heights, only to build T(p)
    H = 13.5 - 3.5 * np.tanh((np.abs(lat) - 30) / 6.0)
    T = 300 - 6.5 * np.minimum(zkm[:, None], H[None, :])      # (L, J)
    ta = np.broadcast_to(T[None, :, :, None], (2, levels.size, lat.size, 8)).astype("f4")
    ds = xr.Dataset({"ta": (("time", "plev", "lat", "lon"), ta, {"units": "K", "standard_name": "air_temperature"})},
                    coords={"time": synthetic.monthly_times(2001, 1)[:2], "plev": ("plev", levels, {"units": "hPa"}),
                            "lat": ("lat", lat, {"units": "degrees_north"}), "lon": ("lon", np.arange(0, 360, 45.0), {"units": "degrees_east"})})
    path = tmp_path / "ta.nc"
    ds.to_netcdf(path, encoding=synthetic.time_encoding())
    out = engine.track([str(path)], config.load())
    c = out.columns
    got = {(c["metric"][i], c["hemisphere"][i]): c["value"][i] for i in range(len(c["metric"])) if c["time"][i] == c["time"][0]}
    assert got[("tropopause_break_lat", "NH")] == pytest.approx(30.0, abs=1.5)
    assert got[("tropopause_break_lat", "SH")] == pytest.approx(-30.0, abs=1.5)
    # tropical tropopause at H ~ 17 km -> p = 1000 exp(-17/7.4) hPa in this construction
    assert got[("tropical_tropopause_pressure", "global")] == pytest.approx(1000 * np.exp(-17.0 / 7.4), rel=0.08)
