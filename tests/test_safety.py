"""Never clobber, never hang, never corrupt: outputs, the CSV itself, bounds and one-line errors.

Each test builds its own awkward situation in tmp_path (special files, links, outputs that are
inputs, a disk that fills up between two writes, labels that would break the CSV, a scheduler
address that never answers) and checks the promise the README's "Reliability" section makes.
"""

from __future__ import annotations

import errno
import os
import socket
import stat
import subprocess
import sys
import threading
import time
import warnings

import click
import numpy as np
import pytest
from click.testing import CliRunner

from circtrack import guards as G
from circtrack import output as O
from circtrack.cli import main
from circtrack.cli_support import guarded
from circtrack.errors import UsageError

from .conftest import make_dataset, write

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
IDS = "hadley_edge_lat,eddy_jet_lat"


def invoke(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def one_error(r, code):
    assert r.exit_code == code, r.output
    lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("circtrack: error:"), r.stderr
    assert "Traceback" not in r.output and "unexpected" not in r.output
    return lines[0]


def snapshot(directory):
    return {p: open(os.path.join(directory, p), "rb").read() for p in sorted(os.listdir(directory))
            if os.path.isfile(os.path.join(directory, p))}


@pytest.fixture
def nc(tmp_path):
    d = tmp_path / "in"
    d.mkdir()
    return write(make_dataset(2), d / "a.nc")


@pytest.fixture
def indices(tmp_path, nc):
    out = tmp_path / "indices.csv"
    r = invoke("track", nc, "--metrics", IDS, "-o", out, "-q")
    assert r.exit_code == 0, r.output
    return out


def monthly_csv(path, years=3, extra_rows=(), units="degrees_north"):
    lines = ["source,time,hemisphere,sector,metric,value,units,flag"]
    for y in range(2000, 2000 + years):
        for m in range(1, 13):
            lines.append(f"m,{y}-{m:02d}-15,NH,zonal,hadley_edge_lat,{30 + 0.1 * (y - 2000) + np.sin(m):.4f},{units},ok")
    lines.extend(extra_rows)
    path.write_text("\n".join(lines) + "\n")
    return path


# --------------------------------------------------------------------------- special and linked outputs
def test_dev_null_stays_a_device_and_gets_no_sidecar(nc):
    before = os.stat("/dev/null")
    r = invoke("track", nc, "--metrics", IDS, "-o", "/dev/null", "-q")
    assert r.exit_code == 0, r.output
    after = os.stat("/dev/null")
    assert stat.S_ISCHR(after.st_mode) and after.st_rdev == before.st_rdev
    assert not os.path.exists("/dev/null-provenance.json") and not os.path.exists("/dev/null.provenance.json")


def test_fifo_output_is_written_as_a_stream(tmp_path, nc, indices):
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    got = []
    reader = threading.Thread(target=lambda: got.append(open(fifo, "rb").read()))
    reader.start()
    r = invoke("track", nc, "--metrics", IDS, "-o", fifo, "-q")
    reader.join(timeout=30)
    assert r.exit_code == 0, r.output
    assert stat.S_ISFIFO(os.stat(fifo).st_mode)
    assert got and got[0] == indices.read_bytes()
    assert sorted(os.listdir(tmp_path)) == sorted(["in", "indices.csv", "indices.provenance.json", "pipe"])


def test_symlinked_output_writes_through_to_its_target(tmp_path, nc, indices):
    (tmp_path / "store").mkdir()
    target = tmp_path / "store" / "real.csv"
    target.write_text("old\n")
    link = tmp_path / "link.csv"
    link.symlink_to(target)
    r = invoke("track", nc, "--metrics", IDS, "-o", link, "-q")
    assert r.exit_code == 0, r.output
    assert link.is_symlink() and os.readlink(link) == str(target)
    assert target.read_bytes() == indices.read_bytes()
    assert (tmp_path / "store" / "real.provenance.json").exists()      # beside the target, named after it
    assert not (tmp_path / "link.provenance.json").exists()


def test_sidecars_of_x_and_x_csv_are_different_files(tmp_path, nc):
    assert invoke("track", nc, "--metrics", IDS, "-o", tmp_path / "x.csv", "-q").exit_code == 0
    first = (tmp_path / "x.provenance.json").read_bytes()
    assert invoke("track", nc, "--metrics", IDS, "-o", tmp_path / "x", "-q").exit_code == 0
    assert (tmp_path / "x.provenance.json").read_bytes() == first
    assert (tmp_path / "x-provenance.json").exists()


# --------------------------------------------------------------------------- outputs that are inputs
def test_output_name_forgotten_before_a_glob_is_refused(tmp_path):
    d = tmp_path / "d"
    d.mkdir()
    a = write(make_dataset(1), d / "a.nc")
    b = write(make_dataset(1), d / "b.nc")
    before = snapshot(d)
    line = one_error(invoke("track", "-o", a, b), 2)       # what 'circtrack track -o d/*.nc' becomes
    assert a in line and "-o indices.csv" in line
    assert snapshot(d) == before


def test_output_that_is_an_input_under_another_name_is_refused(tmp_path, nc):
    other = tmp_path / "same_file.csv"
    os.link(nc, other)                                     # a hard link: same inode, other name
    before = open(nc, "rb").read()
    line = one_error(invoke("track", nc, "-o", other), 2)
    assert "same_file.csv" in line
    assert open(nc, "rb").read() == before


def test_guard_compares_real_paths_and_inodes(tmp_path):
    f = tmp_path / "in.csv"
    f.write_text("x\n")
    (tmp_path / "sub").mkdir()
    os.symlink(f, tmp_path / "sub" / "alias.csv")
    os.link(f, tmp_path / "hard.csv")
    for out in (tmp_path / "sub" / ".." / "in.csv", tmp_path / "sub" / "alias.csv", tmp_path / "hard.csv"):
        with pytest.raises(UsageError, match="is the input"):
            G.refuse_outputs_among_inputs([("-o", str(out))], [str(f)])
    with pytest.raises(UsageError, match="same file"):
        G.refuse_outputs_among_inputs([("-o", str(tmp_path / "o.csv")), ("--anomalies", str(tmp_path / "o.csv"))], [])
    G.refuse_outputs_among_inputs([("-o", str(tmp_path / "new.csv"))], [str(f)])      # no error


def test_track_output_whose_sidecar_is_an_input_is_refused(tmp_path):
    d = tmp_path / "d"
    d.mkdir()
    data = write(make_dataset(1), d / "x.provenance.json")     # odd, but an input all the same
    line = one_error(invoke("track", data, "-o", d / "x.csv"), 2)
    assert "sidecar" in line and "x.provenance.json" in line


@pytest.mark.parametrize("command", [["trend"], ["season"], ["season", "--anomalies", "{csv}", "-o", "{other}"]])
def test_findings_never_overwrite_their_input(tmp_path, indices, command):
    csv = tmp_path / "series.csv"
    monthly_csv(csv)
    args = [a.format(csv=csv, other=tmp_path / "clim.csv") for a in command]
    if "-o" not in args:
        args += ["-o", str(csv)]
    before = csv.read_bytes()
    line = one_error(invoke(*args[:1], csv, *args[1:]), 2)
    assert str(csv) in line and "destroy" in line
    assert csv.read_bytes() == before and not (tmp_path / "clim.csv").exists()


def test_season_outputs_must_differ(tmp_path):
    csv = monthly_csv(tmp_path / "series.csv")
    line = one_error(invoke("season", csv, "-o", tmp_path / "c.csv", "--anomalies", tmp_path / "c.csv"), 2)
    assert "same file" in line


def test_plot_never_overwrites_its_csv(tmp_path):
    csv = monthly_csv(tmp_path / "series.png")          # a CSV with a picture's name: still the input
    before = csv.read_bytes()
    one_error(invoke("plot", csv, "-o", csv), 2)
    assert csv.read_bytes() == before


# --------------------------------------------------------------------------- all or nothing
def test_a_failing_second_write_changes_nothing(tmp_path, nc, indices, monkeypatch):
    before = snapshot(tmp_path)
    real, calls = O._write_temp, []

    def second_fails(path, data):
        calls.append(path)
        if len(calls) == 2:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real(path, data)

    monkeypatch.setattr(O, "_write_temp", second_fails)
    line = one_error(invoke("track", nc, "--metrics", "hadley_edge_lat", "-o", indices, "-q"), 1)
    assert "No space left on device" in line and "untouched" in line and str(indices.with_suffix("")) in line
    assert len(calls) == 2 and calls[1].endswith("indices.provenance.json")
    assert snapshot(tmp_path) == before                 # same CSV, same sidecar, no temp file


def test_stdout_on_a_full_disk_is_one_line(nc):
    with open("/dev/full", "w") as full:
        p = subprocess.run([sys.executable, "-m", "circtrack.cli", "track", nc, "--metrics", IDS, "-o", "-", "-q"],
                           stdout=full, stderr=subprocess.PIPE, text=True, env={**os.environ, "PYTHONPATH": ROOT},
                           timeout=120)
    lines = p.stderr.splitlines()
    assert p.returncode == 1 and len(lines) == 1, p.stderr
    assert lines[0].startswith("circtrack: error: -o -: cannot write to standard output (No space left")


def test_a_directory_where_the_sidecar_goes_is_refused_before_work(tmp_path, nc):
    (tmp_path / "o.provenance.json").mkdir()
    line = one_error(invoke("track", nc, "-o", tmp_path / "o.csv"), 2)
    assert "o.provenance.json" in line and "directory" in line
    assert not (tmp_path / "o.csv").exists()


# --------------------------------------------------------------------------- the CSV is always well-formed
@pytest.mark.parametrize("sectors", ['"a,b" = [0.0, 90.0]', '"a\\nb" = [0.0, 90.0]', 'zonal = [0.0, 90.0]',
                                     '"=cmd" = [0.0, 90.0]', 'pacific = [150.0]', 'pacific = [10.0, 370.0]'])
def test_config_sector_names_and_bands_are_checked_like_the_cli(tmp_path, nc, sectors):
    cfg = tmp_path / "c.toml"
    cfg.write_text(f"[sectors]\n{sectors}\n")
    line = one_error(invoke("track", nc, "-c", cfg, "-o", tmp_path / "o.csv"), 2)
    assert "[sectors]" in line and "in the config" in line
    assert not (tmp_path / "o.csv").exists()


@pytest.mark.parametrize("label, why", [("=HYPERLINK(1)", "formula"), ("@SUM(A1)", "formula"), ("+1+cmd", "formula"),
                                        ("a\nb", "line break"), ('say "x"', "double quote"), ("tab\there", "control")])
def test_labels_that_would_break_the_csv_are_refused(tmp_path, nc, label, why):
    line = one_error(invoke("track", nc, "--label", label, "-o", tmp_path / "o.csv"), 2)
    assert "--label" in line and why in line


def test_sector_name_starting_like_a_formula_is_refused(tmp_path, nc):
    line = one_error(invoke("track", nc, "--sector", "-west=0:90", "-o", tmp_path / "o.csv"), 2)
    assert "--sector '-west=0:90'" in line and "formula" in line


def test_text_rule():
    assert G.text_problem("model_q") is None and G.text_problem("-1") is None     # numbers are fine
    assert G.text_problem("r1i1p1f1") is None and G.text_problem("ERA5 final") is None
    for bad in ("", " x", "x ", "a,b", "a\rb", "-x", "=1+1", "@x", "+x", 'a"b', "a\x00b"):
        assert G.text_problem(bad), bad


def test_file_name_that_would_break_the_csv_is_one_line(tmp_path):
    d = tmp_path / "evil,name"
    d.mkdir()
    p = write(make_dataset(1), d / "evil,name_2000.nc")
    line = one_error(invoke("track", p, "--metrics", IDS, "-o", tmp_path / "o.csv", "-q"), 1)
    assert "comma" in line and "--label" in line
    assert not (tmp_path / "o.csv").exists()


# --------------------------------------------------------------------------- findings: one series per key
def test_duplicated_key_rows_are_refused(tmp_path):
    csv = monthly_csv(tmp_path / "s.csv", extra_rows=["m,2001-03-15,NH,zonal,hadley_edge_lat,31.0,degrees_north,ok"])
    for cmd in ("trend", "season"):
        line = one_error(invoke(cmd, csv), 1)
        assert "lines 16 and 38" in line and "same key" in line and "2001-03-15" in line
    line = one_error(invoke("plot", csv, "-o", tmp_path / "p.png"), 1)
    assert "same key" in line


def test_mixed_units_within_a_metric_are_refused(tmp_path):
    csv = monthly_csv(tmp_path / "s.csv", years=2,
                      extra_rows=["m,2002-01-15,NH,zonal,hadley_edge_lat,0.5,radians,ok"])
    line = one_error(invoke("trend", csv), 1)
    assert "different units (degrees_north, radians)" in line


# --------------------------------------------------------------------------- settings that cannot work
@pytest.mark.parametrize("toml, needle", [
    ("[cells]\nlevel_hpa = nan\n", "cells.level_hpa in the config: not a finite number"),
    ("[jets]\neddy_window = [15.0, inf]\n", "jets.eddy_window in the config: not a finite number"),
    ("[run]\nchunk_cache_bytes = -1\n", "run.chunk_cache_bytes = -1"),
    ("[run]\ntime_chunk = 0\n", "run.time_chunk = 0"),
    ("[run]\nbatch_time_steps = -5\n", "run.batch_time_steps = -5"),
    ("[run]\nprocesses = -2\n", "run.processes = -2"),
    ("[cluster]\nconnect_timeout_s = 0.0\n", "cluster.connect_timeout_s"),
    ('[variables]\nwind = "U"\n', "unknown role 'wind'"),
    ("[variables]\nua = 3\n", "give the variable's name in quotes"),
])
def test_config_values_that_cannot_work(tmp_path, nc, toml, needle):
    cfg = tmp_path / "bad.toml"
    cfg.write_text(toml)
    line = one_error(invoke("track", nc, "-c", cfg, "-o", tmp_path / "o.csv"), 2)
    assert needle in line, line


def test_config_that_is_a_directory(tmp_path, nc):
    line = one_error(invoke("track", nc, "-c", tmp_path, "-o", tmp_path / "o.csv"), 2)
    assert "is a directory" in line and "TOML" in line


# --------------------------------------------------------------------------- a scheduler that never answers
@pytest.fixture
def silent_listener():
    """A TCP server on 127.0.0.1 that accepts connections and never says a word."""
    srv = socket.socket()
    srv.bind(("127.0.0.1", 0))
    srv.listen(8)
    held = []

    def accept():
        while True:
            try:
                held.append(srv.accept()[0])
            except OSError:
                return

    threading.Thread(target=accept, daemon=True).start()
    yield f"tcp://127.0.0.1:{srv.getsockname()[1]}"
    srv.close()
    for c in held:
        c.close()


def _closed_port():
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return f"tcp://127.0.0.1:{port}"


@pytest.mark.parametrize("which", ["silent", "closed"])
def test_scheduler_that_does_not_answer_is_one_line_within_the_timeout(tmp_path, nc, silent_listener, which):
    pytest.importorskip("distributed")
    address = silent_listener if which == "silent" else _closed_port()
    cfg = tmp_path / "fast.toml"
    cfg.write_text("[cluster]\nconnect_timeout_s = 1.0\n")
    t0 = time.time()
    line = one_error(invoke("track", nc, "--scheduler", address, "-c", cfg, "-o", tmp_path / "o.csv", "-q"), 1)
    assert time.time() - t0 < 15
    assert f"--scheduler {address}" in line
    assert not (tmp_path / "o.csv").exists()


# --------------------------------------------------------------------------- library warnings
@click.command()
@click.option("-q", "--quiet", is_flag=True)
@guarded
def _noisy(quiet):
    warnings.warn("cftime says something\nover two lines", UserWarning)
    warnings.warn("cftime says something\nover two lines", UserWarning)
    with np.errstate(all="warn"):
        np.array([0.0]) / np.array([0.0])
    click.echo("done")


def test_library_warnings_are_one_line_notes_and_silent_with_quiet():
    r = CliRunner().invoke(_noisy, ["-q"])
    assert r.exit_code == 0 and r.stderr == "" and r.stdout == "done\n"
    r = CliRunner().invoke(_noisy, [])
    notes = r.stderr.splitlines()
    assert len(notes) == 2 and all(n.startswith("circtrack: note: ") for n in notes), r.stderr
    assert "cftime says something over two lines (UserWarning" in notes[0]


# --------------------------------------------------------------------------- inputs that change during a run
def test_an_input_replaced_during_the_run_is_refused(tmp_path, monkeypatch, indices):
    from circtrack import engine

    d = tmp_path / "in"
    b = write(make_dataset(2), d / "b.nc")
    before = snapshot(tmp_path)
    real = engine.track

    def replaced_while_reading(paths, *a, **k):
        out = real(paths, *a, **k)
        write(make_dataset(2).isel(time=[1, 0]), b)          # rewritten after it was read
        return out

    monkeypatch.setattr(engine, "track", replaced_while_reading)
    line = one_error(invoke("track", d, "--metrics", IDS, "-o", indices, "-q"), 1)
    assert b in line and "changed while it was being read" in line
    assert snapshot(tmp_path) == before                          # OUT and sidecar untouched


def test_commit_never_replaces_a_device_and_writes_through_links(tmp_path):
    with pytest.raises(UsageError, match="not a regular file"):
        O.commit([(str(tmp_path / "ok.txt"), "a"), ("/dev/null", "b")])
    assert stat.S_ISCHR(os.stat("/dev/null").st_mode) and not (tmp_path / "ok.txt").exists()
    (tmp_path / "t.txt").write_text("old")
    (tmp_path / "l.txt").symlink_to(tmp_path / "t.txt")
    O.commit([(str(tmp_path / "l.txt"), "new")])
    assert (tmp_path / "l.txt").is_symlink() and (tmp_path / "t.txt").read_text() == "new"


# --------------------------------------------------------------------------- update: outputs, lock, state
def test_update_refuses_an_output_that_is_an_input(tmp_path):
    d = tmp_path / "d"
    d.mkdir()
    a = write(make_dataset(1), d / "a.nc")
    before = snapshot(d)
    line = one_error(invoke("update", d, "-o", a, "-q"), 2)          # 'update dir -o dir/a.nc'
    assert a in line
    assert snapshot(d) == before                      # no lock, sidecar or state either


def test_update_refuses_when_its_state_would_overwrite_an_input(tmp_path):
    d = tmp_path / "d"
    d.mkdir()
    data = write(make_dataset(1), d / "o.state.json")
    line = one_error(invoke("update", data, "-o", d / "o.csv", "-q"), 2)
    assert "the state of -o" in line and "o.state.json" in line


def test_update_refuses_a_device_as_output(nc):
    line = one_error(invoke("update", nc, "-o", "/dev/null", "-q"), 2)
    assert "not a regular file" in line
    assert stat.S_ISCHR(os.stat("/dev/null").st_mode)


def test_update_through_a_symlink_keeps_its_files_beside_the_target(tmp_path, nc):
    (tmp_path / "store").mkdir()
    link = tmp_path / "link.csv"
    link.symlink_to(tmp_path / "store" / "real.csv")
    assert invoke("update", nc, "--metrics", IDS, "-o", link, "-q", "--label", "L").exit_code == 0
    assert link.is_symlink()
    assert sorted(os.listdir(tmp_path / "store")) == ["real.csv", "real.lock", "real.provenance.json",
                                                     "real.state.json"]
    r = invoke("update", nc, "--metrics", IDS, "-o", link, "--label", "L")
    assert r.exit_code == 0 and "nothing new" in r.output


def test_a_directory_where_the_lock_goes_is_one_line(tmp_path, nc):
    (tmp_path / "o.lock").mkdir()
    line = one_error(invoke("update", nc, "-o", tmp_path / "o.csv", "-q"), 2)
    assert "o.lock" in line and "directory" in line


def test_a_lock_file_left_by_a_dead_run_does_not_block(tmp_path, nc):
    (tmp_path / "o.lock").write_text("")                 # the file stays; only a living owner holds the lock
    r = invoke("update", nc, "--metrics", IDS, "-o", tmp_path / "o.csv", "-q", "--label", "L")
    assert r.exit_code == 0, r.output


@pytest.mark.parametrize("damage", [
    lambda st: {**st, "files": [1, 2]},
    lambda st: {**st, "files": {k: {**v, "times": "2000-01-15"} for k, v in st["files"].items()}},
    lambda st: {**st, "files": {k: {**v, "times": ["January"]} for k, v in st["files"].items()}},
    lambda st: {k: v for k, v in st.items() if k != "params_hash"},
    lambda st: [st],
])
def test_a_state_file_of_the_wrong_shape_is_rebuilt_with_a_line(tmp_path, nc, damage):
    import json

    out = tmp_path / "o.csv"
    args = ["update", nc, "--metrics", IDS, "-o", out, "--label", "L"]
    assert invoke(*args, "-q").exit_code == 0
    good = out.read_bytes()
    sp = tmp_path / "o.state.json"
    sp.write_text(json.dumps(damage(json.loads(sp.read_text()))))
    r = invoke(*args)
    assert r.exit_code == 0, r.output
    assert "o.state.json is unreadable or from an older circtrack; rebuilding" in r.stderr
    assert out.read_bytes() == good
    r = invoke(*args)
    assert r.exit_code == 0 and "nothing new" in r.output


def test_update_refuses_an_input_replaced_during_the_run(tmp_path, monkeypatch):
    from circtrack import engine

    d = tmp_path / "in"
    d.mkdir()
    a = write(make_dataset(2), d / "a.nc")
    out = tmp_path / "o.csv"
    real = engine.track

    def replaced_while_reading(paths, *args, **kw):
        result = real(paths, *args, **kw)
        write(make_dataset(2).isel(time=[1, 0]), a)
        return result

    monkeypatch.setattr(engine, "track", replaced_while_reading)
    line = one_error(invoke("update", d, "--metrics", IDS, "-o", out, "-q", "--label", "L"), 1)
    assert a in line and "changed while it was being read" in line
    assert not out.exists() and not (tmp_path / "o.state.json").exists()


# --------------------------------------------------------------------------- labels from files
def test_source_id_with_a_line_break_names_the_attribute(tmp_path):
    ds = make_dataset(1)
    ds.attrs["source_id"] = "MODEL\nINJECTED,row,,,,,"
    p = write(ds, tmp_path / "m.nc")
    for cmd in ("track", "update"):
        line = one_error(invoke(cmd, p, "--metrics", IDS, "-o", tmp_path / "o.csv", "-q"), 1)
        assert p in line and "global attribute source_id" in line and "--label" in line
    assert not (tmp_path / "o.csv").exists()
    assert invoke("track", p, "--metrics", IDS, "-o", tmp_path / "o.csv", "-q", "--label", "ok").exit_code == 0


def test_update_names_the_file_whose_name_breaks_the_csv(tmp_path):
    p = write(make_dataset(1), tmp_path / "evil,name_2000.nc")
    line = one_error(invoke("update", p, "--metrics", IDS, "-o", tmp_path / "o.csv", "-q"), 1)
    assert p in line and "taken from the file name" in line and "comma" in line


# --------------------------------------------------------------------------- bounds
def test_processes_are_capped_at_the_core_count():
    from circtrack import config as C
    from circtrack.engine.pool import Runner

    cfg = C.load(None)
    cfg["run"]["processes"] = 100000
    assert Runner(cfg, 10).nproc == (os.cpu_count() or 1)


def test_a_real_scheduler_passes_the_probe(tmp_path, nc, indices):
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address=None,
                                  protocol="tcp", silence_logs=40) as cluster:
        cfg = tmp_path / "fast.toml"
        cfg.write_text("[cluster]\nconnect_timeout_s = 10.0\n")
        r = invoke("track", nc, "--metrics", IDS, "--scheduler", cluster.scheduler_address, "-c", cfg,
                   "-o", tmp_path / "viaclient.csv", "-q")
    assert r.exit_code == 0, r.output
    assert (tmp_path / "viaclient.csv").read_bytes() == indices.read_bytes()
