"""Per-longitude jet cores: the side table (track --cores-by-longitude), the strip picture (plot
--cores-strip) and the cores on the section."""

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from circtrack import config, engine
from circtrack.cli import main
from circtrack.plots_cores import JETS
from tests.metrics.test_cores import LAM, LON, field, write

IDS = [f"{j}_jet_core_{q}" for j in ("subtropical", "eddy") for q in ("lat", "pressure", "speed")]


def invoke(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def one_error(r, code, *words):
    assert r.exit_code == code, r.output
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("circtrack: error:"), r.stderr
    for w in words:
        assert w in lines[0], lines[0]


def table(path, **kw):
    out = engine.track([path], config.load(), metric_ids=IDS, cores_by_longitude=True, **kw)
    t = out.tables["cores_by_longitude"]
    df = pd.DataFrame({k: np.asarray(v) for k, v in t.columns.items()})
    df["lon"] = df["lon"].astype(float)
    return out, t, df


def test_table_follows_a_wave_two_meander(tmp_path):
    path = write(tmp_path / "meander.nc", field(50.0 + 6.0 * np.sin(2 * LAM)))
    _, t, df = table(path)
    assert t.key_columns == ["source", "time", "hemisphere", "lon", "metric"]
    first = df[(df["time"] == df["time"].iloc[0]) & (df["hemisphere"] == "NH")]
    eddy = first[first["metric"] == "eddy_jet_core_lat"].sort_values("lon")
    assert eddy["lon"].tolist() == LON.tolist()
    assert eddy["value"].to_numpy() == pytest.approx(50.0 + 6.0 * np.sin(2 * LAM), abs=0.1)
    assert (eddy["flag"] == "ok").all()
    stj = first[first["metric"] == "subtropical_jet_core_lat"]
    assert stj["value"].to_numpy() == pytest.approx(28.0, abs=0.1)
    # the merged southern jet: the subtropical core with a note, the eddy-driven one NaN
    sh = df[(df["hemisphere"] == "SH") & (df["metric"] == "eddy_jet_core_lat")]
    assert sh["value"].isna().all() and (sh["flag"] == "merged_jets").all()
    sh = df[(df["hemisphere"] == "SH") & (df["metric"] == "subtropical_jet_core_lat")]
    assert (sh["flag"] == "ok;merged_jets").all()


def test_zonal_core_is_the_mean_of_the_longitudes_where_only_the_strength_varies(tmp_path):
    # u = U(lat, p) (1 + 0.4 cos lon): each longitude's core sits where the zonal mean's does, and the
    # zonal-mean core speed is the mean over longitudes of their speeds (the wind is linear in the factor)
    path = write(tmp_path / "scaled.nc", field() * (1.0 + 0.4 * np.cos(LAM))[None, None, :])
    out, _, df = table(path)
    c = out.columns
    zonal = {(c["time"][i], c["hemisphere"][i], c["metric"][i]): float(c["value"][i]) for i in range(len(c["metric"]))
             if c["sector"][i] == "zonal"}
    for (time, hemi, metric), v in zonal.items():
        per = df[(df["time"] == time) & (df["hemisphere"] == hemi) & (df["metric"] == metric)]["value"].to_numpy()
        assert per.size == LON.size
        if np.isnan(v):
            assert np.isnan(per).all()
        elif metric.endswith("_speed"):
            assert per.mean() == pytest.approx(v, rel=1e-6)
        else:
            assert per == pytest.approx(v, rel=1e-6)


def test_bands_are_their_centres(tmp_path):
    path = write(tmp_path / "scaled.nc", field())
    cfg = config.load()
    cfg["cores"]["longitude_band_deg"] = 90.0
    out = engine.track([path], cfg, metric_ids=IDS, cores_by_longitude=True)
    lons = sorted({float(x) for x in out.tables["cores_by_longitude"].columns["lon"]})
    assert lons == [45.0, 135.0, 225.0, 315.0]


def test_cli_writes_the_table_and_draws_the_strip(tmp_path):
    path = write(tmp_path / "meander.nc", field(50.0 + 6.0 * np.sin(2 * LAM)))
    out, cores = tmp_path / "idx.csv", tmp_path / "cores.csv"
    r = invoke("track", path, "-o", out, "--cores-by-longitude", cores, "-q", "--metrics", "eddy_jet_core_lat")
    assert r.exit_code == 0, r.output
    lines = cores.read_text().splitlines()
    assert lines[0] == "source,time,hemisphere,lon,metric,value,units,flag"
    lon = [float(ln.split(",")[3]) for ln in lines[1:] if ",NH," in ln and ",eddy_jet_core_lat," in ln][:LON.size]
    assert lon == sorted(lon) == LON.tolist()                    # sorted as numbers, not as text
    assert (tmp_path / "cores.provenance.json").exists()
    # the main CSV is unchanged by the option
    plain = tmp_path / "plain.csv"
    assert invoke("track", path, "-o", plain, "-q", "--metrics", "eddy_jet_core_lat").exit_code == 0
    assert plain.read_text() == out.read_text()
    png = tmp_path / "strip.png"
    r = invoke("plot", "--cores-strip", cores, "-o", png)
    assert r.exit_code == 0, r.output
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    import matplotlib.image as mpimg
    assert mpimg.imread(str(png)).shape[:2] == (672, 1080)        # the size the README states
    r = invoke("plot", "--cores-strip", cores, "--time", "2001-01-02", "-o", tmp_path / "strip.svg")
    assert r.exit_code == 0, r.output


def test_strip_picture_draws_the_cores(tmp_path):
    from circtrack import plots_cores as PC

    path = write(tmp_path / "meander.nc", field(50.0 + 6.0 * np.sin(2 * LAM)))
    _, _, df = table(path)
    fig = PC.strip_figure(df)
    ax = fig.axes[0]
    pts = {m: [] for _, _, m in JETS}
    for coll in ax.collections:
        off = coll.get_offsets()
        pts[coll.get_paths()[0] is not None and _marker_of(coll)].append(np.asarray(off))
    eddy_nh = np.concatenate([o for o in pts["^"] if (o[:, 1] > 0).all()])
    assert eddy_nh[:, 1] == pytest.approx(50.0 + 6.0 * np.sin(2 * np.deg2rad(eddy_nh[:, 0])), abs=0.1)
    assert fig.axes[1].get_ylabel() == "core speed (m s-1)"


def _marker_of(coll):
    # circles have many vertices, triangles four (closed)
    return "o" if len(coll.get_paths()[0].vertices) > 5 else "^"


def test_cli_misuse(tmp_path):
    path = write(tmp_path / "jets.nc", field())
    out = tmp_path / "idx.csv"
    one_error(invoke("track", path, "-o", out, "--cores-by-longitude", out), 2, "same file as -o")
    one_error(invoke("track", path, "-o", out, "--cores-by-longitude", "-"), 2, "regular file")
    one_error(invoke("track", path, "-o", out, "--cores-by-longitude", path), 2, "would destroy that input")
    one_error(invoke("track", path, "-o", out, "--cores-by-longitude", tmp_path / "no" / "c.csv"), 2, "does not exist")
    assert not out.exists()
    assert invoke("track", path, "-o", out, "-q").exit_code == 0
    png = tmp_path / "s.png"
    one_error(invoke("plot", "--cores-strip", out, "-o", png), 1, "not a per-longitude jet-core table")
    one_error(invoke("plot", "--cores-strip", tmp_path / "none.csv", "-o", png), 1, "no such file")
    one_error(invoke("plot", "--cores-strip", out, "--metrics", "x", "-o", png), 2, "--metrics", "--cores-strip")
    cores = tmp_path / "cores.csv"
    assert invoke("track", path, "-o", tmp_path / "i2.csv", "--cores-by-longitude", cores, "-q").exit_code == 0
    one_error(invoke("plot", "--cores-strip", cores, "--time", "1999-01-01", "-o", png), 2, "no such time step")
    one_error(invoke("plot", "--cores-strip", cores, "-o", tmp_path / "s.gif"), 2, ".png, .pdf or .svg")
    assert not png.exists()


def test_section_marks_the_cores(tmp_path):
    from circtrack import section as SEC

    import xarray as xr

    with xr.open_dataset(write(tmp_path / "ua.nc", field())) as ds:      # the section also needs va
        ds = ds.load()
    ds["va"] = (ds["ua"] * 0.0).assign_attrs(standard_name="northward_wind", units="m s-1")
    path = str(tmp_path / "jets.nc")
    ds.to_netcdf(path)
    sec = SEC.section_data(path, config.load())
    assert sec.value("subtropical_jet_core_lat", "NH") == pytest.approx(28.0, abs=0.1)
    fig = SEC.figure(sec)
    ax = fig.axes[0]
    circles = [ln for ln in ax.lines if ln.get_marker() == "o" and ln.get_markerfacecolor() == "white"]
    triangles = [ln for ln in ax.lines if ln.get_marker() == "^"]
    at = sorted((float(ln.get_xdata()[0]), float(ln.get_ydata()[0])) for ln in circles)
    assert at[0] == pytest.approx((-40.0, 250.0), rel=0.03) and at[1] == pytest.approx((28.0, 200.0), rel=0.03)
    assert [(float(ln.get_xdata()[0]), float(ln.get_ydata()[0])) for ln in triangles] == \
        [pytest.approx((50.0, 300.0), rel=0.03)]
    legend = ax.get_legend() or fig.legends[0]          # the legend sits in the figure's own band
    labels = [t.get_text() for t in legend.get_texts()]
    assert any(t.startswith("eddy-driven core: NH 50.0°/") and "SH none (merged)" in t for t in labels)


def test_members_along_a_dimension(tmp_path):
    # two members stacked along 'realization': member 1's eddy-driven core 4 degrees further poleward
    import cftime
    import xarray as xr

    from tests.metrics.test_cores import LAT, PLEV

    u = np.stack([field(50.0), field(54.0)])[None].repeat(2, axis=0).astype("float32")   # (time, member, L, J, I)
    t = np.array([cftime.num2date(i, "days since 2001-01-01", "noleap") for i in range(2)])
    ds = xr.Dataset({"ua": (("time", "realization", "plev", "lat", "lon"), u,
                            {"standard_name": "eastward_wind", "units": "m s-1"})},
                    coords={"time": t, "realization": [1, 2], "plev": ("plev", PLEV, {"units": "hPa", "axis": "Z"}),
                            "lat": ("lat", LAT, {"units": "degrees_north"}),
                            "lon": ("lon", LON, {"units": "degrees_east"})})
    path = str(tmp_path / "members.nc")
    ds.to_netcdf(path, encoding={"time": {"units": "days since 2001-01-01", "calendar": "noleap"}})
    out, t, df = table(path)
    assert "realization" in t.key_columns and "realization" in out.key_columns
    c = out.columns
    got = {(c["realization"][i], c["hemisphere"][i]): float(c["value"][i]) for i in range(len(c["metric"]))
           if c["metric"][i] == "eddy_jet_core_lat" and c["time"][i] == "2001-01-01"}
    assert got[("1", "NH")] == pytest.approx(50.0, abs=0.1) and got[("2", "NH")] == pytest.approx(54.0, abs=0.1)
    per = df[(df["metric"] == "eddy_jet_core_lat") & (df["hemisphere"] == "NH")]
    assert per.groupby("realization")["value"].mean().to_dict() == {"1": pytest.approx(50.0, abs=0.1),
                                                                    "2": pytest.approx(54.0, abs=0.1)}


@pytest.mark.parametrize("line,words", [("longitude_band_deg = -5.0", ["cores.longitude_band_deg", "up to 360"]),
                                        ("subtropical_pressure_window = [0.0, 400.0]", ["above 0"])])
def test_bad_core_settings_are_refused_before_reading(tmp_path, line, words):
    path = write(tmp_path / "jets.nc", field())
    cfg = tmp_path / "c.toml"
    cfg.write_text(f"[cores]\n{line}\n")
    out = tmp_path / "idx.csv"
    one_error(invoke("track", path, "-o", out, "-c", cfg, "-q"), 2, *words)
    assert not out.exists()


def test_table_beside_rows_on_stdout(tmp_path):
    path = write(tmp_path / "jets.nc", field())
    cores = tmp_path / "cores.csv"
    r = invoke("track", path, "-o", "-", "--cores-by-longitude", cores, "-q", "--metrics", "subtropical_jet_core_lat")
    assert r.exit_code == 0, r.output
    assert r.stdout.splitlines()[0] == "source,time,hemisphere,sector,metric,value,units,flag"
    assert cores.read_text().splitlines()[0] == "source,time,hemisphere,lon,metric,value,units,flag"
    assert (tmp_path / "cores.provenance.json").exists()
