"""jet_waviness and planetary_wave_K_amplitude through the engine on invented fields whose answers
follow from their formulas."""

import cftime
import numpy as np
import pytest
import xarray as xr

from circtrack import config, engine

LAT = np.arange(-90.0, 90.1, 1.0)
LON = np.arange(0.0, 360.0, 10.0)          # 36 longitudes: wavenumbers up to 17 are resolved
LAM = np.deg2rad(LON)
PLEV = np.array([1000.0, 850.0, 500.0, 300.0, 200.0])


def _write(path, role, field, *, lon=LON, ntime=2):
    name, sn = {"ua": ("ua", "eastward_wind"), "va": ("va", "northward_wind")}[role]
    t = np.array([cftime.num2date(i, "days since 2001-01-01", "noleap") for i in range(ntime)])
    full = np.broadcast_to(field[None, None], (ntime, PLEV.size) + field.shape).astype("float32")
    ds = xr.Dataset({name: (("time", "plev", "lat", "lon"), full, {"standard_name": sn, "units": "m s-1"})},
                    coords={"time": t, "plev": ("plev", PLEV, {"units": "hPa", "axis": "Z"}),
                            "lat": ("lat", LAT, {"units": "degrees_north"}), "lon": ("lon", lon, {"units": "degrees_east"})})
    ds.to_netcdf(path, encoding={"time": {"units": "days since 2001-01-01", "calendar": "noleap"}})
    return str(path)


def _rows(out):
    c = out.columns
    first = sorted(set(c["time"]))[0]
    return {(c["hemisphere"][i], c["sector"][i], c["metric"][i]): (float(c["value"][i]), c["flag"][i])
            for i in range(len(c["metric"])) if c["time"][i] == first}


def _jet(centre_nh, centre_sh):
    """u = 15 exp(-((lat - c(lon))/10)^2) around a northern and a southern jet latitude per longitude."""
    g = lambda c: 15.0 * np.exp(-(((LAT[:, None] - c[None, :]) / 10.0) ** 2))   # noqa: E731
    return np.where(LAT[:, None] >= 0, g(centre_nh), g(centre_sh))


def test_jet_waviness_of_a_meandering_jet(tmp_path):
    # NH jet at 45 + 5 sin(2 lon), SH at -(50 + 3 cos(3 lon)): over the full circle the spread is the
    # amplitude / sqrt(2) (mean of sin^2 over whole periods on a regular grid is 1/2)
    nh = 45.0 + 5.0 * np.sin(2 * LAM)
    sh = -(50.0 + 3.0 * np.cos(3 * LAM))
    path = _write(tmp_path / "jet.nc", "ua", _jet(nh, sh))
    out = engine.track([path], config.load(), metric_ids=["jet_waviness"], sectors=[("east", 0.0, 90.0)])
    r = _rows(out)
    assert r[("NH", "zonal", "jet_waviness")] == (pytest.approx(5.0 / np.sqrt(2), abs=0.03), "ok")
    assert r[("SH", "zonal", "jet_waviness")] == (pytest.approx(3.0 / np.sqrt(2), abs=0.03), "ok")
    # the sector 0-90 E holds longitudes 0, 10, ..., 90: the population spread of the prescribed latitudes there
    inside = LON <= 90.0
    assert r[("NH", "east", "jet_waviness")][0] == pytest.approx(np.std(nh[inside]), abs=0.03)
    assert r[("SH", "east", "jet_waviness")][0] == pytest.approx(np.std(sh[inside]), abs=0.03)


def test_straight_jet_has_no_waviness(tmp_path):
    path = _write(tmp_path / "straight.nc", "ua", _jet(np.full(LON.size, 47.3), np.full(LON.size, -51.8)))
    r = _rows(engine.track([path], config.load(), metric_ids=["jet_waviness"]))
    assert r[("NH", "zonal", "jet_waviness")][0] == pytest.approx(0.0, abs=1e-6)
    assert r[("SH", "zonal", "jet_waviness")][0] == pytest.approx(0.0, abs=1e-6)


def test_jet_outside_the_window_is_flagged(tmp_path):
    # the NH jet sits at 80 deg, beyond jets.eddy_window (15-70): no longitude has a jet inside it
    path = _write(tmp_path / "polar.nc", "ua", _jet(np.full(LON.size, 80.0), np.full(LON.size, -45.0)))
    r = _rows(engine.track([path], config.load(), metric_ids=["jet_waviness"]))
    val, flag = r[("NH", "zonal", "jet_waviness")]
    assert np.isnan(val) and flag == "too_little_data"
    assert r[("SH", "zonal", "jet_waviness")][1] == "ok"


@pytest.mark.parametrize("lon", [LON, LON - 180.0], ids=["0_360", "-180_180"])
def test_planetary_wave_amplitudes(tmp_path, lon):
    # v = m(lat) [6 cos(lon - 0.3) + 4 cos(2 lon) + 2 sin(3 lon) + 1.5 cos(7 lon)] with m = 1 in the NH and
    # 0.5 in the SH: amplitudes 6, 4, 2 (NH) and 3, 2, 1 (SH); wavenumber 7 is not reported
    lam = np.deg2rad(lon)
    wave = 6 * np.cos(lam - 0.3) + 4 * np.cos(2 * lam) + 2 * np.sin(3 * lam) + 1.5 * np.cos(7 * lam)
    m = np.where(LAT >= 0, 1.0, 0.5)
    path = _write(tmp_path / "waves.nc", "va", m[:, None] * wave[None, :], lon=lon)
    ids = [f"planetary_wave_{k}_amplitude" for k in (1, 2, 3)]
    r = _rows(engine.track([path], config.load(), metric_ids=ids))
    for k, nh in zip((1, 2, 3), (6.0, 4.0, 2.0)):
        assert r[("NH", "zonal", f"planetary_wave_{k}_amplitude")] == (pytest.approx(nh, abs=1e-5), "ok")
        assert r[("SH", "zonal", f"planetary_wave_{k}_amplitude")] == (pytest.approx(nh / 2, abs=1e-5), "ok")


def test_planetary_wave_band_average_is_cos_weighted(tmp_path):
    # wavenumber-2 amplitude growing linearly with latitude, A(lat) = lat / 10 in the NH: the answer is
    # the cos-weighted mean of lat/10 over 35..65 deg on the 1-degree grid
    field = np.where(LAT[:, None] >= 0, LAT[:, None] / 10.0, 0.0) * np.cos(2 * LAM)[None, :]
    path = _write(tmp_path / "ramp.nc", "va", field)
    r = _rows(engine.track([path], config.load(), metric_ids=["planetary_wave_2_amplitude"]))
    band = np.arange(35.0, 65.1, 1.0)
    w = np.cos(np.deg2rad(band))
    assert r[("NH", "zonal", "planetary_wave_2_amplitude")][0] == pytest.approx(np.sum(w * band / 10) / w.sum(), abs=1e-5)
    assert r[("SH", "zonal", "planetary_wave_2_amplitude")][0] == pytest.approx(0.0, abs=1e-6)


def test_planetary_waves_are_zonal_only(tmp_path):
    # a Fourier amplitude needs the whole latitude circle: asking for it per sector alone is a usage error
    from circtrack.errors import UsageError

    path = _write(tmp_path / "w.nc", "va", np.cos(2 * LAM)[None, :].repeat(LAT.size, 0))
    with pytest.raises(UsageError):
        engine.track([path], config.load(), metric_ids=["planetary_wave_2_amplitude"], sectors=[("east", 0.0, 90.0)])


def test_regional_grid_has_no_planetary_waves(tmp_path):
    lon = np.arange(-60.0, 40.1, 10.0)
    path = _write(tmp_path / "reg.nc", "va", np.cos(np.deg2rad(lon))[None, :].repeat(LAT.size, 0), lon=lon)
    r = _rows(engine.track([path], config.load(), metric_ids=["planetary_wave_1_amplitude"]))
    val, flag = r[("NH", "zonal", "planetary_wave_1_amplitude")]
    assert np.isnan(val) and flag == "too_little_data"


def test_noise_level_waves_are_flagged_not_trended(tmp_path):
    """A wave at float-noise level (the demo's waves 1 and 2: ~1e-4 m/s from rounding a field without
    them) is no wave: value kept, flag weak_wave, so trend leaves it out; a real wave stays ok. The
    floor (waves.min_amplitude_m_s, 0.05 m/s) is this project's."""
    rng = np.random.default_rng(5)
    noise = 1e-4 * rng.standard_normal((LAT.size, LON.size))          # rounding-sized, every wavenumber
    field = 10.0 + noise + np.where(LAT[:, None] >= 0, 1.0, 0.0) * np.cos(3 * LAM)[None, :]
    path = _write(tmp_path / "noise.nc", "va", field)
    r = _rows(engine.track([path], config.load(), metric_ids=[f"planetary_wave_{k}_amplitude" for k in (1, 2, 3)]))
    for k in (1, 2):
        for hemi in ("NH", "SH"):
            value, flag = r[(hemi, "zonal", f"planetary_wave_{k}_amplitude")]
            assert flag == "weak_wave" and 0.0 < value < 1e-3
    assert r[("NH", "zonal", "planetary_wave_3_amplitude")] == (pytest.approx(1.0, abs=1e-3), "ok")
    assert r[("SH", "zonal", "planetary_wave_3_amplitude")][1] == "weak_wave"
    # the floor is a parameter: below it everything counts
    cfg = config.load()
    cfg["waves"]["min_amplitude_m_s"] = 0.0
    r0 = _rows(engine.track([path], cfg, metric_ids=["planetary_wave_1_amplitude"]))
    assert r0[("NH", "zonal", "planetary_wave_1_amplitude")][1] == "ok"


def test_trend_leaves_weak_waves_out(tmp_path):
    """The demo's waves 1 and 2 (noise) get no trend rows; wave 3 (a real, constant wave) does."""
    from click.testing import CliRunner

    from circtrack.cli import main

    sample = str(__import__("pathlib").Path(__file__).resolve().parents[2] / "sample_inputs" / "model_q")
    ids = ",".join(f"planetary_wave_{k}_amplitude" for k in (1, 2, 3))
    csv = tmp_path / "w.csv"
    r = CliRunner().invoke(main, ["track", sample, "-o", str(csv), "--metrics", ids, "-q"])
    assert r.exit_code == 0, r.output
    r = CliRunner().invoke(main, ["trend", str(csv), "-o", str(tmp_path / "t.csv")])
    assert r.exit_code == 0, r.output
    trended = {line.split(",")[1] for line in (tmp_path / "t.csv").read_text().splitlines()[1:]}
    assert trended == {"planetary_wave_3_amplitude"}
    assert "planetary_wave_1_amplitude" in r.stderr and "weak_wave" in r.stderr
