"""Progress on stderr: a bar on a terminal, a few plain lines in logs, nothing with --quiet."""

from __future__ import annotations

import sys
import time as _time


class Progress:
    """A bar on a terminal, a few plain lines in logs, nothing with --quiet."""

    def __init__(self, quiet=False, stream=None):
        self.stream = stream or sys.stderr
        self.quiet = quiet
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self.t0 = _time.time()
        self.next_quarter = 1

    def line(self, text):
        if not self.quiet:
            print(f"circtrack: {text}", file=self.stream, flush=True)

    def step(self, done, total):
        if self.quiet:
            return
        if self.tty:
            w = 30
            k = int(w * done / max(total, 1))
            print(f"\r[{'#' * k}{'.' * (w - k)}] {done}/{total} time steps", end="", file=self.stream, flush=True)
            if done >= total:
                print(file=self.stream)
            return
        # logs (cron, batch jobs): one plain line per quarter of the record, none for short runs
        elapsed = _time.time() - self.t0
        while total and done * 4 >= self.next_quarter * total and self.next_quarter < 4:
            if elapsed >= 2.0:
                self.line(f"{done}/{total} time steps ({25 * self.next_quarter} %) after {elapsed:.0f} s")
            self.next_quarter += 1

    def done(self, rows):
        self.line(f"{rows} rows in {(_time.time() - self.t0):.1f} s")
