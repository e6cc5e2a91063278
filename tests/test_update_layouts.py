"""circtrack update on the layouts track joins or deduplicates: after every data drop, OUT holds exactly
the bytes of one clean ``circtrack track`` over all files given so far.

Cases: one variable per file (a group of files for the same time steps), a time step repeated in two
files (identical, conflicting, a later final stream replacing provisional data), one time step per
file (the eddy-flux flags depend on the record's time step) and the low-pass filtered jet (reaches
across files). All data are invented (tests.conftest / circtrack.synthetic).
"""

from __future__ import annotations

import datetime
import json
import os

import cftime
import numpy as np
import xarray as xr

from circtrack import synthetic
from tests.test_update import invoke, one_error_line, track_bytes
from tests.conftest import make_dataset, write
from tests.metrics.test_transport import _eddy_winds
from tests.metrics.test_transport import _times as _eddy_times
from tests.metrics.test_transport import _write as _eddy_write
from tests.test_layouts_styles import _reanalysis, _write_reanalysis

METRICS = "hadley_edge_lat,hadley_strength,eddy_jet_lat,eddy_jet_speed,eddy_momentum_flux_lat"


error_line = one_error_line


def drops_equal_track(tmp_path, drops, *extra):
    """Run update after each drop (the list of all files so far); OUT must equal one clean track."""
    out = tmp_path / "out.csv"
    for files in drops:
        r = invoke("update", *files, "-o", out, "-q", *extra)
        assert r.exit_code == 0, r.output
        assert out.read_bytes() == track_bytes(tmp_path, files, *extra)
    return out


def state_of(out):
    return json.loads(out.with_name(out.stem + ".state.json").read_text())


def sidecar_of(out):
    return json.loads(out.with_name(out.stem + ".provenance.json").read_text())


# --------------------------------------------------------------------------- one variable per file
def _split(tmp_path, ds, months, **params):
    """ua and va of the given months (0-based slice) in two files named after the variable."""
    d = tmp_path / "data"
    d.mkdir(exist_ok=True)
    span = f"2000{months.start + 1:02d}-2000{months.stop:02d}"
    part = ds.isel(time=months)
    return [write(part[["ua"]], d / f"ua_mon_{span}.nc"), write(part[["va"]], d / f"va_mon_{span}.nc")]


def test_one_variable_per_file_drops(tmp_path):
    ds = make_dataset(4)
    ua1, va1 = _split(tmp_path, ds, slice(0, 2))
    ua2, va2 = _split(tmp_path, ds, slice(2, 4))
    opts = ("--label", "L", "--metrics", METRICS)
    out = drops_equal_track(tmp_path, [[ua1, va1]], *opts)
    before = out.read_bytes()
    # the u file of March-April arrives before its v file: refused as track refuses it, OUT untouched
    r_upd = invoke("update", ua1, va1, ua2, "-o", out, "-q", *opts)
    r_trk = invoke("track", ua1, va1, ua2, "-o", tmp_path / "ref.csv", "-q", *opts)
    line = error_line(r_upd, 1)
    assert line == error_line(r_trk, 1)
    assert "ua_mon_200003-200004.nc" in line and "(va)" in line and "--var va=NAME" in line
    assert out.read_bytes() == before
    # the v file arrives: the pair is joined; only the new pair is read
    drops_equal_track(tmp_path, [[ua1, va1, ua2, va2]], *opts)
    side = sidecar_of(out)
    assert side["updated_incrementally"]["processed"] == [ua2, va2]
    st = state_of(out)
    assert sorted(st["files"]) == sorted(os.path.abspath(p) for p in (ua1, va1, ua2, va2))
    assert st["files"][os.path.abspath(va2)]["times"] == ["2000-03-15", "2000-04-15"]
    assert st["files"][os.path.abspath(va2)]["owned"] == ["2000-03-15", "2000-04-15"]
    # a member file rewritten (another v field): its group's time steps are computed again
    write(make_dataset(4, hadley_peak=1.5e11).isel(time=slice(0, 2))[["va"]], va1)
    fresh = out.read_bytes()
    drops_equal_track(tmp_path, [[ua1, va1, ua2, va2]], *opts)
    assert out.read_bytes() != fresh
    assert sidecar_of(out)["updated_incrementally"]["processed"] == [ua1, va1]
    r = invoke("update", ua1, va1, ua2, va2, "-o", out, "--label", "L", "--metrics", METRICS)
    assert r.exit_code == 0 and "nothing new" in r.output


def test_one_variable_per_file_skipped_until_its_partner_arrives(tmp_path):
    ds = make_dataset(4)
    ua1, va1 = _split(tmp_path, ds, slice(0, 2))
    ua2, va2 = _split(tmp_path, ds, slice(2, 4))
    opts = ("--label", "L", "--metrics", METRICS, "--on-bad-file", "skip")
    out = drops_equal_track(tmp_path, [[ua1, va1], [ua1, va1, ua2]], *opts)
    (skip,) = sidecar_of(out)["skipped_inputs"]
    assert skip["path"] == ua2 and "(va)" in skip["reason"]
    assert "2000-03-15" not in out.read_text()
    drops_equal_track(tmp_path, [[ua1, va1, ua2, va2]], *opts)          # the unchanged ua2 is joined now
    assert sidecar_of(out)["skipped_inputs"] == []
    assert "skipped" not in state_of(out)["files"][os.path.abspath(ua2)]


def test_one_variable_per_file_siblings_found_without_metrics(tmp_path):
    # without --metrics the metric set comes from the first file and its same-period siblings
    ds = make_dataset(4)
    ua1, va1 = _split(tmp_path, ds, slice(0, 2))
    ua2, va2 = _split(tmp_path, ds, slice(2, 4))
    drops_equal_track(tmp_path, [[ua1, va1], [ua1, va1, ua2, va2]], "--label", "L")
    # without --label the source is derived from the first file of each joined group, as in track
    out = tmp_path / "derived.csv"
    r = invoke("update", ua1, va1, ua2, va2, "-o", out, "-q")
    assert r.exit_code == 0, r.output
    assert out.read_bytes() == track_bytes(tmp_path, [ua1, va1, ua2, va2])
    assert out.read_text().splitlines()[1].startswith("ua_mon,2000-01-15,")
    side = sidecar_of(out)
    assert [os.path.basename(i["path"]) for i in side["inputs"]] == ["ua_mon_200001-200002.nc",
                                                                     "ua_mon_200003-200004.nc"]


# --------------------------------------------------------------------------- repeated time steps
def _months(tmp_path, name, ds, sl):
    d = tmp_path / "data"
    d.mkdir(exist_ok=True)
    return write(ds.isel(time=sl), d / name)


def test_identical_repeat_in_a_later_drop_is_dropped(tmp_path):
    ds = make_dataset(4)
    a = _months(tmp_path, "m_a.nc", ds, slice(0, 3))
    b = _months(tmp_path, "m_b.nc", ds, slice(2, 4))             # March again, same values
    out = drops_equal_track(tmp_path, [[a], [a, b]], "--label", "L", "--metrics", METRICS)
    (drop,) = sidecar_of(out)["repeated_time_steps_dropped"]
    assert drop == {"time": "2000-03-15", "path": b, "kept_from": a}


def test_conflicting_repeat_refused_naming_both_files_then_policies(tmp_path):
    ds = make_dataset(4)
    other = make_dataset(4, edj=(40.0, -45.0))
    a = _months(tmp_path, "m_a.nc", ds, slice(0, 3))
    b = _months(tmp_path, "m_b.nc", other, slice(2, 4))           # March again, other values
    opts = ("--label", "L", "--metrics", METRICS)
    out = drops_equal_track(tmp_path, [[a]], *opts)
    before = {p: p.read_bytes() for p in tmp_path.glob("out.*")}
    line = error_line(invoke("update", a, b, "-o", out, "-q", *opts), 1)
    assert line == (f"circtrack: error: {b}: time step 2000-03-15 is also in {a} with different values; leave one "
                    "file out, or choose which wins with --repeated-times keep-first|keep-last")
    assert {p: p.read_bytes() for p in tmp_path.glob("out.*")} == before
    drops_equal_track(tmp_path, [[a, b]], *opts, "--repeated-times", "keep-last")
    assert b"2000-03-15,NH,zonal,eddy_jet_lat,40," in out.read_bytes()
    # another policy (no new file): the repeated step follows it, without --rebuild
    drops_equal_track(tmp_path, [[a, b]], *opts, "--repeated-times", "keep-first")
    assert b"2000-03-15,NH,zonal,eddy_jet_lat,40," not in out.read_bytes()
    # the files given in the other order: keep-first now means the other file
    drops_equal_track(tmp_path, [[b, a]], *opts, "--repeated-times", "keep-first")
    assert b"2000-03-15,NH,zonal,eddy_jet_lat,40," in out.read_bytes()


def test_final_data_in_a_later_drop_replace_provisional_data(tmp_path):
    # the reanalysis cron case: each monthly download holds the months since the last one, the
    # latest month from the provisional stream (expver 0005, here with u + 5 m/s); the next download
    # brings that month again from the final stream (expver 0001)
    full = _reanalysis(make_dataset(4), number=0)
    d = tmp_path / "data"
    d.mkdir()

    def download(name, steps, provisional):
        part = full.isel(valid_time=steps)
        part = part.assign_coords(expver=("valid_time", ["0005" if provisional and k == len(steps) - 1 else "0001"
                                                         for k in range(len(steps))]))
        if provisional:
            part["u"] = part["u"] + xr.DataArray([0.0] * (len(steps) - 1) + [5.0], dims="valid_time")
        return _write_reanalysis(part, d / name)

    a = download("era_2000_01-03.nc", [0, 1, 2], True)
    b = download("era_2000_03-04.nc", [2, 3], True)
    c = download("era_2000_04.nc", [3], False)
    opts = ("--label", "era", "--metrics", METRICS)
    out = drops_equal_track(tmp_path, [[a]], *opts)
    march = [ln for ln in out.read_text().splitlines() if ",2000-03-15," in ln]
    assert march and all(ln.endswith(";provisional_data") for ln in march)
    assert sidecar_of(out)["time_step_notes"] == {"provisional_data": ["2000-03-15"]}
    drops_equal_track(tmp_path, [[a, b]], *opts)
    flagged = {ln.split(",")[1] for ln in out.read_text().splitlines() if ln.endswith(";provisional_data")}
    assert flagged == {"2000-04-15"}
    side = sidecar_of(out)
    assert side["time_step_notes"] == {"provisional_data": ["2000-04-15"]}
    assert side["updated_incrementally"]["processed"] == [a, b]
    drops_equal_track(tmp_path, [[a, b, c]], *opts)
    assert "provisional_data" not in out.read_text()
    side = sidecar_of(out)
    assert side["time_step_notes"] == {}
    assert side["repeated_time_steps_dropped"] == [
        {"time": "2000-03-15", "path": a, "kept_from": b, "provisional_replaced_by_final": True},
        {"time": "2000-04-15", "path": b, "kept_from": c, "provisional_replaced_by_final": True}]
    assert side["updated_incrementally"]["processed"] == [b, c]
    # the final rows equal those of the final data alone
    final = tmp_path / "final.csv"
    assert invoke("track", download("era_final.nc", [0, 1, 2, 3], False), "-o", final, "-q", *opts).exit_code == 0
    assert final.read_bytes() == out.read_bytes()


# --------------------------------------------------------------------------- record-wide properties
def test_one_time_step_per_file(tmp_path):
    # monthly files of one step each: the first drop alone has no known time step (eddy fluxes
    # flagged time_step_unknown); from the second drop on they are time means (time_mean_input)
    times = _eddy_times(3, 30.0)
    files = [_eddy_write(tmp_path / f"m_{k}.nc", _eddy_winds(), times[k:k + 1]) for k in range(3)]
    out = tmp_path / "out.csv"
    opts = ("--label", "L", "--metrics", "eddy_momentum_flux_lat,eddy_jet_lat")
    drops_equal_track(tmp_path, [files[:1]], *opts)
    assert out.read_text().count(",eddy_momentum_flux_lat,") == 2 and out.read_text().count("time_step_unknown") == 2
    drops_equal_track(tmp_path, [files[:2], files[:3]], *opts)
    assert out.read_text().count("time_mean_input") == 6 and "time_step_unknown" not in out.read_text()


def test_lowpass_jet_reaches_across_drops(tmp_path):
    n = 100
    k = np.arange(n)
    edj = np.stack([45.0 + 3.0 * np.sin(2 * np.pi * k / 60.0) + 4.0 * np.sin(2 * np.pi * k / 3.0),
                    -50.0 - 4.0 * np.sin(2 * np.pi * k / 3.0)], axis=1)
    times = np.array([cftime.datetime(2001, 1, 1, calendar="noleap") + datetime.timedelta(days=int(i)) for i in k])
    ds = synthetic.dataset(np.arange(-90.0, 91.0, 2.0), np.arange(0.0, 360.0, 90.0), [850.0, 500.0, 200.0], times,
                           edj=edj, wave_amplitude=0.0)
    files = []
    for j, (a, b) in enumerate(((0, 35), (35, 70), (70, 100))):
        files.append(str(tmp_path / f"day_{j}.nc"))
        ds.isel(time=slice(a, b)).to_netcdf(files[-1], encoding=synthetic.time_encoding("noleap"))
    cfg = tmp_path / "lowpass.toml"
    cfg.write_text("[jets]\neddy_lowpass_days = 10.0\n")
    out = drops_equal_track(tmp_path, [files[:2], files], "--label", "L", "--metrics", "eddy_jet_lat", "-c", cfg)
    flags = [ln.split(",")[-1] for ln in out.read_text().splitlines()[1:] if ",NH,zonal," in ln]
    assert flags[40:60] == ["ok"] * 20           # were at the end of the record after the first drop


def test_engine_computes_only_the_asked_time_steps(tmp_path, monkeypatch):
    from circtrack import config, engine
    from circtrack import output as O

    ds = make_dataset(4)
    a = _months(tmp_path, "m_a.nc", ds, slice(0, 3))
    b = _months(tmp_path, "m_b.nc", ds, slice(2, 4))
    cfg = config.load()
    cfg["run"].update(scheduler="sync", time_chunk=1)
    ids = METRICS.split(",")
    full = O.sorted_lines(engine.track([a, b], cfg, metric_ids=ids, label="L"))
    read = []
    real = engine.reduce.reduce_chunk

    def counting(job):
        read.append((os.path.basename(job["path"]), job["t0"]))
        return real(job)

    monkeypatch.setattr(engine.reduce, "reduce_chunk", counting)
    part = engine.track([a, b], cfg, metric_ids=ids, label="L", only_times={"2000-03-15"},
                        time_step_days=engine.time_step_days(ds["time"].values))
    assert O.sorted_lines(part)[1:] == [ln for ln in full[1:] if ",2000-03-15," in ln]
    assert sorted(read) == [("m_a.nc", 2), ("m_b.nc", 0)]        # March from both files, nothing else
    assert part.provenance["repeated_time_steps_dropped"] == [{"time": "2000-03-15", "path": b, "kept_from": a}]


def test_state_of_an_older_version_rebuilds(tmp_path):
    ds = make_dataset(4)
    files = [_months(tmp_path, "m_a.nc", ds, slice(0, 2)), _months(tmp_path, "m_b.nc", ds, slice(2, 4))]
    out = drops_equal_track(tmp_path, [files[:1]], "--label", "L", "--metrics", METRICS)
    sp = out.with_name("out.state.json")
    st = json.loads(sp.read_text())
    sp.write_text(json.dumps({**st, "version": 1}))
    r = invoke("update", *files, "-o", out, "--label", "L", "--metrics", METRICS)
    assert r.exit_code == 0, r.output
    assert f"{sp} is unreadable or from an older circtrack; rebuilding" in r.output
    assert out.read_bytes() == track_bytes(tmp_path, files, "--label", "L", "--metrics", METRICS)
    assert json.loads(sp.read_text())["version"] == 2
