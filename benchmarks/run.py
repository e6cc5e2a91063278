#!/usr/bin/env python
"""Benchmark harness: circtrack vs plain netCDF4/numpy, xarray.open_mfdataset and (optionally) cdo.

    python benchmarks/run.py [--months N] [--res 0.5] [--compress zlib|none|both] [--sets uv|full|both]
                             [--workdir DIR] [--repeat K] [--scaling] [--many-files N] [--before DIR]
                             [--quick] [--profile]

See benchmarks/README.md.  Nothing here is a test; it only measures and prints.
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import textwrap
import threading
import time
from datetime import timedelta
from pathlib import Path

PLEV = [1000.0, 925.0, 850.0, 700.0, 500.0, 300.0, 200.0, 100.0]
METRICS = "hadley_edge_lat,hadley_strength,subtropical_jet_lat,eddy_jet_lat"
NOISE_STD = 0.1          # m/s, so zlib has real work to do
SEED = 20010101
TIME_CHUNK = 8
WITH_CDO = True          # --no-cdo turns the (slow) cdo row off

# ----------------------------------------------------------------------------- data generation


def grid(res):
    import numpy as np
    nlat = int(round(180.0 / res)) + 1
    nlon = int(round(360.0 / res))
    return np.linspace(-90.0, 90.0, nlat), np.arange(nlon) * res


def month_starts(n):
    import cftime
    out = []
    y, m = 2001, 1
    for _ in range(n + 1):
        out.append(cftime.datetime(y, m, 1, calendar="standard"))
        y, m = (y + 1, 1) if m == 12 else (y, m + 1)
    return out


def data_dir(workdir, res, comp, full=False):
    return Path(workdir) / f"res{res:g}" / (f"{comp}-full" if full else comp)


FULL_VARS = ("ua", "va", "ta", "zg", "hus", "ps")


def add_full_set(ds, rng):
    """ta, zg, hus (on the levels) and ps besides ua and va: every family has its inputs.

    Invented smooth fields: temperature falling with height to an isothermal layer above about
    200 hPa (so a tropopause is found), geopotential height from the hypsometric equation with a
    mean temperature, humidity decaying upwards; small noise so compression has work to do."""
    import numpy as np
    lat = np.deg2rad(ds["lat"].values)
    p = ds["plev"].values
    shape = ds["ua"].shape                                   # (T, L, J, I)
    ts = 300.0 - 45.0 * np.sin(lat) ** 2                     # (J,)
    ta = np.maximum(ts[None, :] * (p[:, None] / 1000.0) ** 0.19, 212.0)          # (L, J)
    zg = (287.0 * 255.0 / 9.81 * np.log(1013.0 / p))[:, None] * np.ones_like(ts)[None, :]   # (L, J)
    hus = 0.018 * np.cos(lat)[None, :] ** 2 * (p[:, None] / 1000.0) ** 3         # (L, J)
    dims = ds["ua"].dims
    for name, base, unit, std, sn in (("ta", ta, "K", 0.2, "air_temperature"),
                                      ("zg", zg, "m", 2.0, "geopotential_height"),
                                      ("hus", hus, "1", 1e-5, "specific_humidity")):
        arr = np.broadcast_to(base[None, :, :, None], shape).astype(np.float32)
        noise = rng.standard_normal(shape, dtype=np.float32)
        noise *= np.float32(std)
        arr = arr + noise
        if name == "hus":
            np.maximum(arr, 0.0, out=arr)
        ds[name] = (dims, arr, {"standard_name": sn, "units": unit})
    ps = 101300.0 + 50.0 * rng.standard_normal((shape[0],) + shape[2:], dtype=np.float32)
    ds["ps"] = (("time", "lat", "lon"), ps.astype(np.float32), {"standard_name": "surface_air_pressure", "units": "Pa"})
    return ds


def generate(workdir, res, comp, months, log, full=False):
    """One file per month holding ua and va (float32, daily), or the full set (``full``: ua, va, ta,
    zg, hus, ps).  Cached: existing files are kept."""
    import numpy as np
    from circtrack import synthetic

    d = data_dir(workdir, res, comp, full)
    d.mkdir(parents=True, exist_ok=True)
    lat, lon = grid(res)
    starts = month_starts(months)
    files = []
    for i in range(months):
        t0, t1 = starts[i], starts[i + 1]
        path = d / f"{'full' if full else 'uv'}_day_{t0.year:04d}{t0.month:02d}.nc"
        files.append(path)
        if path.exists():
            continue
        t_start = time.perf_counter()
        ndays = (t1 - t0).days
        times = [t0 + timedelta(days=k) for k in range(ndays)]
        ds = synthetic.dataset(lat, lon, PLEV, times)
        rng = np.random.default_rng(SEED + i)
        for v in ("ua", "va"):
            noise = rng.standard_normal(ds[v].shape, dtype=np.float32)
            noise *= np.float32(NOISE_STD)
            ds[v].values += noise
            del noise
        if full:
            ds = add_full_set(ds, rng)
        enc = dict(synthetic.time_encoding())
        for v in [v for v in FULL_VARS if v in ds]:
            chunks = (min(TIME_CHUNK, ndays), 1, lat.size, lon.size)
            e = {"dtype": "float32", "chunksizes": chunks if ds[v].ndim == 4 else (chunks[0],) + chunks[2:]}
            if comp == "zlib":
                e.update(zlib=True, complevel=1, shuffle=True)
            else:
                e.update(zlib=False, contiguous=False)
            enc[v] = e
        tmp = path.with_suffix(".nc.part")
        ds.to_netcdf(tmp, engine="netcdf4", format="NETCDF4", encoding=enc)
        os.replace(tmp, path)
        log(f"  generated {path} ({path.stat().st_size / 1e6:.0f} MB, {time.perf_counter() - t_start:.0f} s)")
    return files


def generate_many(workdir, n, res, log, comp="none"):
    """``n`` small files of one day each: the many-small-files case."""
    import numpy as np
    from circtrack import synthetic

    d = Path(workdir) / (f"many{n}-res{res:g}" + ("" if comp == "none" else f"-{comp}"))
    d.mkdir(parents=True, exist_ok=True)
    lat, lon = grid(res)
    t0 = month_starts(1)[0]
    files = [d / f"uv_{k:05d}.nc" for k in range(n)]
    missing = [k for k, f in enumerate(files) if not f.exists()]
    if missing:
        t_start = time.perf_counter()
        base = synthetic.dataset(lat, lon, PLEV, [t0])
        rng = np.random.default_rng(SEED)
        for k in missing:
            ds = base.copy(deep=True).assign_coords(time=[t0 + timedelta(days=k)])
            for v in ("ua", "va"):
                ds[v].values += rng.standard_normal(ds[v].shape).astype(np.float32) * np.float32(NOISE_STD)
            tmp = files[k].with_suffix(".nc.part")
            enc = dict(synthetic.time_encoding())
            if comp == "zlib":
                enc.update({v: {"zlib": True, "complevel": 1, "shuffle": True} for v in ("ua", "va")})
            ds.to_netcdf(tmp, engine="netcdf4", format="NETCDF4", encoding=enc)
            os.replace(tmp, files[k])
        log(f"  generated {len(missing)} files in {d} ({time.perf_counter() - t_start:.0f} s)")
    return files


def payload_bytes(files):
    """Uncompressed bytes of the data variables in the files (what every approach has to decode)."""
    import netCDF4
    total = 0
    for f in files:
        with netCDF4.Dataset(f) as nc:
            for v in [v for v in FULL_VARS if v in nc.variables]:
                var = nc.variables[v]
                n = 1
                for s in var.shape:
                    n *= s
                total += n * var.dtype.itemsize
    return total


# ----------------------------------------------------------------------------- approaches

BASELINE_A = textwrap.dedent('''
    import sys, numpy as np, netCDF4
    out = {}
    for f in sys.argv[1:]:
        with netCDF4.Dataset(f) as nc:
            for name in [v for v in ("ua", "va", "ta", "zg", "hus", "ps") if v in nc.variables]:
                var = nc.variables[name]
                var.set_auto_mask(False)
                var.set_var_chunk_cache(size=1 << 20, nelems=521, preemption=0.75)
                tc = (var.chunking() or [8])[0] if var.chunking() != "contiguous" else 8
                nt = var.shape[0]
                for t0 in range(0, nt, tc):
                    block = var[t0:t0 + tc]
                    out.setdefault(name, []).append(block.mean(axis=-1, dtype=np.float64))
    res = {k: np.concatenate(v) for k, v in out.items()}
    print({k: v.shape for k, v in res.items()})
''')

BASELINE_B = textwrap.dedent('''
    import sys, xarray as xr
    ds = xr.open_mfdataset(sys.argv[1:], engine="netcdf4", combine="by_coords")
    zm = ds[[v for v in ("ua", "va", "ta", "zg", "hus", "ps") if v in ds]].mean("lon").compute()
    print(dict(zm.sizes))
''')


REPO = Path(__file__).resolve().parents[1]
BEFORE = None            # --before DIR: a checkout of circtrack timed side by side with this one
QUICK = False            # --quick: leave out baseline B and the dask.distributed rows
PYCACHE = None           # WORKDIR/pycache: compiled bytecode of the circtrack runs (see circtrack_cmd)


def circtrack_cmd(code=None):
    """``python -m circtrack.cli`` with the circtrack of ``code`` (default: this checkout) first on
    the path, as an environment for :func:`measure`.

    Bytecode is written to and read from ``WORKDIR/pycache`` (never the checkout), also where the
    environment says not to write any (PYTHONDONTWRITEBYTECODE): an installed circtrack runs from
    compiled bytecode, while compiling the package's sources on every run cost about 0.4 s."""
    env = {"PYTHONPATH": str(code or REPO)}
    if PYCACHE is not None:
        env.update(PYTHONPYCACHEPREFIX=str(PYCACHE), PYTHONDONTWRITEBYTECODE="")
    return [sys.executable, "-m", "circtrack.cli"], env


def warm_up(files, outdir):
    """One untimed ``circtrack track`` on two files per checkout: fills the bytecode cache."""
    for code in [None] + ([BEFORE] if BEFORE else []):
        ct, env = circtrack_cmd(code)
        subprocess.run(ct + ["track", *map(str, files[:2]), "-o", str(outdir / "warm_up.csv"), "-q"],
                       capture_output=True, env={**os.environ, **env}, cwd=str(outdir))


def approaches(files, outdir):
    """(name, command, extra environment) per approach; the circtrack rows run the default metric
    set (what ``track`` does without --metrics), the 4-metric subset is an extra row."""
    files = [str(f) for f in files]
    py = sys.executable
    ct, env = circtrack_cmd()
    out = []
    out.append(("baseline A: netCDF4 + numpy, file by file", [py, "-c", BASELINE_A, *files], {}))
    if not QUICK:
        out.append(("baseline B: xarray open_mfdataset + mean", [py, "-c", BASELINE_B, *files], {}))
    out.append(("circtrack track, default metrics (worker processes)",
                ct + ["track", *files, "-o", str(outdir / "track_default.csv"), "-q"], env))
    one = Path(outdir) / "one_process.toml"
    one.write_text("[run]\nprocesses = 1\n")
    out.append(("circtrack track, default metrics, 1 worker process",
                ct + ["track", *files, "-o", str(outdir / "track_p1.csv"), "-q", "-c", str(one)], env))
    if not QUICK:
        out.append(("circtrack track --metrics (4 metrics)",
                    ct + ["track", *files, "-o", str(outdir / "track_4.csv"), "--metrics", METRICS, "-q"], env))
    if BEFORE:
        bct, benv = circtrack_cmd(BEFORE)
        out.append((f"before ({BEFORE}): default metrics (worker processes)",
                    bct + ["track", *files, "-o", str(outdir / "before_default.csv"), "-q"], benv))
        out.append((f"before ({BEFORE}): default metrics, 1 worker process",
                    bct + ["track", *files, "-o", str(outdir / "before_p1.csv"), "-q", "-c", str(one)], benv))
    if not QUICK:
        out.append(("circtrack track --workers 1",
                    ct + ["track", *files, "-o", str(outdir / "track_w1.csv"), "-q", "--workers", "1"], env))
        out.append(("circtrack track --workers 2",
                    ct + ["track", *files, "-o", str(outdir / "track_w2.csv"), "-q", "--workers", "2"], env))
    cdo = shutil.which("cdo") if WITH_CDO else None
    if cdo:
        script = "set -e\n" + "\n".join(
            f'{cdo} -s zonmean "{f}" "{outdir}/cdo_zm_{i}.nc"' for i, f in enumerate(files))
        out.append(("cdo zonmean per file", ["bash", "-c", script], {}))
    return out


def scaling_months(months):
    """Record lengths of ``--scaling``: 1 month (one batch, not full: 31 time steps), half of
    ``months`` and ``months`` (both of full batches of 128 steps when ``months`` is 10 or more)."""
    return sorted({1, max(1, months // 2), months})


def scaling_table(files, outdir, months, title, log):
    """``--scaling``: peak RSS of the default run on 1, months/2 and ``months`` months, and two ratios
    of the tree's peaks: months/1 (batch fill and record length together) and months/(months/2)
    (record length alone: flat memory means about 1.00)."""
    rows = []
    ct, env = circtrack_cmd()
    for n in scaling_months(months):
        m = measure(ct + ["track", *map(str, files[:n]), "-o", str(outdir / f"scaling_{n}.csv"), "-q"],
                    outdir / f"scaling_{n}.log", env)
        log(f"  scaling {n} month(s): rc={m['rc']} wall={m['wall']:.1f}s tree={m['tree'] / 1e9:.2f}GB")
        rows.append((n, m))
    r1 = rows[0][1]["tree"] or 1
    half = rows[-2][1]["tree"] if len(rows) > 2 else None
    lines = [f"### memory vs record length ({title}, default metrics, worker processes)", "",
             markdown([(str(n), f"{m['wall']:.1f}" if m["rc"] == 0 else f"FAILED rc={m['rc']}",
                        f"{m['maxrss'] / 1e9:.2f}", f"{m['tree'] / 1e9:.2f}", f"{m['tree'] / r1:.2f}")
                       for n, m in rows],
                      head=("months", "wall s", "peak RSS GB (largest proc)", "peak RSS GB (tree sum)",
                            "tree ratio to 1 month")), ""]
    last = rows[-1]
    lines.append(f"Tree ratio {last[0]} months / 1 month (batch fill and record length): {last[1]['tree'] / r1:.2f}"
                 + (f"; {last[0]} months / {rows[-2][0]} months (record length alone): "
                    f"{last[1]['tree'] / (half or 1):.2f}" if half else "") + ".")
    return lines + [""]


def profile_table(files, outdir):
    """``circtrack track --profile`` once: where the time of the default run goes (stderr table)."""
    ct, env = circtrack_cmd()
    proc = subprocess.run(ct + ["track", *map(str, files), "-o", str(outdir / "profile.csv"), "-q", "--profile"],
                          capture_output=True, text=True, env={**os.environ, **env}, cwd=str(outdir))
    return proc.stderr.strip()


def measure(cmd, log_path, env=None):
    """Wall time, max RSS of the largest single process (wait4 / time -v) and sampled peak of the
    summed RSS of the whole process tree (matters for --workers, where workers are separate processes)."""
    import psutil

    use_time = os.path.exists("/usr/bin/time")
    full = (["/usr/bin/time", "-v"] + cmd) if use_time else cmd
    peak_tree = 0
    stop = threading.Event()

    with open(log_path, "w") as log:
        t0 = time.perf_counter()
        # cwd: the runs directory, never a checkout (``python -m`` puts the cwd first on sys.path,
        # before PYTHONPATH, which would run that checkout's circtrack in every row)
        proc = subprocess.Popen(full, stdout=log, stderr=subprocess.PIPE, text=True, env={**os.environ, **(env or {})},
                                cwd=str(Path(log_path).parent))

        def sample():
            nonlocal peak_tree
            try:
                root = psutil.Process(proc.pid)
            except psutil.Error:
                return
            while not stop.is_set():
                total = 0
                try:
                    procs = [root] + root.children(recursive=True)
                except psutil.Error:
                    break
                for p in procs:
                    if use_time and p.pid == proc.pid:
                        continue            # /usr/bin/time itself
                    try:
                        total += p.memory_info().rss
                    except psutil.Error:
                        pass
                peak_tree = max(peak_tree, total)
                stop.wait(0.05)

        th = threading.Thread(target=sample, daemon=True)
        th.start()
        _, err = proc.communicate()
        wall = time.perf_counter() - t0
        stop.set()
        th.join()
        log.write("\n--- stderr ---\n" + err)

    maxrss = None
    cpu = 0.0
    if use_time:
        for line in err.splitlines():
            if "Maximum resident set size" in line:
                maxrss = int(line.rsplit(":", 1)[1]) * 1024
            if "User time (seconds)" in line or "System time (seconds)" in line:
                cpu += float(line.rsplit(":", 1)[1])
    if maxrss is None:
        import resource
        maxrss = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024  # upper bound
    # cpu: user + system seconds of the process and the children it waited for (worker processes)
    return dict(rc=proc.returncode, wall=wall, maxrss=maxrss, tree=peak_tree, cpu=cpu)


def run_config(files, outdir, nbytes, repeat, log):
    """Every approach ``repeat`` times, alternating (round after round), so that load from other
    processes on the machine falls on all of them alike; the median wall time is reported, with
    the largest RSS seen."""
    import statistics

    plan = approaches(files, outdir)
    warm_up(files, outdir)
    runs = {name: [] for name, _, _ in plan}
    for r in range(repeat):
        for name, cmd, env in plan:
            if runs[name] and runs[name][-1]["rc"] != 0:
                continue
            slug = "".join(c if c.isalnum() else "_" for c in name)[:40]
            m = measure(cmd, outdir / f"{slug}.{r}.log", env)
            log(f"  [{r + 1}/{repeat}] {name}: rc={m['rc']} wall={m['wall']:.1f}s maxrss={m['maxrss'] / 1e9:.2f}GB "
                f"tree={m['tree'] / 1e9:.2f}GB load={os.getloadavg()[0]:.1f}")
            runs[name].append(m)
    rows = []
    for name, ms in runs.items():
        if ms[-1]["rc"] != 0:
            rows.append((name, ms[-1]))
            continue
        rows.append((name, {"rc": 0, "wall": statistics.median(m["wall"] for m in ms),
                            "cpu": statistics.median(m["cpu"] for m in ms),
                            "maxrss": max(m["maxrss"] for m in ms), "tree": max(m["tree"] for m in ms)}))
    ok0 = rows and rows[0][1]["rc"] == 0
    base = rows[0][1]["wall"] if ok0 else None
    base_cpu = rows[0][1]["cpu"] if ok0 else None
    table = []
    for name, m in rows:
        if m["rc"] != 0:
            table.append((name, f"FAILED rc={m['rc']}", "", "", "", "", "", ""))
            continue
        ratio = f"{m['wall'] / base:.2f}" if base else ""
        cratio = f"{m['cpu'] / base_cpu:.2f}" if base_cpu else ""
        table.append((name, f"{m['wall']:.1f}", ratio, f"{m['cpu']:.1f}", cratio, f"{nbytes / 1e6 / m['wall']:.0f}",
                      f"{m['maxrss'] / 1e9:.2f}", f"{m['tree'] / 1e9:.2f}"))
    return table


HEAD = ("approach", "wall s", "ratio to A", "CPU s", "CPU ratio to A", "input MB/s", "peak RSS GB (largest proc)",
        "peak RSS GB (tree sum)")


def markdown(table, head=HEAD):
    lines = ["| " + " | ".join(head) + " |", "|" + "|".join("---" for _ in head) + "|"]
    lines += ["| " + " | ".join(r) + " |" for r in table]
    return "\n".join(lines)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[1])
    ap.add_argument("--months", type=int, default=2)
    ap.add_argument("--res", type=float, default=0.5)
    ap.add_argument("--compress", choices=["zlib", "none", "both"], default="both")
    ap.add_argument("--workdir", default=os.path.join(tempfile.gettempdir(), "circtrack-bench"))
    ap.add_argument("--repeat", type=int, default=1,
                    help="rounds of runs, alternating between approaches; the median is reported")
    ap.add_argument("--sets", choices=["uv", "full", "both"], default="both",
                    help="u+v files, the full set (ua, va, ta, zg, hus, ps: every family), or both")
    ap.add_argument("--scaling", action="store_true",
                    help="also compare circtrack peak RSS for 1 month, --months/2 and --months months")
    ap.add_argument("--many-files", type=int, default=0, metavar="N",
                    help="also time N small one-day files (--many-res grid, --many-compress)")
    ap.add_argument("--many-res", type=float, default=2.0)
    ap.add_argument("--many-compress", choices=["zlib", "none"], default="zlib")
    ap.add_argument("--skip-large", action="store_true", help="only the --many-files case")
    ap.add_argument("--no-cdo", action="store_true", help="leave out cdo zonmean even when cdo is installed")
    ap.add_argument("--quick", action="store_true",
                    help="leave out baseline B, the 4-metric row and the --workers rows")
    ap.add_argument("--before", metavar="DIR", default=None,
                    help="another circtrack checkout (e.g. main) timed side by side with this one")
    ap.add_argument("--profile", action="store_true",
                    help="also print where the default run's time goes (circtrack track --profile) per table")
    a = ap.parse_args(argv)
    global WITH_CDO, QUICK, BEFORE, PYCACHE
    WITH_CDO = not a.no_cdo
    QUICK = a.quick
    BEFORE = str(Path(a.before).resolve()) if a.before else None

    workdir = Path(a.workdir).resolve()
    PYCACHE = workdir / "pycache"
    if REPO in workdir.parents or workdir == REPO:
        ap.error("--workdir must be outside the repository")
    workdir.mkdir(parents=True, exist_ok=True)

    def log(msg):
        print(msg, file=sys.stderr, flush=True)

    comps = ["zlib", "none"] if a.compress == "both" else [a.compress]
    sets = {"uv": [False], "full": [True], "both": [False, True]}[a.sets]
    if a.skip_large:
        comps = []
    import platform
    import numpy, xarray, dask, netCDF4
    report = [f"# circtrack benchmark",
              "",
              f"{time.strftime('%Y-%m-%d %H:%M:%S')}, host {platform.node()}, {os.cpu_count()} CPUs, "
              f"python {platform.python_version()}, numpy {numpy.__version__}, xarray {xarray.__version__}, "
              f"dask {dask.__version__}, netCDF4 {netCDF4.__version__}, cdo: {shutil.which('cdo') or 'not found'}",
              "",
              f"months={a.months}, res={a.res:g} deg, levels={len(PLEV)}, daily, float32, "
              f"chunks=({TIME_CHUNK}, 1, lat, lon), repeat={a.repeat} (alternating rounds, median), warm page cache"
              + (f", before = {BEFORE}" if BEFORE else "") + ".",
              ""]

    def one_table(title, files, outdir, nbytes, extra=""):
        load0 = os.getloadavg()
        table = run_config(files, outdir, nbytes, a.repeat, log)
        load1 = os.getloadavg()
        lines = [title, "", f"{extra}Logs: {outdir}. Load average (1 min) before/after: {load0[0]:.1f} / {load1[0]:.1f}.",
                 "", markdown(table), ""]
        if a.profile:
            lines += ["Where the time goes (`circtrack track --profile`, one run):", "", "```",
                      profile_table(files, outdir), "```", ""]
        return lines

    for full in sets:
        for comp in comps:
            what = "full set (ua, va, ta, zg, hus, ps)" if full else "ua + va"
            log(f"[{comp}, {what}] data in {data_dir(workdir, a.res, comp, full)}")
            files = generate(workdir, a.res, comp, a.months, log, full=full)
            nbytes = payload_bytes(files)
            ondisk = sum(f.stat().st_size for f in files)
            outdir = workdir / "runs" / f"res{a.res:g}-{comp}{'-full' if full else ''}-{a.months}m"
            outdir.mkdir(parents=True, exist_ok=True)
            for f in files:           # warm the page cache so every approach sees the same state
                with open(f, "rb") as fh:
                    while fh.read(1 << 24):
                        pass
            report += one_table(f"## {what}, compression: {comp}", files, outdir, nbytes,
                                f"{len(files)} files, {nbytes / 1e6:.0f} MB of values, {ondisk / 1e6:.0f} MB on disk "
                                f"(ratio {nbytes / ondisk:.2f}). ")
            if a.scaling:
                report += scaling_table(files, outdir, a.months, f"{what}, {comp}", log)

    if a.many_files:
        log(f"[many] {a.many_files} one-day files at {a.many_res:g} deg, {a.many_compress}")
        files = generate_many(workdir, a.many_files, a.many_res, log, comp=a.many_compress)
        nbytes = payload_bytes(files)
        outdir = workdir / "runs" / f"many{a.many_files}-res{a.many_res:g}-{a.many_compress}"
        outdir.mkdir(parents=True, exist_ok=True)
        for f in files:
            f.read_bytes()
        report += one_table(f"## many small files: {len(files)} one-day files, {a.many_res:g} deg, "
                            f"{a.many_compress}", files, outdir, nbytes, f"{nbytes / 1e6:.0f} MB of ua+va values. ")

    text = "\n".join(report)
    (workdir / "results.md").write_text(text + "\n")
    print(text)
    log(f"written {workdir / 'results.md'}")


if __name__ == "__main__":
    main()
