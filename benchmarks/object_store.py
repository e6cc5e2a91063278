#!/usr/bin/env python
"""Object storage vs disk: ``circtrack track`` on benchmark files on disk and on the same files
served by a local S3-compatible server (moto, 127.0.0.1), one run each.

    python benchmarks/object_store.py [--months N] [--res 1] [--compress zlib|none|both] [--workdir DIR]

Uses the data and measuring helpers of benchmarks/run.py. See benchmarks/README.md.
"""
from __future__ import annotations

import argparse
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from run import METRICS, REPO, circtrack_cmd, generate, markdown, measure, payload_bytes  # noqa: E402


class LocalObjectStore:
    """moto's S3-compatible server on 127.0.0.1 (a free port), for --object-store; stopped by stop()."""

    def __init__(self):
        import socket

        import boto3

        with socket.socket() as sock:
            sock.bind(("127.0.0.1", 0))
            self.port = sock.getsockname()[1]
        self.endpoint = f"http://127.0.0.1:{self.port}"
        self.proc = subprocess.Popen([sys.executable, "-m", "moto.server", "-H", "127.0.0.1", "-p", str(self.port)],
                                     stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + 30
        while True:
            try:
                socket.create_connection(("127.0.0.1", self.port), 0.2).close()
                break
            except OSError:
                if self.proc.poll() is not None or time.monotonic() > deadline:
                    self.stop()
                    raise SystemExit("moto_server did not start (pip install 'moto[server]')")
                time.sleep(0.05)
        self.env = {"AWS_ACCESS_KEY_ID": "bench", "AWS_SECRET_ACCESS_KEY": "bench",
                    "AWS_ENDPOINT_URL": self.endpoint, "AWS_DEFAULT_REGION": "us-east-1"}
        self.client = boto3.client("s3", endpoint_url=self.endpoint, region_name="us-east-1",
                                   aws_access_key_id="bench", aws_secret_access_key="bench")

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
            self.proc.wait(timeout=10)


def object_store_table(files, outdir, nbytes, log):
    """circtrack track on the files on disk and on the same files in a local S3 server (one run
    each): wall time, ratio, throughput, peak RSS, and whether the two CSVs are byte-identical."""
    store = LocalObjectStore()
    try:
        t0 = time.perf_counter()
        url = store.upload("circtrack-bench", outdir.name, files)
        log(f"  uploaded {len(files)} files to {url} in {time.perf_counter() - t0:.0f} s")
        ct, ct_env = circtrack_cmd()
        disk_csv, s3_csv = outdir / "disk.csv", outdir / "object_store.csv"
        runs = [("circtrack track, files on disk", ct + ["track", *map(str, files), "-o", str(disk_csv),
                                                         "--metrics", METRICS, "-q"], ct_env),
                ("circtrack track, same files from the local S3 server",
                 ct + ["track", url, "-o", str(s3_csv), "--metrics", METRICS, "-q"], {**ct_env, **store.env}),
                ("the same, first object only (memory does not grow with the record)",
                 ct + ["track", url + Path(files[0]).name, "-o", str(outdir / "object_store_1.csv"), "--metrics",
                       METRICS, "-q"], {**ct_env, **store.env})]
        rows = []
        for name, cmd, env in runs:
            slug = "".join(c if c.isalnum() else "_" for c in name)[:40]
            cpu0 = store.cpu_seconds()
            m = measure(cmd, outdir / f"{slug}.log", env=env)
            m["server_cpu"] = store.cpu_seconds() - cpu0
            log(f"  {name}: rc={m['rc']} wall={m['wall']:.1f}s maxrss={m['maxrss'] / 1e9:.2f}GB "
                f"server CPU {m['server_cpu']:.1f}s")
            rows.append((name, m))
    finally:
        store.stop()
    base = rows[0][1]["wall"]
    nbytes_of = [nbytes, nbytes, nbytes / len(files)]
    same = disk_csv.exists() and s3_csv.exists() and disk_csv.read_bytes() == s3_csv.read_bytes()
    table = [(name, f"{m['wall']:.1f}" if m["rc"] == 0 else f"FAILED rc={m['rc']}",
              f"{m['wall'] / base:.2f}" if k < 2 else "", f"{n / 1e6 / m['wall']:.0f}", f"{m['maxrss'] / 1e9:.2f}",
              f"{m['tree'] / 1e9:.2f}", f"{m['server_cpu']:.1f}" if k else "")
             for k, ((name, m), n) in enumerate(zip(rows, nbytes_of))]
    return table, same


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--months", type=int, default=2)
    ap.add_argument("--res", type=float, default=1.0)
    ap.add_argument("--compress", choices=["zlib", "none", "both"], default="zlib")
    ap.add_argument("--workdir", default="/tmp/circtrack-bench")
    a = ap.parse_args(argv)
    workdir = Path(a.workdir).resolve()
    if REPO in workdir.parents or workdir == REPO:
        raise SystemExit("--workdir must be outside the repository")

    def log(msg):
        print(msg, file=sys.stderr, flush=True)

    report = []
    for comp in (["zlib", "none"] if a.compress == "both" else [a.compress]):
        files = generate(workdir, a.res, comp, a.months, log)
        nbytes = payload_bytes(files)
        ondisk = sum(f.stat().st_size for f in files)
        outdir = workdir / "runs" / f"objstore-res{a.res:g}-{comp}-{a.months}m"
        outdir.mkdir(parents=True, exist_ok=True)
        for f in files:
            f.read_bytes()
        table, same = object_store_table(files, outdir, nbytes, log)
        report += [f"## object storage vs disk, compression: {comp}", "",
                   f"{len(files)} files, {nbytes / 1e6:.0f} MB of ua+va values, {ondisk / 1e6:.0f} MB on disk; "
                   f"one run each; CSVs byte-identical: {'yes' if same else 'NO'}. Logs: {outdir}", "",
                   markdown(table, head=("approach", "wall s", "ratio to disk", "input MB/s",
                                         "peak RSS GB (largest proc)", "peak RSS GB (tree sum)",
                                         "S3 server CPU s")), ""]
    print("\n".join(report))


if __name__ == "__main__":
    main()
