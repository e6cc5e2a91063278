"""update (issue 16): a file whose size and checksum are unchanged is unchanged whatever its mtime;
the progress line and the summary count the same files; log percentages are the share done."""

from __future__ import annotations

import io
import json
import os
import re

from circtrack.engine import progress as P

from .test_update import invoke, monthly, track_bytes


def test_touch_alone_changes_nothing_and_a_same_size_rewrite_is_seen(tmp_path):
    out = tmp_path / "out.csv"
    files = [monthly(tmp_path, k) for k in range(3)]
    assert invoke("update", *files, "-o", out, "-q", "--label", "L").exit_code == 0
    before = out.read_bytes()
    st = os.stat(files[1])
    os.utime(files[1], ns=(st.st_atime_ns, st.st_mtime_ns + 5_000_000_000))      # touch: same bytes
    r = invoke("update", *files, "-o", out, "--label", "L")
    assert r.exit_code == 0, r.output
    assert r.output.strip().splitlines() == [f"circtrack: nothing new for {out} (3 files up to date)"]
    assert out.read_bytes() == before
    # the same size, other values, an older mtime even: hashed again because the mtime moved
    size = os.path.getsize(files[1])
    monthly(tmp_path, 1, edj=(40.0, -45.0))
    assert os.path.getsize(files[1]) == size
    os.utime(files[1], ns=(st.st_atime_ns, st.st_mtime_ns - 7_000_000_000))
    r = invoke("update", *files, "-o", out, "-q", "--label", "L")
    assert r.exit_code == 0, r.output
    assert out.read_bytes() == track_bytes(tmp_path, files, "--label", "L") != before
    state = json.loads((tmp_path / "out.state.json").read_text())
    assert state["files"][os.path.abspath(files[1])]["mtime_ns"] == os.stat(files[1]).st_mtime_ns


def test_a_touched_file_is_recorded_with_its_new_mtime(tmp_path):
    """After a run with real news, a file that was only touched is kept, and its new mtime is
    recorded, so the next run does not hash it again."""
    from circtrack.update import state as S

    out = tmp_path / "out.csv"
    files = [monthly(tmp_path, k) for k in range(2)]
    assert invoke("update", *files, "-o", out, "-q", "--label", "L").exit_code == 0
    os.utime(files[0], ns=(0, 1_000_000_000))
    files.append(monthly(tmp_path, 2))
    r = invoke("update", *files, "-o", out, "-q", "--label", "L")
    assert r.exit_code == 0, r.output
    side = json.loads((tmp_path / "out.provenance.json").read_text())
    assert side["updated_incrementally"]["processed"] == [files[2]]
    rec = json.loads((tmp_path / "out.state.json").read_text())["files"][os.path.abspath(files[0])]
    assert rec["mtime_ns"] == 1_000_000_000
    # unchanged size and mtime: the recorded checksum is reused without reading the file
    calls = []
    real = S.checksum
    S.checksum = lambda p: calls.append(p) or real(p)
    try:
        assert S.file_record(files[0], rec)["checksum"] == rec["checksum"] and calls == []
        S.file_record(files[0], {**rec, "mtime_ns": 5})
        assert calls == [files[0]]
    finally:
        S.checksum = real


def test_progress_line_and_summary_count_the_same_files(tmp_path):
    out = tmp_path / "out.csv"
    files = [monthly(tmp_path, k) for k in range(3)]
    assert invoke("update", *files, "-o", out, "-q", "--label", "L").exit_code == 0
    files.append(monthly(tmp_path, 3))
    r = invoke("update", *files, "-o", out, "--label", "L")
    assert r.exit_code == 0, r.output
    lines = r.stderr.strip().splitlines()
    first = next(ln for ln in lines if "reading" in ln)
    last = next(ln for ln in lines if "updated" in ln)     # the end-of-run summary lines may follow it
    counts = re.compile(r"(\d+) new or changed file\(s\), (\d+) unchanged, (\d+) removed")
    assert counts.search(first).groups() == counts.search(last).groups() == ("1", "3", "0")
    reading = int(re.search(r"reading (\d+) file\(s\)", first).group(1))
    read = int(re.search(r"(\d+) file\(s\) read", last).group(1))
    assert reading == read == 2                     # the new file and one kept file it must fit
    assert re.search(r"for 2 time step\(s\)", first) and re.search(r"2 of 8 time steps computed", last)
    assert not any("file(s), metrics" in ln for ln in lines)     # no second count in other terms


def test_log_percentages_are_the_share_done(monkeypatch):
    clock = iter(range(0, 1000, 5))
    monkeypatch.setattr(P._time, "time", lambda: float(next(clock)))
    buf = io.StringIO()
    prog = P.Progress(stream=buf)
    for done in (128, 240):
        prog.step(done, 240)
    assert buf.getvalue().splitlines() == ["circtrack: 128/240 time steps (53 %) after 5 s",
                                           "circtrack: 240/240 time steps (100 %) after 10 s"]
    buf = io.StringIO()
    prog = P.Progress(stream=buf)
    for done in range(10, 101, 10):
        prog.step(done, 100)
    shown = [tuple(map(int, re.search(r"(\d+)/100 time steps \((\d+) %\)", ln).groups()))
             for ln in buf.getvalue().splitlines()]
    assert shown == [(30, 30), (50, 50), (80, 80), (100, 100)]
    assert all(done == pct for done, pct in shown)


def test_update_sidecar_lists_flag_notes_as_track_does(tmp_path):
    """The sidecar's flag_notes (e.g. ok;interpolated_level) after an incremental update equal those
    of one clean track over the same files."""
    files = [monthly(tmp_path, k) for k in range(2)]
    out = tmp_path / "out.csv"
    assert invoke("update", files[0], "-o", out, "-q", "--label", "L").exit_code == 0
    assert invoke("update", *files, "-o", out, "-q", "--label", "L").exit_code == 0
    ref = tmp_path / "ref.csv"
    assert invoke("track", *files, "-o", ref, "-q", "--label", "L").exit_code == 0
    assert out.read_bytes() == ref.read_bytes()
    got = json.loads((tmp_path / "out.provenance.json").read_text())["flag_notes"]
    want = json.loads((tmp_path / "ref.provenance.json").read_text())["flag_notes"]
    assert got == want
    if ";" in ref.read_text():          # notes in the rows: the summary must list them
        assert want
