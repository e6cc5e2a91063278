"""Closed-form answers of circtrack.synthetic recovered through the full engine.track path.

Construction (synthetic.py): psi = S(lat) P(p) with zeros exactly at cell_zeros; [u]200 - [u]850
peaks exactly at stj; [u]850 peaks exactly at edj with half-maximum width 2 w sqrt(ln 2).
"""

import math

import numpy as np
import pytest

from circtrack import synthetic
from tests.conftest import run

TOL = 0.1   # degrees
D = synthetic.DEFAULTS


def _quadrature_factor():
    """psi500 / (S hadley_peak) as the engine's column rules give it on the test file's levels, written
    out here with numpy's trapezoid: the analytic [v] ~ dP/dp, P = sin^2(pi (p - 50 hPa)/950 hPa),
    integrated from the top level (psi = 0 there) to 500 hPa, minus the column's net flux (the
    trapezoid over the whole column, not exactly 0) spread over the column's mass. The analytic value
    is P(500 hPa) = 0.997; the coarse levels near the top make the trapezoid about 4 % smaller."""
    from tests.conftest import PLEV
    p = np.sort(PLEV) * 100.0
    pt, ps = 5000.0, 100000.0
    dpdp = np.pi / (ps - pt) * np.sin(2 * np.pi * (p - pt) / (ps - pt))
    upto = p <= 50000.0
    part = np.trapezoid(dpdp[upto], p[upto])
    net = np.trapezoid(dpdp, p)
    return part - net * (50000.0 - p[0]) / (p[-1] - p[0])


Q500 = _quadrature_factor()


def _times(table):
    return sorted({k[0] for k in table})


def _check(table, t, hemi, metric, expected, tol=TOL):
    value, flag = table[(t, hemi, metric)]
    assert flag == "ok", (t, hemi, metric, flag)
    assert value == pytest.approx(expected, abs=tol), (t, hemi, metric)


def test_default_field_all_known_answers(default_nc):
    table, _ = run(default_nc)
    ts = _times(table)
    assert len(ts) == 3
    z = D["cell_zeros"]
    width = 2 * D["edj_width"] * math.sqrt(math.log(2))     # 16.651 deg
    for t in ts:
        _check(table, t, "NH", "hadley_edge_lat", z[3])
        _check(table, t, "SH", "hadley_edge_lat", z[1])
        _check(table, t, "NH", "subtropical_jet_lat", D["stj"][0])
        _check(table, t, "SH", "subtropical_jet_lat", D["stj"][1])
        _check(table, t, "NH", "eddy_jet_lat", D["edj"][0])
        _check(table, t, "SH", "eddy_jet_lat", D["edj"][1])
        # [u]850 is the eddy jet alone (the subtropical jet is zero at 850 hPa): speed is exact
        _check(table, t, "NH", "eddy_jet_speed", D["edj_speed"][0], tol=0.05)
        _check(table, t, "SH", "eddy_jet_speed", D["edj_speed"][1], tol=0.05)
        _check(table, t, "NH", "eddy_jet_width", width)
        _check(table, t, "SH", "eddy_jet_width", width)
        # the NH cell is normalised to hadley_peak at P = 1 (525 hPa); the engine's trapezoid on these
        # levels gives Q500 of it, computed independently above; the parabola vertex adds < 0.5 %
        assert 0.94 < Q500 < 0.98
        _check(table, t, "NH", "hadley_strength", Q500 * D["hadley_peak"], tol=0.005 * D["hadley_peak"])


def test_edges_and_jets_varying_in_time(make_nc):
    zeros = np.array([[-60.0, -30.0, 5.0, 28.0, 62.0],
                      [-58.0, -33.4, 3.0, 31.7, 60.0],
                      [-62.0, -26.2, 6.0, 24.3, 65.0],
                      [-59.0, -35.8, 2.0, 34.6, 63.0]])
    edj = np.array([[45.0, -50.0], [41.3, -47.7], [48.6, -53.2], [38.2, -44.4]])
    stj = np.array([[30.0, -32.0], [27.5, -29.3], [33.2, -35.1], [25.4, -27.8]])
    path = make_nc("varying.nc", ntime=4, cell_zeros=zeros, edj=edj, stj=stj)
    table, _ = run(path)
    ts = _times(table)
    assert len(ts) == 4
    for k, t in enumerate(ts):
        _check(table, t, "NH", "hadley_edge_lat", zeros[k, 3])
        _check(table, t, "SH", "hadley_edge_lat", zeros[k, 1])
        _check(table, t, "NH", "eddy_jet_lat", edj[k, 0])
        _check(table, t, "SH", "eddy_jet_lat", edj[k, 1])
        _check(table, t, "NH", "subtropical_jet_lat", stj[k, 0])
        _check(table, t, "SH", "subtropical_jet_lat", stj[k, 1])


def test_cell_boundary_symmetric_cells(make_nc):
    # Hadley edges just inside the +-35 deg boundary window, so the window's extrema are the Hadley
    # cells' (with the default zeros the synthetic SH Ferrel cell at -35 deg exceeds the NH Hadley peak
    # and the boundary is legitimately flagged cells_out_of_order).
    zeros = (-50.0, -34.5, 2.3, 34.0, 50.0)
    table, _ = run(make_nc("sym.nc", cell_zeros=zeros), metric_ids=["cell_boundary_lat", "hadley_edge_lat"])
    for t in _times(table):
        _check(table, t, "global", "cell_boundary_lat", 2.3)
        _check(table, t, "NH", "hadley_edge_lat", 34.0)
        _check(table, t, "SH", "hadley_edge_lat", -34.5)


def test_metric_subset_only_returns_requested(default_nc):
    table, _ = run(default_nc, metric_ids=["eddy_jet_lat"])
    assert {k[2] for k in table} == {"eddy_jet_lat"}
    assert {k[1] for k in table} == {"NH", "SH"}


def test_common_practice_sanity(default_nc):
    """Common practice (outside the project): present-day Hadley cells end ~25-35 deg from the equator,
    and by the Peixoto & Oort (1992) convention psi > 0 in the NH Hadley cell (clockwise with north
    on the right) and psi < 0 in the SH cell."""
    from circtrack.kernels.vertical import mass_streamfunction
    from tests.conftest import LAT, PLEV, make_dataset

    # common practice: Hadley edges within 25-35 deg of the equator; Peixoto & Oort (1992) sign convention
    table, _ = run(default_nc)
    for t in _times(table):
        nh = table[(t, "NH", "hadley_edge_lat")][0]
        sh = table[(t, "SH", "hadley_edge_lat")][0]
        assert 25.0 <= nh <= 35.0
        assert -35.0 <= sh <= -25.0
    ds = make_dataset(1, dtype="float64")
    v = ds["va"].mean("lon").values[0]                       # (L, J), plev descending in the file
    order = np.argsort(PLEV)
    psi = mass_streamfunction(v[order], PLEV[order] * 100.0, LAT)
    k500 = int(np.flatnonzero(PLEV[order] == 500.0)[0])
    assert psi[k500, LAT == 15.0][0] > 0                    # NH Hadley cell
    assert psi[k500, LAT == -15.0][0] < 0                   # SH Hadley cell


def test_subtropical_jet_speed_closed_form(default_nc):
    # [u]200 at the stj latitude = stj_speed + the eddy jet's Gaussian tail there (closed form);
    # NH: 30 + 12 exp(-((30-45)/10)^2) = 31.2648; SH: 35 + 15 exp(-((-32+50)/10)^2) = 35.5874
    table, _ = run(default_nc, metric_ids=["subtropical_jet_speed"])
    nh = 30.0 + 12.0 * math.exp(-((30.0 - 45.0) / 10.0) ** 2)
    sh = 35.0 + 15.0 * math.exp(-((-32.0 + 50.0) / 10.0) ** 2)
    for t in _times(table):
        _check(table, t, "NH", "subtropical_jet_speed", nh, tol=0.05)
        _check(table, t, "SH", "subtropical_jet_speed", sh, tol=0.05)


def test_time_varying_cell_strength(make_nc):
    peaks = np.array([1.0e11, 1.5e11, 0.6e11])
    table, _ = run(make_nc("peaks.nc", hadley_peak=peaks), metric_ids=["hadley_strength"])
    got = np.array([table[(t, "NH", "hadley_strength")][0] for t in _times(table)])
    np.testing.assert_allclose(got / peaks, got[0] / peaks[0], rtol=1e-5)   # same shape, scaled
    np.testing.assert_allclose(got, Q500 * peaks, rtol=0.005)   # the trapezoid factor, see _quadrature_factor


class TestFlags:
    def test_eddy_jet_outside_window(self, make_nc):
        table, _ = run(make_nc("edj72.nc", edj=(72.0, -50.0)))
        for t in _times(table):
            value, flag = table[(t, "NH", "eddy_jet_lat")]
            assert flag == "extremum_at_window_edge" and math.isnan(value)
            assert table[(t, "NH", "eddy_jet_width")][1] == "extremum_at_window_edge"
            _check(table, t, "SH", "eddy_jet_lat", -50.0)       # the other hemisphere is unaffected

    def test_all_nan_va_too_little_data(self, make_nc):
        def blank(ds):
            ds["va"][:] = np.nan
            return ds

        table, _ = run(make_nc("nanva.nc", transform=blank))
        for t in _times(table):
            for h in ("NH", "SH"):
                for m in ("hadley_edge_lat", "hadley_strength"):
                    value, flag = table[(t, h, m)]
                    assert flag == "too_little_data" and math.isnan(value), (h, m)
            _check(table, t, "NH", "eddy_jet_lat", 45.0)

    def test_weak_cell(self, make_nc):
        table, _ = run(make_nc("weak.nc", hadley_peak=1e8))
        for t in _times(table):
            value, flag = table[(t, "NH", "hadley_edge_lat")]
            assert flag == "weak_cell" and math.isnan(value)
            s_value, s_flag = table[(t, "NH", "hadley_strength")]
            assert s_flag == "weak_cell"
            assert s_value == pytest.approx(Q500 * 1e8, rel=0.005)     # strength is kept
