"""The cross-section of one time step (``circtrack plot --section``): the data behind the picture
against the synthetic field's closed-form answers and the engine's rows, the picture itself, and
the command's errors."""

from pathlib import Path

import matplotlib.image as mpimg
import numpy as np
import pytest
from click.testing import CliRunner

from circtrack import config as C
from circtrack import section as SEC
from circtrack import synthetic
from circtrack.cli import main
from circtrack.constants import EARTH_RADIUS, GRAVITY
from tests.conftest import LAT, LON, PLEV, run as engine_rows

# a circulation that changes from month to month, so choosing the time step matters
ZEROS = np.array([[-60.0, -30.0, 5.0, 28.0, 62.0],
                  [-58.0, -27.5, 4.0, 31.5, 63.0],
                  [-61.0, -33.0, 6.0, 25.0, 60.0]])
STJ = np.array([[30.0, -32.0], [34.0, -28.0], [26.0, -35.0]])
EDJ = np.array([[45.0, -50.0], [48.0, -46.0], [41.0, -53.0]])
TIMES = ["2000-01-15", "2000-02-15", "2000-03-15"]


@pytest.fixture(scope="module")
def moving_nc(tmp_path_factory):
    ds = synthetic.dataset(LAT, LON, PLEV, synthetic.monthly_times(2000, 1, "noleap")[:3],
                           cell_zeros=ZEROS, stj=STJ, edj=EDJ)
    path = tmp_path_factory.mktemp("sec") / "moving.nc"
    ds.to_netcdf(path, encoding=synthetic.time_encoding("noleap"))
    return str(path)


def invoke(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


@pytest.mark.parametrize("k", [0, 1, 2])
def test_positions_are_the_synthetic_answers_and_the_engine_rows(moving_nc, k):
    sec = SEC.section_data(moving_nc, C.load(None), time=None if k == 0 else TIMES[k])
    assert sec.time == TIMES[k]
    # closed-form answers of the synthetic field (grid 1 degree; zero crossings are linear interpolation)
    assert sec.value("hadley_edge_lat", "NH") == pytest.approx(ZEROS[k, 3], abs=0.05)
    assert sec.value("hadley_edge_lat", "SH") == pytest.approx(ZEROS[k, 1], abs=0.05)
    assert sec.value("subtropical_jet_lat", "NH") == pytest.approx(STJ[k, 0], abs=0.1)
    assert sec.value("subtropical_jet_lat", "SH") == pytest.approx(STJ[k, 1], abs=0.1)
    assert sec.value("eddy_jet_lat", "NH") == pytest.approx(EDJ[k, 0], abs=0.1)
    assert sec.value("eddy_jet_lat", "SH") == pytest.approx(EDJ[k, 1], abs=0.1)
    # the same numbers and flags as 'circtrack track' over the whole file writes for that time step
    table, _ = engine_rows(moving_nc, metric_ids=SEC.METRIC_IDS)
    for metric in SEC.METRIC_IDS:
        for hemi in ("NH", "SH"):
            (v, flag), (tv, tflag) = sec.rows[(metric, hemi)], table[(TIMES[k], hemi, metric)]
            assert flag == tflag and (v == tv or (np.isnan(v) and np.isnan(tv)))   # jet cores: NaN here


def test_fields_are_the_zonal_means_on_every_level(moving_nc):
    sec = SEC.section_data(moving_nc, C.load(None), time=TIMES[1])
    ua, va, _ = synthetic.fields(LAT, LON, PLEV, ntime=3, cell_zeros=ZEROS, stj=STJ, edj=EDJ)
    order = np.argsort(PLEV)                        # the section has the top first
    np.testing.assert_array_equal(sec.plev_u, PLEV[order])
    np.testing.assert_array_equal(sec.plev_psi, PLEV[order])
    u_zm = ua[1].astype(np.float32).astype(float).mean(axis=-1)[order]
    np.testing.assert_allclose(sec.u, u_zm, atol=1e-4)
    # psi: the trapezoid integral of [v] from the top data level (psi = 0 there), minus the column's
    # net flux spread over the column's mass (cells.top, cells.balance defaults; issue 12), written out
    # here independently of the kernel
    v = va[1].astype(np.float32).astype(float).mean(axis=-1)[order]
    p = PLEV[order] * 100.0
    integral = np.vstack([0.0 * v[:1], np.cumsum(0.5 * (v[1:] + v[:-1]) * np.diff(p)[:, None], axis=0)])
    integral -= integral[-1:] * ((p - p[0]) / (p[-1] - p[0]))[:, None]
    psi = 2 * np.pi * EARTH_RADIUS * np.cos(np.deg2rad(LAT)) / GRAVITY * integral
    np.testing.assert_allclose(sec.psi, psi, rtol=1e-4, atol=1e6)
    # the northern Hadley cell peaks near hadley_peak (1e11 kg s-1) at 500 hPa (quadrature error of
    # a 14-level trapezoid integral), and psi500 changes sign at the detected edges
    k500 = int(np.flatnonzero(sec.plev_psi == 500)[0])
    nh = (LAT > ZEROS[1, 2]) & (LAT < ZEROS[1, 3])
    assert sec.psi[k500, nh].max() == pytest.approx(1e11, rel=0.1)
    for edge in (sec.value("hadley_edge_lat", "NH"), sec.value("hadley_edge_lat", "SH")):
        j = int(np.searchsorted(LAT, edge))
        assert sec.psi[k500, j - 1] * sec.psi[k500, j] < 0


def test_time_must_match_exactly(moving_nc):
    with pytest.raises(SEC.UsageError) as e:
        SEC.section_data(moving_nc, C.load(None), time="2000-02-14")
    msg = str(e.value)
    assert "2000-02-14" in msg and "2000-01-15" in msg and "2000-03-15" in msg and "3 time step(s)" in msg


def _markers(fig, marker):
    ax = fig.axes[0]
    return sorted(float(x) for line in ax.get_lines() if line.get_marker() == marker for x in line.get_xdata())


def test_figure_marks_the_rows_and_labels_units(moving_nc):
    import matplotlib.pyplot as plt

    sec = SEC.section_data(moving_nc, C.load(None), time=TIMES[2])
    fig = SEC.figure(sec)
    try:
        ax = fig.axes[0]
        assert _markers(fig, "*") == sorted([sec.value("subtropical_jet_lat", h) for h in ("NH", "SH")])
        assert _markers(fig, "D") == sorted([sec.value("eddy_jet_lat", h) for h in ("NH", "SH")])
        assert _markers(fig, "o") == sorted([sec.value("hadley_edge_lat", h) for h in ("NH", "SH")])
        on_level = [float(y) for line in ax.get_lines() if line.get_marker() == "*" for y in line.get_ydata()]
        assert on_level == [200.0, 200.0]
        assert ax.get_ylim()[0] > ax.get_ylim()[1]          # pressure increases downward
        assert ax.get_ylabel() == "pressure (hPa)" and ax.get_xlabel() == "latitude (degrees_north)"
        assert "m s-1" in fig.axes[1].get_ylabel()           # colour bar
        assert "moving.nc" in ax.get_title(loc="left") and TIMES[2] in ax.get_title(loc="left")
        assert "source: moving" in ax.get_title(loc="left")
    finally:
        plt.close(fig)


def test_cli_writes_real_images(moving_nc, tmp_path):
    png = tmp_path / "section.png"
    r = invoke("plot", "--section", moving_nc, "--time", TIMES[1], "-o", png)
    assert r.exit_code == 0, r.output
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    img = mpimg.imread(str(png))
    # the size the README states: 9 inches at 120 dpi, like the overview pages (1080 x 1170 at most)
    assert img.shape[:2] == (816, 1080) and img.shape[2] in (3, 4)
    assert img[..., :3].std() > 0.05
    svg = tmp_path / "section.svg"
    r = invoke("plot", "--section", moving_nc, "--log-pressure", "-o", svg)
    assert r.exit_code == 0, r.output
    text = svg.read_text()
    assert "<svg" in text and "m s-1" in text and "hPa" in text and "1e10 kg s-1" in text
    pdf = tmp_path / "section.pdf"
    assert invoke("plot", "--section", moving_nc, "-o", pdf).exit_code == 0
    assert pdf.read_bytes()[:5] == b"%PDF-"


def _one_error(r, code, *words):
    assert r.exit_code == code, r.output
    lines = r.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("circtrack: error: "), r.output
    for w in words:
        assert w in lines[0]


def test_cli_misuse_and_bad_files(moving_nc, tmp_path):
    out = tmp_path / "s.png"
    _one_error(invoke("plot", "--section", moving_nc, "--time", "1999-01-01", "-o", out), 2,
               "1999-01-01", "2000-01-15", "2000-03-15")
    _one_error(invoke("plot", tmp_path / "idx.csv", "--section", moving_nc, "-o", out), 2, "not both")
    _one_error(invoke("plot", "-o", out), 2, "--section DATAFILE")
    _one_error(invoke("plot", tmp_path / "idx.csv", "--time", TIMES[0], "-o", out), 2, "--time", "only with --section")
    _one_error(invoke("plot", "--section", moving_nc, "--metrics", "eddy_jet_lat", "-o", out), 2, "--metrics")
    _one_error(invoke("plot", "--section", moving_nc, "-o", tmp_path / "s.gif"), 2, ".png, .pdf or .svg")
    _one_error(invoke("plot", "--section", tmp_path / "missing.nc", "-o", out), 1, "missing.nc", "no such file")
    junk = tmp_path / "junk.nc"
    junk.write_bytes(b"not a netCDF file at all" * 10)
    r = invoke("plot", "--section", junk, "-o", out)
    _one_error(r, 1, "junk.nc", "netCDF")
    assert "--on-bad-file" not in r.output                  # a 'track' option, not one of 'plot'
    assert not out.exists()
    cfg = tmp_path / "lowpass.toml"
    cfg.write_text("[jets]\neddy_lowpass_days = 10.0\n")
    _one_error(invoke("plot", "--section", moving_nc, "-c", cfg, "-o", out), 2, "eddy_lowpass_days")


def test_one_variable_per_file_and_members(tmp_path):
    import xarray as xr
    import matplotlib.pyplot as plt

    from tests.conftest import make_dataset, write

    ds = make_dataset(2)
    write(ds[["ua"]], tmp_path / "ua_Amon_X_2000.nc")
    write(ds[["va"]], tmp_path / "va_Amon_X_2000.nc")
    write(ds[["ua"]], tmp_path / "ua_Amon_X_2001.nc")        # another period: not joined
    sec = SEC.section_data(str(tmp_path / "ua_Amon_X_2000.nc"), C.load(None))
    assert [p.rsplit("/", 1)[-1] for p in sec.files] == ["ua_Amon_X_2000.nc", "va_Amon_X_2000.nc"]
    assert sec.value("hadley_edge_lat", "NH") == pytest.approx(28.0, abs=0.05)
    fig = SEC.figure(sec)
    assert "ua_Amon_X_2000.nc + va_Amon_X_2000.nc" in fig.axes[0].get_title(loc="left")
    plt.close(fig)
    # two members: the first one is drawn and named; its rows are the engine's rows of that member
    other = make_dataset(2, cell_zeros=(-60.0, -25.0, 5.0, 33.0, 62.0))
    both = xr.concat([other, ds], dim="member").assign_coords(member=("member", ["r2", "r1"]))
    path = write(both.transpose("time", "member", "plev", "lat", "lon"), tmp_path / "members.nc")
    sec = SEC.section_data(path, C.load(None), time="2000-02-15")
    assert sec.member == "member r2"
    assert sec.value("hadley_edge_lat", "NH") == pytest.approx(33.0, abs=0.05)
    assert sec.value("hadley_edge_lat", "SH") == pytest.approx(-25.0, abs=0.05)
    k500 = int(np.flatnonzero(sec.plev_psi == 500)[0])
    j = int(np.searchsorted(LAT, 33.0))
    assert sec.psi[k500, j - 1] > 0 > sec.psi[k500, j + 1]     # the drawn psi is that member's too


# ---------------------------------------------------------------- issue 16: contours, legend, markers, odd files

@pytest.mark.parametrize("pmax", [0.37, 1.0, 3.7, 12.0, 20.0, 150.0])
def test_psi_levels_show_a_cell_a_tenth_as_strong(pmax):
    lv = SEC.psi_levels(pmax)
    assert np.all(np.diff(lv) > 0) and lv.max() <= pmax * (1 + 1e-9) and lv.min() > 0
    # a Ferrel or summer Hadley cell of 10 % of the strongest cell crosses at least two contours
    assert np.count_nonzero(lv <= 0.1 * pmax) >= 2
    assert lv.size <= 14                                          # still readable


@pytest.mark.parametrize("log_pressure", [False, True])
def test_zero_contour_weak_cells_and_legend_inside(moving_nc, log_pressure):
    import matplotlib.pyplot as plt
    from matplotlib.contour import ContourSet

    sec = SEC.section_data(moving_nc, C.load(None), time=TIMES[0])
    fig = SEC.figure(sec, log_pressure=log_pressure)
    try:
        ax = fig.axes[0]
        sets = [c for c in ax.get_children() if isinstance(c, ContourSet)]
        psi_sets = [c for c in sets if c is not sets[0]]            # the first one is the [u] shading
        assert any(list(c.levels) == [0.0] for c in psi_sets)       # psi = 0 drawn
        # the synthetic Ferrel cells (a few percent of the Hadley cell) get contours of their own
        levels = np.concatenate([c.levels for c in psi_sets if list(c.levels) != [0.0]])
        k500 = int(np.flatnonzero(sec.plev_psi == 500)[0])
        ferrel = (LAT > ZEROS[0, 3]) & (LAT < ZEROS[0, 4])
        strength = np.abs(sec.psi[k500, ferrel]).max() / SEC.PSI_UNIT
        assert strength < 0.2 * np.abs(sec.psi).max() / SEC.PSI_UNIT
        assert np.count_nonzero((levels < 0) & (levels >= -strength)) >= 2
        # the legend is inside the figure, whatever the axis
        fig.canvas.draw()
        box = fig.legends[0].get_window_extent()
        page = fig.bbox
        assert box.x0 >= page.x0 - 1 and box.y0 >= page.y0 - 1 and box.x1 <= page.x1 + 1 and box.y1 <= page.y1 + 1
        assert "mass streamfunction = 0" in [t.get_text() for t in fig.legends[0].get_texts()][2]
    finally:
        plt.close(fig)


def test_markers_at_the_engine_rows_also_off_the_upper_level_maximum(tmp_path):
    """A subtropical jet weaker than the eddy-driven jet at 200 hPa: the [u] maximum there is the
    eddy-driven jet (a secondary maximum for the subtropical jet's definition); the star must sit
    where the engine finds the subtropical jet (largest [u]200 - [u]850), not on that maximum."""
    import matplotlib.pyplot as plt

    from tests.conftest import make_dataset, write

    path = write(make_dataset(1, stj=(25.0, -27.0), stj_speed=(8.0, 9.0), edj=(50.0, -52.0), edj_speed=(25.0, 28.0)),
                 tmp_path / "double.nc")
    sec = SEC.section_data(path, C.load(None))
    table, _ = engine_rows(path, metric_ids=SEC.METRIC_IDS)
    fig = SEC.figure(sec)
    try:
        for marker, metric in (("*", "subtropical_jet_lat"), ("D", "eddy_jet_lat"), ("o", "hadley_edge_lat")):
            engine = sorted(table[(sec.time, h, metric)][0] for h in ("NH", "SH"))
            assert _markers(fig, marker) == engine
        k200 = int(np.flatnonzero(sec.plev_u == 200)[0])
        nh = LAT > 0
        u200_max = LAT[nh][np.argmax(sec.u[k200, nh])]
        assert u200_max == pytest.approx(50.0, abs=1.5)              # the [u]200 maximum is the eddy-driven jet
        assert sec.value("subtropical_jet_lat", "NH") == pytest.approx(25.0, abs=0.5)
    finally:
        plt.close(fig)


def test_one_level_and_no_v_files_give_one_line(tmp_path):
    from tests.conftest import make_dataset, write

    ds = make_dataset(1)
    cases = {"one_level.nc": ds.isel(plev=[5]), "one_level_2d.nc": ds.isel(plev=5),
             "no_v.nc": ds[["ua"]]}
    for name, d in cases.items():
        path = write(d, tmp_path / name)
        r = invoke("plot", "--section", path, "-o", tmp_path / "s.png")
        _one_error(r, 1, name)
        assert "unexpected" not in r.output and "Traceback" not in r.output
    assert not (tmp_path / "s.png").exists()


def test_two_level_guard_in_the_section_itself(moving_nc, monkeypatch):
    """Should the engine hand over a single level (a file it reads as one level), the section says so."""
    from circtrack import engine

    real = engine.Run.zonal_means

    def one_level(self):
        zm = real(self)
        zm["plev"] = {**zm["plev"], "va": zm["plev"]["va"][:1]}
        return zm

    monkeypatch.setattr(engine.Run, "zonal_means", one_level)
    with pytest.raises(SEC.InputError, match="at least two pressure levels"):
        SEC.section_data(moving_nc, C.load(None))


def test_section_takes_units_as_track_does(tmp_path):
    """The error for undecodable time units says --units; plot --section takes it (and --level)."""
    import shutil

    import netCDF4

    src = Path(__file__).resolve().parent.parent / "sample_inputs" / "model_q" / "model_q_monthly_2031.nc"
    path = tmp_path / "month_units.nc"
    shutil.copy(src, path)
    with netCDF4.Dataset(path, "r+") as nc:
        nc["time"].setncattr("units", "Month")
    out = tmp_path / "s.png"
    r = CliRunner().invoke(main, ["plot", "--section", str(path), "-o", str(out)])
    assert r.exit_code == 1 and "--units time=" in r.output and not out.exists()
    r = CliRunner().invoke(main, ["plot", "--section", str(path), "--units", "time=days since 2031-01-01",
                                  "-o", str(out)])
    assert r.exit_code == 0, r.output
    assert out.stat().st_size > 10_000
