"""track, scan and update on inputs in object storage, through the command line: rows equal those
from the same files on disk byte for byte; prefixes, globs, stores, HTTPS, stdin; one-line errors;
update over a growing prefix; nothing written into the bucket."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import fsspec
import pytest
from click.testing import CliRunner

from circtrack.cli import main

from .conftest import BUCKET

METRICS = "hadley_edge_lat,subtropical_jet_lat,eddy_jet_lat"
ROOT = str(Path(__file__).resolve().parents[2])          # the repository, for subprocesses
DAILY = f"s3://{BUCKET}/reanalysis/daily"


def invoke(*args, stdin=None):
    fsspec.filesystem("s3").clear_instance_cache()        # credentials from this test's environment
    return CliRunner().invoke(main, [str(a) for a in args], input=stdin)


def csv_of(tmp_path, name, *args, stdin=None):
    out = tmp_path / name
    r = invoke("track", *args, "-o", out, "-q", "--metrics", METRICS, stdin=stdin)
    assert r.exit_code == 0, r.output
    return out.read_bytes()


def one_error_line(r, code=1):
    assert r.exit_code == code, r.output
    lines = [ln for ln in r.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("circtrack: error:"), r.output
    return lines[0]


def test_prefix_rows_equal_disk_byte_for_byte(aws, local_data, tmp_path):
    disk = csv_of(tmp_path, "disk.csv", local_data["files"][0].parent)
    remote = csv_of(tmp_path, "s3.csv", DAILY + "/")
    assert remote == disk and disk.count(b"\n") > 10
    prov = json.loads((tmp_path / "s3.provenance.json").read_text())
    first = prov["inputs"][0]
    assert first["path"] == f"{DAILY}/uv_00.nc"
    assert first["size"] == local_data["files"][0].stat().st_size and first["etag"]


def test_glob_and_stdin(aws, local_data, tmp_path):
    files = local_data["files"]
    assert csv_of(tmp_path, "glob.csv", f"{DAILY}/uv_0[12].nc") == csv_of(tmp_path, "g.csv", *files[1:])
    listed = f"{DAILY}/uv_02.nc\n{DAILY}/uv_00.nc\n"
    assert csv_of(tmp_path, "stdin.csv", "-", stdin=listed) == csv_of(tmp_path, "s.csv", files[2], files[0])


def test_zarr_store_in_worker_processes(aws, local_data, tmp_path):
    """A fresh command on a store of 12 time steps (two tasks, so forked workers open it too):
    the rows of the store on disk, and nothing else on stderr."""
    out = tmp_path / "zarr.csv"
    r = subprocess.run([sys.executable, "-m", "circtrack.cli", "track", f"s3://{BUCKET}/stores/uv.zarr", "-o",
                        str(out), "--metrics", METRICS, "-q"], capture_output=True, text=True,
                       env={**os.environ, "PYTHONPATH": ROOT})
    assert r.returncode == 0 and r.stderr == "", r.stderr
    assert out.read_bytes() == csv_of(tmp_path, "z.csv", local_data["store"])


def test_scan_reads_an_object(aws):
    r = invoke("scan", f"{DAILY}/uv_01.nc")
    assert r.exit_code == 0, r.output
    assert "ua" in r.output and "va" in r.output


@pytest.mark.parametrize("url, words", [
    ("s3://no-such-bucket-here/daily/", ["bucket 'no-such-bucket-here' does not exist"]),
    (f"{DAILY}/uv_99.nc", ["no such object or prefix"]),
    (f"s3://{BUCKET}/reanalysis/monthly/", ["no such object or prefix"]),
])
def test_missing_bucket_and_key(aws, tmp_path, url, words):
    line = one_error_line(invoke("track", url, "-o", tmp_path / "x.csv", "-q"))
    assert url in line and all(w in line for w in words)
    assert not (tmp_path / "x.csv").exists()


def test_wrong_credentials(aws, tmp_path, monkeypatch):
    monkeypatch.setenv("AWS_SECRET_ACCESS_KEY", "wrong")
    line = one_error_line(invoke("track", DAILY + "/", "-o", tmp_path / "x.csv", "-q"))
    assert "access denied" in line and "AWS_ACCESS_KEY_ID" in line


def test_without_the_extra_one_line(tmp_path):
    code = "import sys; sys.modules['s3fs'] = None; from circtrack.cli import main; main()"
    r = subprocess.run([sys.executable, "-c", code, "track", f"{DAILY}/", "-o", str(tmp_path / "x.csv")],
                       capture_output=True, text=True, env={**os.environ, "PYTHONPATH": ROOT})
    assert r.returncode == 1
    assert r.stderr.strip().count("\n") == 0 and "pip install 'circtrack[cloud]'" in r.stderr


def test_anonymous_public_bucket_and_https(open_s3, local_data, tmp_path, monkeypatch):
    for k in [k for k in os.environ if k.startswith("AWS_")]:
        monkeypatch.delenv(k)
    monkeypatch.setenv("AWS_ENDPOINT_URL", open_s3.endpoint)
    before = open_s3.listing(BUCKET)
    disk = csv_of(tmp_path, "disk.csv", local_data["files"][0].parent)
    assert csv_of(tmp_path, "anon.csv", DAILY + "/", "--anonymous") == disk
    http = f"{open_s3.endpoint}/{BUCKET}/reanalysis/daily/uv_02.nc"
    assert csv_of(tmp_path, "http.csv", http) == csv_of(tmp_path, "one.csv", local_data["files"][2])
    assert csv_of(tmp_path, "httpz.csv", f"{open_s3.endpoint}/{BUCKET}/stores/uv.zarr") == \
        csv_of(tmp_path, "z.csv", local_data["store"])
    assert open_s3.listing(BUCKET) == before


def test_cache_dir_reads_classic_objects_from_local_copies(aws, local_data, tmp_path):
    url = f"s3://{BUCKET}/other/classic.nc"
    line = one_error_line(invoke("track", url, "-o", tmp_path / "x.csv", "-q"))
    assert "--cache-dir" in line
    cache = tmp_path / "cache"
    got = csv_of(tmp_path, "cached.csv", url, "--cache-dir", cache)
    assert got == csv_of(tmp_path, "classic.csv", local_data["classic"])
    assert len(os.listdir(cache)) == 1


def test_update_over_a_growing_prefix(aws, local_data, tmp_path):
    files = local_data["files"]
    prefix = "growing/daily"
    out = tmp_path / "out.csv"
    try:
        for k in range(3):
            aws.put(BUCKET, f"{prefix}/{files[k].name}", files[k])
            before = aws.listing(BUCKET)
            r = invoke("update", f"s3://{BUCKET}/{prefix}/", "-o", out, "-q", "--metrics", METRICS, "--label", "L")
            assert r.exit_code == 0, r.output
            assert out.read_bytes() == csv_of(tmp_path, f"ref{k}.csv", *files[:k + 1], "--label", "L")
            assert aws.listing(BUCKET) == before
        state = json.loads((tmp_path / "out.state.json").read_text())
        assert all(str(p).startswith(f"s3://{BUCKET}/{prefix}/") for p in state["files"])
        assert all(e["etag"] and e["size"] for e in state["files"].values())        # size + ETag, no mtime
        # an object rewritten in place with the same size (new ETag): the time steps it held are
        # dropped, the new ones repeat uv_02's (identical, so kept once)
        aws.put(BUCKET, f"{prefix}/{files[1].name}", files[2])
        r = invoke("update", f"s3://{BUCKET}/{prefix}/", "-o", out, "-q", "--metrics", METRICS, "--label", "L")
        assert r.exit_code == 0, r.output
        ref = invoke("track", *[f"s3://{BUCKET}/{prefix}/{f.name}" for f in files], "-o", tmp_path / "r.csv",
                     "-q", "--metrics", METRICS, "--label", "L")
        assert ref.exit_code == 0, ref.output
        assert out.read_bytes() == (tmp_path / "r.csv").read_bytes()
    finally:
        for f in files:
            aws.client.delete_object(Bucket=BUCKET, Key=f"{prefix}/{f.name}")



def test_time_axis_reopened_from_the_object(aws, tmp_path):
    """"months since" time units make xarray refuse the first open; the object is opened again
    (undecoded) through the same file object, and the rows equal those of the file on disk."""
    import numpy as np

    from ..conftest import make_dataset

    ds = make_dataset(3).drop_vars("time")
    ds = ds.assign_coords(time=("time", np.array([0.0, 1.0, 2.0]), {"units": "months since 2000-01-01",
                                                                   "calendar": "standard"}))
    local = tmp_path / "months.nc"
    ds.to_netcdf(str(local))
    key = "scratch/months.nc"
    aws.put(BUCKET, key, local)
    try:
        remote = csv_of(tmp_path, "s3.csv", f"s3://{BUCKET}/{key}")
        assert remote == csv_of(tmp_path, "disk.csv", local) and b",2000-03-01," in remote
    finally:
        aws.client.delete_object(Bucket=BUCKET, Key=key)


def test_object_replaced_during_a_run_is_refused(aws, local_data, tmp_path):
    """Size and ETag are taken before reading and compared before writing, as size and mtime of a
    file: an object rewritten meanwhile gives one line and no output."""
    key = "scratch/replaced.nc"
    aws.put(BUCKET, key, local_data["files"][0])
    out = tmp_path / "x.csv"
    try:
        proc = subprocess.Popen([sys.executable, "-m", "circtrack.cli", "track", f"s3://{BUCKET}/{key}", "-o", str(out),
                                 "--metrics", METRICS], stderr=subprocess.PIPE, text=True,
                                env={**os.environ, "PYTHONPATH": ROOT, "CIRCTRACK_TASK_PAUSE_S": "2"})
        lines = []
        while not any("file(s), metrics" in ln for ln in lines):      # planned (stamps taken before)
            lines.append(proc.stderr.readline())
            assert lines[-1], "".join(lines)
        aws.put(BUCKET, key, local_data["files"][1])
        rest = proc.communicate(timeout=120)[1].strip().splitlines()
        assert proc.returncode == 1, rest
        assert "changed while it was being read" in rest[-1] and key in rest[-1]
        assert not any("Traceback" in ln for ln in rest)
        assert not out.exists()
    finally:
        aws.client.delete_object(Bucket=BUCKET, Key=key)


def test_workers_read_with_the_urls_signed_while_planning(open_aws, local_data, tmp_path, monkeypatch):
    """Signed reads from a server that takes presigned URLs: the worker processes read metadata and
    chunks by direct GETs with the URLs the parent signed while planning, never building an s3fs
    session of their own; the rows equal those of the files on disk."""
    import s3fs

    from circtrack.inputs import presigned as P

    log = tmp_path / "calls.txt"

    def noting(what, real):
        def wrapper(*a, **k):
            with open(log, "a") as f:
                f.write(f"{what} {os.getpid()}\n")
            return real(*a, **k)
        return wrapper

    monkeypatch.setattr(s3fs.S3FileSystem, "set_session", noting("session", s3fs.S3FileSystem.set_session))
    monkeypatch.setattr(P, "_get_into", noting("direct", P._get_into))
    disk = csv_of(tmp_path, "disk.csv", local_data["files"][0].parent)
    assert csv_of(tmp_path, "s3.csv", DAILY + "/") == disk
    calls = [line.split() for line in log.read_text().splitlines()]
    workers = {pid for what, pid in calls if pid != str(os.getpid())}
    assert workers, "no worker process read an object"
    assert not any(what == "session" and pid in workers for what, pid in calls)
