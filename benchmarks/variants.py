#!/usr/bin/env python
"""What several definitions in one read cost: a plain `circtrack track` against the same run with
a 3-value `--vary`, side by side on the benchmark files of run.py (target: at most 1.3x).

    python benchmarks/variants.py [--months 2] [--res 0.5] [--compress zlib|none] [--workdir DIR] [--repeat 3]

Runs alternate (plain, vary A, vary B, plain, ...) so that load from other processes hits all
alike; the median wall time of each is reported with its ratio to the plain run. Nothing here is
a test; it only measures and prints (see benchmarks/README.md, "Variants").
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import run as harness  # noqa: E402  (benchmarks/run.py: data generation and measurement)

VARIED = [
    ("plain", []),
    ("--vary cells.level_hpa=400,500,600", ["--vary", "cells.level_hpa=400,500,600"]),
    ("--vary jets.upper_level_hpa=100,200,300 (reads two more ua levels)", ["--vary", "jets.upper_level_hpa=100,200,300"]),
]


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--months", type=int, default=2)
    ap.add_argument("--res", type=float, default=0.5)
    ap.add_argument("--compress", choices=["zlib", "none"], default="zlib")
    ap.add_argument("--workdir", default=os.path.join(tempfile.gettempdir(), "circtrack-bench"))
    ap.add_argument("--repeat", type=int, default=3)
    a = ap.parse_args(argv)
    files = harness.generate(a.workdir, a.res, a.compress, a.months, print)
    outdir = Path(a.workdir) / "runs" / "variants"
    outdir.mkdir(parents=True, exist_ok=True)
    for f in files:                      # warm page cache, as run.py does
        with open(f, "rb") as fh:
            while fh.read(1 << 24):
                pass
    walls = {name: [] for name, _ in VARIED}
    for r in range(a.repeat):
        for i, (name, extra) in enumerate(VARIED):
            cmd = harness.circtrack_cmd() + ["track", *map(str, files), "-o", str(outdir / f"v{i}.csv"),
                                             "--metrics", harness.METRICS, "-q", *extra]
            m = harness.measure(cmd, outdir / f"v{i}.{r}.log")
            if m["rc"] != 0:
                sys.exit(f"{name} failed; see {outdir / f'v{i}.{r}.log'}")
            walls[name].append(m["wall"])
    base = statistics.median(walls["plain"])
    lines = [f"{len(files)} file(s), {a.res:g} deg, {a.compress}, metrics {harness.METRICS}, {a.repeat} runs each "
             "(alternating), median wall time", "", "| run | wall s (median) | runs | ratio to plain |", "|---|---|---|---|"]
    for name, _ in VARIED:
        med = statistics.median(walls[name])
        lines.append(f"| {name} | {med:.2f} | {' '.join(f'{w:.2f}' for w in walls[name])} | {med / base:.2f} |")
    text = "\n".join(lines) + "\n"
    print(text)
    (Path(a.workdir) / "variants.md").write_text(text)


if __name__ == "__main__":
    main()
