"""Gather (parent side): the run's tasks -> reduced batches of time steps, in chronological order.

In: a :class:`~circtrack.engine.plan.RunPlan` and a :class:`~circtrack.engine.pool.Runner`. Out,
batch by batch: ``{"stats": {role: (bt, *extra, [L], J, S, 2)}, "extras": {name: (bt, ..., S)},
"notes": (bt,) str}`` for the batch's time steps in chronological order. Small chunks are grouped
into one task (:func:`group_chunks`); chunk results are cached until the last batch needing them;
the next batch is read in a background thread while the families run on this one; a repeated
time step is compared with its kept twin on the reduced values (identical: dropped; different:
refused unless ``run.repeated_times`` chooses).
"""

from __future__ import annotations

import collections
import functools
import threading

import numpy as np

from circtrack.engine import profile
from circtrack.engine.reduce import close_thread_cached, reduce_chunks
from circtrack.engine.times import iso_time
from circtrack.errors import InputError


def group_chunks(need, sizes, target, min_groups):
    """Consecutive chunks grouped to about ``target`` time steps per task, but into at least
    ``min_groups`` tasks when there are that many chunks (so every worker has work)."""
    total = sum(sizes[c] for c in need)
    per = max(1, min(target, -(-total // max(1, min_groups))))
    groups, cur, n = [], [], 0
    for c in need:
        cur.append(c)
        n += sizes[c]
        if n >= per:
            groups.append(cur)
            cur, n = [], 0
    if cur:
        groups.append(cur)
    return groups


def gather_rows(cache, kind, name, positions, *, chunk_of, chunks, starts):
    """Rows of the cached chunk results at global ``positions``, in that order (runs are sliced)."""
    parts = []
    i = 0
    while i < len(positions):
        c = int(chunk_of[positions[i]])
        k, a, _ = chunks[c]
        lo = positions[i] - starts[k] - a
        j = i
        while (j + 1 < len(positions) and chunk_of[positions[j + 1]] == c
               and positions[j + 1] == positions[j] + 1):
            j += 1
        parts.append(cache[c][kind][name][lo:lo + (j - i + 1)])
        i = j + 1
    return np.concatenate(parts, axis=0)


def schedule(rp):
    """Batch of every position (-1: not computed, only_times) and the last batch using each chunk."""
    batch_of_pos = np.full(rp.times_all.size, -1, dtype=int)
    for bi, (b0, b1) in enumerate(rp.batches):
        batch_of_pos[rp.keep[b0:b1]] = bi
    for d, p in zip(rp.dropped, rp.partner):
        batch_of_pos[d] = batch_of_pos[p]
    last_use = collections.defaultdict(int)
    for pos in range(rp.times_all.size):
        c = rp.chunk_of[pos]
        last_use[c] = max(last_use[c], batch_of_pos[pos])
    return batch_of_pos, last_use


class BatchReader:
    """Reads and reduces the batches of one run through ``runner``, caching chunk results."""

    def __init__(self, rp, runner):
        self.rp, self.runner = rp, runner
        self.cache = {}
        self.batch_of_pos, self.last_use = schedule(rp)
        self.pending = None        # (batch index, thread, box) being read while the families run
        self.sent = {}             # batch index -> chunks sent for it and their Sent handle
        self.inflight = {}         # chunk -> (chunks, Sent) while its task is with the workers
        self._rows = functools.partial(gather_rows, self.cache, chunk_of=rp.chunk_of, chunks=rp.chunks,
                                       starts=rp.starts)

    def _repeats(self, bi):
        rp = self.rp
        return [(d, p) for d, p in zip(rp.dropped, rp.partner) if self.batch_of_pos[d] == bi]

    def submit(self, bi):
        """Send the tasks of batch ``bi`` that are neither cached nor already with the workers (with
        worker processes they start at once; see :meth:`Runner.submit`)."""
        if bi in self.sent:
            return
        rp = self.rp
        t0, t1 = rp.batches[bi]
        wanted = list(rp.keep[t0:t1]) + [d for d, _ in self._repeats(bi)]
        need = sorted({int(rp.chunk_of[q]) for q in wanted} - set(self.cache) - set(self.inflight))
        sizes = {c: rp.chunks[c][2] - rp.chunks[c][1] for c in need}
        groups = group_chunks(need, sizes, int(rp.cfg["run"]["time_chunk"]), 2 * self.runner.nproc)
        sent = self.runner.submit(reduce_chunks, [[rp.job(c) for c in g] for g in groups])
        self.sent[bi] = (need, sent)
        for c in need:
            self.inflight[c] = (need, sent)

    def _collect(self, bi):
        """Wait for every chunk batch ``bi`` needs that is still with the workers, into the cache."""
        rp = self.rp
        t0, t1 = rp.batches[bi]
        wanted = list(rp.keep[t0:t1]) + [d for d, _ in self._repeats(bi)]
        handles = {id(h[1]): h for c in {int(rp.chunk_of[q]) for q in wanted} if (h := self.inflight.get(c))}
        for need, sent in handles.values():
            try:
                results = [r for rs in sent.results() for r in rs]
            except (OSError, RuntimeError, ValueError, KeyError, IndexError) as e:
                involved = sorted({rp.infos[rp.chunks[c][0]].path for c in need})
                msg = str(e).splitlines()[0] if str(e) else type(e).__name__
                raise InputError(f"{involved[0]}: reading data failed ({msg}) for time steps "
                                 f"{iso_time(rp.times[t0])}..{iso_time(rp.times[t1 - 1])} in {', '.join(involved)}; "
                                 "one of these files is damaged: re-copy it or leave it out")
            for r in results:
                profile.add_task_timing(r.pop("timing", None))
            self.cache.update(zip(need, results))
            for c in need:
                self.inflight.pop(c, None)

    def reduce(self, bi):
        """Reduced stats/extras of batch ``bi`` in chronological order (reads what is not cached)."""
        rp, cache = self.rp, self.cache
        t0, t1 = rp.batches[bi]
        positions = rp.keep[t0:t1]
        mine = self._repeats(bi)
        self.submit(bi)
        self._collect(bi)
        self.sent.pop(bi, None)
        for d, p in mine:
            if rp.provisional[d] and not rp.provisional[p]:
                continue                   # provisional data replaced by final data: expected to differ
            self.compare_repeat(d, p)
        g = self._rows
        out = {"stats": {r: g("stats", r, positions) for r in rp.plan.roles},
               "extras": {n: g("extras", n, positions) for n in rp.plan.reducers},
               "notes": g("notes", "time", positions)}
        for c in [c for c in cache if self.last_use[c] <= bi]:
            del cache[c]
        return out

    def compare_repeat(self, d, p):
        """A time step in two files: identical -> drop one; different -> refuse unless a policy says."""
        rp, g = self.rp, self._rows
        same = all(np.array_equal(g("stats", r, [p]), g("stats", r, [d]), equal_nan=True) for r in rp.plan.roles)
        if not same and rp.repeat_policy == "refuse":
            fa = rp.infos[rp.file_of[p]].path
            fb = rp.infos[rp.file_of[d]].path
            if rp.file_of[p] == rp.file_of[d]:
                raise InputError(f"{fb}: time step {iso_time(rp.times_all[d])} appears twice in this file with "
                                 "different values; fix the file (e.g. drop the repeated step with ncks -d), or choose "
                                 "which wins with --repeated-times keep-first|keep-last")
            raise InputError(f"{fb}: time step {iso_time(rp.times_all[d])} is also in {fa} with different values; "
                             "leave one file out, or choose which wins with --repeated-times keep-first|keep-last")

    def in_order(self, ahead=1):
        """Yield ``(bi, reduced)`` per batch; ``reduced`` holds batches ``bi .. bi + ahead - 1`` (a
        low-pass filter needs the next batch as its halo; the previous one is kept for it too)."""
        nb = len(self.rp.batches)
        reduced = {}
        for bi in range(nb):
            if self.runner.streams:
                # worker processes: the next batch's tasks are sent before this one is gathered, so
                # the workers never wait for the families, nor for the slowest task of a batch
                for bj in range(bi, min(nb, bi + ahead + 1)):
                    self.submit(bj)
            for bj in range(bi, min(nb, bi + ahead)):
                if self.pending is not None and self.pending[0] == bj:
                    reduced[bj] = self._take_pending()
                if bj not in reduced:
                    reduced[bj] = self.reduce(bj)
            # elsewhere: read the next batch in a background thread while the families run
            nxt = bi + ahead
            if not self.runner.streams and nxt < nb and self.pending is None and nxt not in reduced:
                self._prefetch(nxt)
            yield bi, reduced
            reduced.pop(bi - 1 if ahead > 1 else bi, None)

    def _prefetch(self, b):
        box = {}

        def prefetch():
            try:
                box["result"] = self.reduce(b)
            except BaseException as e:  # noqa: BLE001 - re-raised in the main thread
                box["error"] = e
            finally:
                # handles are per thread and this one ends: files it opened (tasks run in this
                # process with the sync/threads schedulers) would stay open until the run ends
                close_thread_cached()

        th = threading.Thread(target=prefetch, daemon=True)
        th.start()
        self.pending = (b, th, box)

    def _take_pending(self):
        _, th, box = self.pending
        th.join()
        self.pending = None
        if "error" in box:
            raise box["error"]
        return box["result"]

    def join(self, timeout=None):
        """Wait for a background read still running (after an error: at most ``timeout`` s)."""
        if self.pending is not None:
            self.pending[1].join(timeout=timeout)
