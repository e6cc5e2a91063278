"""Known answers for the published alternative definitions (defaults unchanged):
psi over a layer, psi falling to a fraction of its extremum, the subtropical jet from the upper-level
wind, the tropopause break from a height threshold, the OLR edge from a fraction of its maximum."""

import math

import numpy as np
import pytest

from circtrack import config, engine, synthetic
from circtrack.kernels.vertical import layer_mean
from circtrack.metrics.tropopause import height_threshold_break
from tests.metrics.test_water_radiation_baroclinic import _first, _write

D = synthetic.DEFAULTS


def _track(path, metric_ids, **settings):
    cfg = config.load()
    for key, val in settings.items():
        section, name = key.split("__")
        cfg[section][name] = val
    out = engine.track([path], cfg, metric_ids=metric_ids)
    c = out.columns
    return {(c["time"][i], c["hemisphere"][i], c["metric"][i]): (float(c["value"][i]), c["flag"][i])
            for i in range(len(c["metric"])) if c["sector"][i] == "zonal"}


def _one(table, hemi, metric):
    t = sorted({k[0] for k in table})[0]
    return table[(t, hemi, metric)]


# ----------------------------------------------------------------------------- layer mean (kernel)
def test_layer_mean_of_a_linear_profile_is_its_mid_layer_value():
    p = np.array([100.0, 200.0, 300.0, 500.0, 700.0, 850.0, 1000.0])
    field = (3.0 + 0.01 * p)[:, None] * np.array([1.0, -2.0])[None, :]          # (L, J), linear in p
    got = layer_mean(field, p, [300.0, 700.0], tolerance=1.0)
    assert got == pytest.approx((3.0 + 0.01 * 500.0) * np.array([1.0, -2.0]))
    # a quadratic against an independent quadrature (numpy's trapezoid on the same points)
    q = (p ** 2)[:, None] * np.ones(2)
    inside = (p >= 300) & (p <= 700)
    assert layer_mean(q, p, [300.0, 700.0], tolerance=1.0)[0] == pytest.approx(
        np.trapezoid(p[inside] ** 2, p[inside]) / 400.0)
    assert layer_mean(field, p, [50.0, 700.0], tolerance=1.0) is None        # the data do not reach 50 hPa


def test_hadley_edge_from_the_layer_mean_keeps_separable_zeros(default_nc):
    """psi = S(lat) P(p) (synthetic.py): any layer mean has the zeros of S, so the edge stays at the
    constructed zero; the strength scales with the layer mean of P (smaller than its 500 hPa peak)."""
    plain = _track(default_nc, ["hadley_edge_lat", "hadley_strength"])
    layer = _track(default_nc, ["hadley_edge_lat", "hadley_strength"], cells__psi_layer_hpa=[300.0, 700.0])
    assert _one(layer, "NH", "hadley_edge_lat")[0] == pytest.approx(D["cell_zeros"][3], abs=0.1)
    assert _one(layer, "SH", "hadley_edge_lat")[0] == pytest.approx(D["cell_zeros"][1], abs=0.1)
    # P = sin^2(pi (p - 50)/950) averaged over 300-700 hPa is below its value near 500 hPa (analytic: 0.81 vs 0.997)
    pp = np.linspace(300, 700, 4001)
    ratio = np.mean(np.sin(np.pi * (pp - 50) / 950) ** 2) / np.sin(np.pi * 450 / 950) ** 2
    got = _one(layer, "NH", "hadley_strength")[0] / _one(plain, "NH", "hadley_strength")[0]
    assert got == pytest.approx(ratio, abs=0.03)


def test_bad_layer_is_one_line():
    from circtrack.errors import UsageError
    from circtrack.metrics.cells import psi_layer
    cfg = config.load()
    cfg["cells"]["psi_layer_hpa"] = [700.0, 300.0]
    with pytest.raises(UsageError, match="lower first"):
        psi_layer(cfg)


# ----------------------------------------------------------------------------- psi fraction
def test_hadley_edge_where_psi_falls_to_a_quarter_of_its_maximum(default_nc):
    """psi is proportional to cos(lat) S(lat) at every level: the answer from that closed form on a
    0.001-degree grid, independently of the engine."""
    fine = np.arange(5.0, 28.0, 0.001)
    s = synthetic.cell_shape(fine, D["cell_zeros"])[0] * np.cos(np.deg2rad(fine))
    k = int(np.argmax(s))
    want = fine[k + int(np.argmax(s[k:] <= 0.25 * s[k]))]
    table = _track(default_nc, ["hadley_edge_lat"], cells__edge_fraction=0.25)
    value, flag = _one(table, "NH", "hadley_edge_lat")
    assert flag == "ok"
    assert value == pytest.approx(want, abs=0.1)
    assert value < D["cell_zeros"][3] - 1.0          # equatorward of the zero


# ----------------------------------------------------------------------------- jets
def test_subtropical_jet_from_the_upper_wind_maximum(default_nc):
    """[u]200 = stj_speed g(stj) + edj_speed g(edj) (synthetic.py, the shear part is 1 at 200 hPa):
    its maximum lies poleward of the shear maximum, pulled by the eddy-driven jet's flank; reference
    from the closed form on a 0.001-degree grid."""
    fine = np.arange(10.0, 60.0, 0.001)
    u = (D["stj_speed"][0] * synthetic.gaussian(fine, D["stj"][0], D["stj_width"])
         + D["edj_speed"][0] * synthetic.gaussian(fine, D["edj"][0], D["edj_width"]))
    want = fine[np.argmax(u)]
    table = _track(default_nc, ["subtropical_jet_lat"], jets__subtropical_method="upper_wind")
    value, flag = _one(table, "NH", "subtropical_jet_lat")
    assert flag == "ok"
    assert value == pytest.approx(want, abs=0.1)
    assert value > D["stj"][0] + 0.2
    shear = _track(default_nc, ["subtropical_jet_lat"])
    assert _one(shear, "NH", "subtropical_jet_lat")[0] == pytest.approx(D["stj"][0], abs=0.1)


# ----------------------------------------------------------------------------- tropopause
def test_height_threshold_break_on_a_known_height_profile():
    """H = 13.5 - 3.5 tanh((|lat| - 30)/6) km falls below 15 km at |lat| = 30 + 6 atanh(-3/7)."""
    x = np.arange(0.0, 90.1, 1.0)
    z = (13.5 - 3.5 * np.tanh((x - 30.0) / 6.0)) * 1000.0
    c = height_threshold_break(z[None, :], x, [15.0, 50.0], 15000.0)
    assert c.position[0] == pytest.approx(30.0 + 6.0 * math.atanh(-3.0 / 7.0), abs=0.02)
    c = height_threshold_break(z[None, :], x, [15.0, 50.0], 20000.0)      # never above: no crossing
    assert np.isnan(c.position[0]) and c.reason[0] != "ok"


def test_tropopause_break_by_threshold_through_the_engine(tmp_path):
    """The profile of tests/metrics/test_tropopause.py: the break by the 15 km threshold lies
    equatorward of the steepest slope (30 deg), near 30 + 6 atanh(-3/7) = 27.3 deg (within 1.5 deg:
    the detected height moves in steps of the 10-hPa level spacing and is measured above 1000 hPa)."""
    lat = np.arange(-90, 90.1, 1.0)
    levels = np.arange(50, 1001, 10.0)
    zkm = 7.4 * np.log(1000.0 / levels)
    H = 13.5 - 3.5 * np.tanh((np.abs(lat) - 30) / 6.0)
    T = 300 - 6.5 * np.minimum(zkm[:, None], H[None, :])
    path, _ = _write(tmp_path, {"ta": (T, {"units": "K", "standard_name": "air_temperature"})}, levels=levels)
    cfg = config.load()
    cfg["tropopause"]["break_method"] = "height_threshold"
    r = _first(engine.track([path], cfg, metric_ids=["tropopause_break_lat"]))
    want = 30.0 + 6.0 * math.atanh(-3.0 / 7.0)
    assert r[("tropopause_break_lat", "NH")][0] == pytest.approx(want, abs=1.5)
    assert r[("tropopause_break_lat", "SH")][0] == pytest.approx(-want, abs=1.5)
    assert r[("tropopause_break_lat", "NH")][1] == "ok"


# ----------------------------------------------------------------------------- OLR
def test_olr_edge_at_a_fraction_of_the_maximum(tmp_path):
    lat = np.arange(-90, 90.1, 1.0)
    a = np.abs(lat)
    # OLR = 270 - 40 ((|lat| - 20)/30)^2: max 270 at 20; 0.9 x 270 = 243 where ((|lat| - 20)/30)^2 = 27/40
    olr = 270 - 40 * ((a - 20) / 30.0) ** 2
    path, _ = _write(tmp_path, {"rlut": (olr, {"units": "W m-2", "standard_name": "toa_outgoing_longwave_flux"})})
    cfg = config.load()
    cfg["surface"]["olr_fraction_of_max"] = 0.9
    r = _first(engine.track([path], cfg))
    want = 20 + 30 * np.sqrt(27.0 / 40.0)
    assert r[("olr_edge_lat", "NH")][0] == pytest.approx(want, abs=0.05)
    assert r[("olr_edge_lat", "SH")][0] == pytest.approx(-want, abs=0.05)


@pytest.mark.parametrize("key,value,words", [
    ("jets.subtropical_method", "fastest", "jets.subtropical_method"),
    ("tropopause.break_method", "steep", "tropopause.break_method"),
    ("surface.olr_fraction_of_max", 1.5, "surface.olr_fraction_of_max"),
    ("cells.edge_fraction", -0.1, "cells.edge_fraction"),
])
def test_unknown_method_names_are_refused(tmp_path, key, value, words):
    from click.testing import CliRunner

    from circtrack.cli import main
    conf = tmp_path / "c.toml"
    section, name = key.split(".")
    conf.write_text(f"[{section}]\n{name} = {value!r}\n".replace("'", '"'))
    path, _ = _write(tmp_path, {"rlut": (np.full(181, 250.0), {"units": "W m-2"})})
    r = CliRunner().invoke(main, ["track", path, "-o", str(tmp_path / "o.csv"), "-c", str(conf), "-q",
                                  "--metrics", "hadley_edge_lat,subtropical_jet_lat,tropopause_break_lat,olr_edge_lat"])
    assert r.exit_code == 2, r.output
    assert words in r.output and len(r.output.strip().splitlines()) == 1


def test_defaults_unchanged():
    cfg = config.defaults()
    assert cfg["cells"]["psi_layer_hpa"] == [] and cfg["cells"]["edge_fraction"] == 0.0
    assert cfg["jets"]["subtropical_method"] == "shear"
    assert cfg["tropopause"]["break_method"] == "steepest_slope"
    assert cfg["surface"]["olr_fraction_of_max"] == 0.0
