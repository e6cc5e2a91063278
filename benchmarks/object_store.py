#!/usr/bin/env python
"""Object storage vs disk: ``circtrack track`` (default metrics) on benchmark files on disk and on
the same files served by a local S3-compatible server on 127.0.0.1, side by side in one run.

    python benchmarks/object_store.py [--months N] [--res 0.5] [--compress zlib|none|both]
                                      [--server s3rver|moto] [--s3rver PATH] [--repeat K] [--workdir DIR]

The server: s3rver (a Node.js S3 server that keeps objects as files and answers a range request
by streaming that range from disk; ``npm install s3rver``; found with ``--s3rver PATH``, the
``S3RVER`` environment variable or on ``PATH``), else moto's server mode (from the ``test`` extra;
it copies the whole object for every range request, so its own CPU time grows with the object
size). Uses the data and measuring helpers of benchmarks/run.py. See benchmarks/README.md.
"""
from __future__ import annotations

import argparse
import os
import shutil
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from run import REPO, circtrack_cmd, generate, markdown, measure, payload_bytes  # noqa: E402

BUCKET = "circtrack-bench"


def _free_port():
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


class LocalObjectStore:
    """A local S3-compatible server on 127.0.0.1 (a free port): ``kind`` "s3rver" (``binary``: the
    s3rver executable; objects kept in a temporary directory) or "moto". Stopped by stop()."""

    def __init__(self, kind="moto", binary=None):
        import boto3

        self.kind, self.port = kind, _free_port()
        self.endpoint = f"http://127.0.0.1:{self.port}"
        self.tmp = None
        if kind == "s3rver":
            self.tmp = tempfile.mkdtemp(prefix="s3rver-")
            cmd = [binary, "-d", self.tmp, "-a", "127.0.0.1", "-p", str(self.port), "-s"]
            key = secret = "S3RVER"                       # the only credentials s3rver accepts
        else:
            cmd = [sys.executable, "-m", "moto.server", "-H", "127.0.0.1", "-p", str(self.port)]
            key = secret = "bench"
        self.proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + 30
        while True:
            try:
                socket.create_connection(("127.0.0.1", self.port), 0.2).close()
                break
            except OSError:
                if self.proc.poll() is not None or time.monotonic() > deadline:
                    self.stop()
                    raise SystemExit(f"the {kind} server did not start ({' '.join(cmd)})")
                time.sleep(0.05)
        self.env = {"AWS_ACCESS_KEY_ID": key, "AWS_SECRET_ACCESS_KEY": secret,
                    "AWS_ENDPOINT_URL": self.endpoint, "AWS_DEFAULT_REGION": "us-east-1"}
        self.client = boto3.client("s3", endpoint_url=self.endpoint, region_name="us-east-1",
                                   aws_access_key_id=key, aws_secret_access_key=secret)

    def upload(self, bucket, prefix, files):
        self.client.create_bucket(Bucket=bucket)
        for f in files:
            self.client.upload_file(str(f), bucket, f"{prefix}/{Path(f).name}")
        return f"s3://{bucket}/{prefix}/"

    def cpu_seconds(self):
        """CPU time the server has used so far (it shares the machine's cores with circtrack)."""
        import psutil

        t = psutil.Process(self.proc.pid).cpu_times()
        return t.user + t.system

    def stop(self):
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        if self.tmp:
            shutil.rmtree(self.tmp, ignore_errors=True)


def find_s3rver(given=None):
    """The s3rver executable: ``given``, ``$S3RVER`` or ``s3rver`` on PATH; None if none is there."""
    for cand in (given, os.environ.get("S3RVER"), shutil.which("s3rver")):
        if cand and os.access(cand, os.X_OK):
            return cand
    return None


def raw_transfer(store, url, files, piece=16 << 20, parallel=4):
    """The server's own speed: every object's bytes fetched in ``piece``-byte range GETs, ``parallel``
    at a time, on presigned URLs with the standard library's HTTP client and nothing else done with
    them -> (seconds, bytes, server CPU seconds). circtrack's S3 run shares the same cores with the
    server, so this time is a floor under it that no client change can lower."""
    import concurrent.futures
    import http.client
    import urllib.parse

    bucket, prefix = url[len("s3://"):].split("/", 1)
    jobs = []
    for f in files:
        key, size = prefix + Path(f).name, Path(f).stat().st_size
        signed = urllib.parse.urlsplit(store.client.generate_presigned_url(
            "get_object", Params={"Bucket": bucket, "Key": key}, ExpiresIn=3600))
        jobs += [(signed, a, min(a + piece, size)) for a in range(0, size, piece)]

    def get(job):
        signed, a, b = job
        conn = http.client.HTTPConnection(signed.hostname, signed.port, timeout=60)
        try:
            conn.request("GET", f"{signed.path}?{signed.query}", headers={"Range": f"bytes={a}-{b - 1}"})
            resp = conn.getresponse()
            buf = memoryview(bytearray(b - a))
            got = 0
            while got < len(buf):
                n = resp.readinto(buf[got:])
                if not n:
                    break
                got += n
            return got
        finally:
            conn.close()

    cpu0, t0 = store.cpu_seconds(), time.perf_counter()
    with concurrent.futures.ThreadPoolExecutor(parallel) as pool:
        got = sum(pool.map(get, jobs))
    return time.perf_counter() - t0, got, store.cpu_seconds() - cpu0


def object_store_table(files, outdir, nbytes, store, repeat, log):
    """circtrack track (default metrics) on the files on disk and on the same files in the local
    S3 server, alternating ``repeat`` rounds (load from other processes falls on both alike), then
    on the first object alone once: medians of wall and CPU time, the server's CPU time, peak RSS,
    and whether the CSVs are byte-identical."""
    t0 = time.perf_counter()
    url = store.upload(BUCKET, outdir.name, files)
    log(f"  uploaded {len(files)} files to {url} in {time.perf_counter() - t0:.0f} s ({store.kind})")
    try:
        raw = raw_transfer(store, url, files)
        log(f"  the server alone: {raw[1] / 1e6:.0f} MB in 16 MiB range GETs, 4 at a time: {raw[0]:.2f} s "
            f"({raw[1] / 1e6 / raw[0]:.0f} MB/s), server CPU {raw[2]:.1f} s")
    except Exception as e:     # e.g. moto answers presigned GETs with HTTP 500
        raw = None
        log(f"  the server alone: not measured ({type(e).__name__}: {e})")
    ct, ct_env = circtrack_cmd()
    disk_csv, s3_csv = outdir / "disk.csv", outdir / "object_store.csv"
    runs = [("circtrack track, files on disk", ct + ["track", *map(str, files), "-o", str(disk_csv), "-q"], ct_env),
            (f"circtrack track, same files from the local S3 server ({store.kind})",
             ct + ["track", url, "-o", str(s3_csv), "-q"], {**ct_env, **store.env})]
    one = ("the same, first object only (memory does not grow with the record)",
           ct + ["track", url + Path(files[0]).name, "-o", str(outdir / "object_store_1.csv"), "-q"],
           {**ct_env, **store.env})
    seen = {name: [] for name, _, _ in runs + [one]}
    for k in range(repeat):
        for name, cmd, env in runs + ([one] if k == repeat - 1 else []):
            slug = "".join(c if c.isalnum() else "_" for c in name)[:40]
            cpu0 = store.cpu_seconds()
            m = measure(cmd, outdir / f"{slug}.{k}.log", env=env)
            m["server_cpu"] = store.cpu_seconds() - cpu0
            log(f"  {name}: rc={m['rc']} wall={m['wall']:.1f}s cpu={m['cpu']:.1f}s maxrss={m['maxrss'] / 1e9:.2f}GB "
                f"server CPU {m['server_cpu']:.1f}s")
            seen[name].append(m)
    rows = []
    for name, ms in seen.items():
        med = {key: statistics.median(m[key] for m in ms) for key in ("wall", "cpu", "server_cpu")}
        med.update(rc=max(m["rc"] for m in ms), maxrss=max(m["maxrss"] for m in ms), tree=max(m["tree"] for m in ms),
                   walls=[m["wall"] for m in ms])
        rows.append((name, med))
    base = rows[0][1]
    nbytes_of = [nbytes, nbytes, nbytes / len(files)]
    same = disk_csv.exists() and s3_csv.exists() and disk_csv.read_bytes() == s3_csv.read_bytes()
    table = []
    for k, ((name, m), n) in enumerate(zip(rows, nbytes_of)):
        table.append((name, (f"{m['wall']:.1f}" if m["rc"] == 0 else f"FAILED rc={m['rc']}"),
                      " ".join(f"{w:.1f}" for w in m["walls"]),
                      f"{m['wall'] / base['wall']:.2f}" if k < 2 else "", f"{m['cpu']:.1f}",
                      f"{m['cpu'] / base['cpu']:.2f}" if k < 2 else "",
                      f"{m['server_cpu']:.1f}" if k else "",
                      f"{(m['cpu'] + m['server_cpu']) / base['cpu']:.2f}" if k == 1 else "",
                      f"{n / 1e6 / m['wall']:.0f}", f"{m['maxrss'] / 1e9:.2f}", f"{m['tree'] / 1e9:.2f}"))
    return table, same, raw


HEAD = ("approach", "wall s (median)", "wall s (runs)", "wall ratio to disk", "CPU s", "CPU ratio to disk",
        "S3 server CPU s", "CPU ratio incl. server", "input MB/s", "peak RSS GB (largest proc)",
        "peak RSS GB (tree sum)")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--months", type=int, default=2)
    ap.add_argument("--res", type=float, default=0.5)
    ap.add_argument("--compress", choices=["zlib", "none", "both"], default="zlib")
    ap.add_argument("--server", choices=["s3rver", "moto"], default=None,
                    help="default: s3rver when found, else moto")
    ap.add_argument("--s3rver", default=None, help="path of the s3rver executable (default: $S3RVER or PATH)")
    ap.add_argument("--repeat", type=int, default=1, help="rounds of (disk, S3), alternating; medians reported")
    ap.add_argument("--workdir", default="/tmp/circtrack-bench")
    a = ap.parse_args(argv)
    workdir = Path(a.workdir).resolve()
    if REPO in workdir.parents or workdir == REPO:
        raise SystemExit("--workdir must be outside the repository")

    def log(msg):
        print(msg, file=sys.stderr, flush=True)

    binary = find_s3rver(a.s3rver)
    kind = a.server or ("s3rver" if binary else "moto")
    if kind == "s3rver" and not binary:
        raise SystemExit("s3rver not found: npm install s3rver, then pass --s3rver PATH/node_modules/.bin/s3rver")
    if kind == "moto" and a.server is None:
        log("s3rver not found (npm install s3rver; --s3rver PATH): using moto, whose range requests copy the whole "
            "object (see the S3 server CPU column)")
    report = []
    for comp in (["zlib", "none"] if a.compress == "both" else [a.compress]):
        files = generate(workdir, a.res, comp, a.months, log)
        nbytes = payload_bytes(files)
        ondisk = sum(f.stat().st_size for f in files)
        outdir = workdir / "runs" / f"objstore-res{a.res:g}-{comp}-{a.months}m"
        outdir.mkdir(parents=True, exist_ok=True)
        for f in files:
            f.read_bytes()
        store = LocalObjectStore(kind, binary)
        try:
            load = os.getloadavg()
            table, same, raw = object_store_table(files, outdir, nbytes, store, a.repeat, log)
            load_after = os.getloadavg()
        finally:
            store.stop()
        report += [f"## object storage ({kind}) vs disk, compression: {comp}", "",
                   f"{len(files)} files, {nbytes / 1e6:.0f} MB of ua+va values, {ondisk / 1e6:.0f} MB on disk; "
                   f"{a.repeat} round(s); CSVs byte-identical: {'yes' if same else 'NO'}; 1-minute load average "
                   f"{load[0]:.1f} before, {load_after[0]:.1f} after. Logs: {outdir}", "",
                   markdown(table, head=HEAD), ""]
        if raw and table[0][1].replace(".", "", 1).isdigit():
            report += [f"The server alone (every object's bytes in 16 MiB range GETs, 4 at a time, nothing done with "
                       f"them): {raw[0]:.2f} s for {raw[1] / 1e6:.0f} MB ({raw[1] / 1e6 / raw[0]:.0f} MB/s), server CPU "
                       f"{raw[2]:.1f} s: a floor under the S3 run's wall time on this machine "
                       f"({raw[0] / float(table[0][1]):.2f}x the median disk run).", ""]
    print("\n".join(report))


if __name__ == "__main__":
    main()
