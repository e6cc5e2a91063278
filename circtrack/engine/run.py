"""Run: the stages of one ``circtrack track`` tied together; the only place that starts a worker pool.

    PATH...  --locate-->  files  --prepare (open and detect)-->  FileInfo per file
             --plan-->    RunPlan (inputs joined, time axis and repeats, tasks, batches)
             --gather/pool/reduce-->  reduced batches  --features-->  columns  --rows-->  Outcome

:func:`track` runs the members of an ensemble given as one file per member one after another
and merges their rows (``member`` key column). :class:`Run` is one run: constructing it plans
(reads no data); :meth:`Run.execute` computes; :meth:`Run.zonal_batches` streams the reduced fields
batch by batch (`circtrack zonal-means`) and :meth:`Run.zonal_means` gathers them for a few time steps.
"""

from __future__ import annotations

import numpy as np

from circtrack import variants as V
from circtrack.engine import layouts as LY
from circtrack.engine import plan as P
from circtrack.engine import profile
from circtrack.engine.features import Detector
from circtrack.engine.gather import BatchReader
from circtrack.engine.longitudes import LongitudeTable, add_to_plan
from circtrack.engine.locate import locate
from circtrack.engine.pool import Runner, close_early, start_early
from circtrack.engine.prepare import available_metrics
from circtrack.engine.progress import Progress
from circtrack.engine.reduce import close_cached
from circtrack.engine.rows import merge_members, outcome
from circtrack.engine.sectors import masks_per_input, merge_sectors
from circtrack.errors import UsageError

STAGES = profile.STAGES


def track(paths, cfg, *, metric_ids=None, label=None, sectors=(), overrides=None,
          progress=None, on_bad_file=None, stdin=None, only_times=None, time_step_days=None,
          cores_by_longitude=False):
    """Run the chosen metrics over all inputs; returns an :class:`Outcome` of tidy rows.

    ``only_times`` (ISO strings) and ``time_step_days`` are for ``circtrack update``: see :class:`Run`.
    Files of several ensemble members (one member per file, told apart by a global attribute such
    as ``variant_label``) are run member by member and get a ``member`` key column; otherwise the
    same time step in two members' files would be a conflicting repeat.
    ``cores_by_longitude``: also the jet cores at every longitude, as ``outcome.tables["cores_by_longitude"]``.
    """
    kw = dict(metric_ids=metric_ids, label=label, sectors=sectors, overrides=overrides, progress=progress,
              on_bad_file=on_bad_file, only_times=only_times, time_step_days=time_step_days,
              cores_by_longitude=cores_by_longitude)
    try:
        # plans: coordinates and attributes only (the worker processes are forked first: start_early)
        run = Run(paths, cfg, stdin=stdin, early_workers=True, **kw)
        groups = P.member_groups(run.infos)
        if not groups:
            out = run.execute()
        else:
            labels = sorted(groups)
            outs = [Run(groups[m], cfg, early_workers=True, **kw).execute() for m in labels]
            out = merge_members(labels, outs, run.skipped)
            for name in outs[0].tables:
                out.tables[name] = merge_members(labels, [o.tables[name] for o in outs])
    finally:
        close_early()        # workers forked early that no task needed
    if run.left_out:
        out.provenance["metrics_left_out"] = run.left_out
    return out


def check_label(label):
    """``--label``: refused when it would break the CSV's ``source`` column (guards.check_label)."""
    from circtrack import guards as G

    if label is not None:
        G.check_label(label, f"--label '{label}'", f"use e.g. --label '{G.clean_label(label)}'")
    return label


HEADERS_IN_WORKERS = 32     # from this many files on, worker processes read the netCDF-4 headers


def read_headers(files, cfg):
    """Start reading the netCDF-4 headers of many files (layouts.py) in a short-lived pool of worker
    processes, in parallel and while this process goes on (e.g. detects the first file); a header
    read is mostly netCDF-C's file open, about 2 ms, the same here and in a worker. Returns a
    :class:`Headers` whose ``wait()`` gives ``{path: header}``, or None for fewer files, other
    engines, other schedulers or a cluster (the parent then reads them one by one)."""
    if len(files) < HEADERS_IN_WORKERS or cfg["run"]["netcdf_engine"] != "netcdf4":
        return Headers(None, None, None)
    runner = Runner(cfg, len(files))
    if runner.mode != "processes" or runner.client is not None:
        return Headers(None, None, None)
    n = max(1, min(len(files), 4 * runner.nproc))
    groups = [files[i * len(files) // n:(i + 1) * len(files) // n] for i in range(n)]
    try:
        sent = runner.submit(LY.read_headers, [(g, cfg) for g in groups])
    except BaseException:
        runner.close(interrupted=True)
        raise
    return Headers(runner, groups, sent)


class Headers:
    """Headers being read by :func:`read_headers`; ``wait()`` once, or ``cancel()`` after an error."""

    def __init__(self, runner, groups, sent):
        self.runner, self.groups, self.sent = runner, groups, sent

    def wait(self):
        if self.runner is None:
            return None
        try:
            heads = self.sent.results()
        except BaseException:
            self.cancel()
            raise
        self.runner.release()                  # its workers go on to the run's tasks
        self.runner = None
        return {p: h for g, hs in zip(self.groups, heads) for p, h in zip(g, hs)}

    def cancel(self):
        if self.runner is not None:
            self.runner.close(interrupted=True)
            self.runner = None


class Run:
    """One run, in two phases.

    Constructing it *plans*: files are opened once for coordinates and closed, readers are built,
    the time axis across files is settled and the tasks (file, time chunk) are laid out. Nothing is
    read then. :meth:`tasks` gives the dask.delayed calls (for inspection); :meth:`execute` computes
    them batch by batch, runs the metric families and returns the tidy :class:`Outcome`.

    For ``circtrack update``: ``only_times`` (a set of ISO time strings) computes only those time
    steps (repeats among the given files are still resolved and compared for them; other chunks are
    never read), and ``time_step_days`` replaces the time step the eddy-flux flags see by that of
    the whole record (of which the given files may be a part). Neither works with the low-pass filter.

    ``all_levels`` (roles) reads those roles on every pressure level, whatever the metrics need; with
    :meth:`zonal_means` this gives the fields behind a latitude-pressure cross-section.

    ``early_workers``: fork the worker processes before planning (pool.start_early), so they are
    ready for the first tasks; the caller stops them with ``pool.close_early()`` if no task took them
    (:func:`track` does). Not with ``only_times`` (a chunk or two, run in this process).
    """

    def __init__(self, paths, cfg, *, metric_ids=None, label=None, sectors=(), overrides=None,
                 progress=None, on_bad_file=None, stdin=None, only_times=None, time_step_days=None,
                 all_levels=(), cores_by_longitude=False, early_workers=False):
        self.cfg = cfg
        self.label = check_label(label)
        self.progress = progress = progress or Progress(quiet=True)
        overrides = {**cfg.get("variables", {}), **(overrides or {})}
        sectors = merge_sectors(sectors, cfg)
        with profile.timed(STAGES, "locate files"):
            files = locate(paths, stdin=stdin, cfg=cfg)
        early = early_workers and only_times is None and time_step_days is None
        try:
            if early:
                with profile.timed(STAGES, "fork worker processes early"):
                    start_early(cfg, files)    # they warm up while this process plans
            headers = read_headers(files, cfg)     # in worker processes, while this process goes on
            try:
                self._plan(files, cfg, headers, metric_ids, sectors, overrides, on_bad_file, only_times,
                           time_step_days, all_levels, cores_by_longitude)
            finally:
                headers.cancel()               # after an error: the header pool stops at once
        except BaseException:
            if early:
                close_early()
            raise

    def _plan(self, files, cfg, headers, metric_ids, sectors, overrides, on_bad_file, only_times,
              time_step_days, all_levels, cores_by_longitude):
        progress = self.progress
        policy = on_bad_file or cfg["run"]["on_bad_file"]
        self.left_out = []                 # default metrics left out: (family, ids, missing roles)
        if metric_ids is None:
            with profile.timed(STAGES, "choose metrics (detect first file)"):
                metric_ids = available_metrics(files, cfg, overrides, policy, self.left_out)
        plan = P.Plan.make(metric_ids, cfg, sectors)
        self.cores_by_longitude = cores_by_longitude
        if cores_by_longitude:             # the per-longitude table: its in-task reducer, ua on every level
            add_to_plan(plan)
        variants = V.expand(cfg)
        if variants:          # one read for all: every level any variant needs
            V.check_keys(cfg, plan.families)
            P.union_levels(plan, [P.Plan.make(metric_ids, v.cfg, sectors) for v in variants])
        for role in all_levels:            # e.g. the cross-section: [u] on every level, not just 200/850 hPa
            plan.roles[role] = None
        with profile.timed(STAGES, "wait for the headers of many files (worker processes)"):
            heads = headers.wait()
        with profile.timed(STAGES, "open and detect every file"):
            infos, skipped = P.prepare_inputs(files, plan, cfg, overrides, policy, heads)
        if getattr(progress, "describe_inputs", True):
            progress.line(f"{len(infos)} file(s), metrics: {', '.join(plan.metric_ids)}")
        with profile.timed(STAGES, "plan (time axis, tasks)"):
            axis = P.time_axis(infos, cfg, only_times, time_step_days)
            layout = P.task_layout(infos, cfg, axis["times_all"].size)
            masks_of = masks_per_input(infos, sectors)
            partial_run = only_times is not None or time_step_days is not None
            rest = P.batches_and_lowpass(cfg, axis["times"], plan, infos, partial_run)
        self.record = P.RunPlan(cfg=cfg, plan=plan, sectors=sectors, infos=infos, skipped=skipped,
                                masks_of=masks_of, variants=variants, **axis, **layout, **rest)

    def __getattr__(self, name):
        # the plan's fields (times, infos, chunks, skipped, ...) and methods (tasks, job, describe)
        record = self.__dict__.get("record")
        if record is None:
            raise AttributeError(name)
        return getattr(record, name)

    def zonal_batches(self):
        """Yield ``(t0, t1, stats)`` batch by batch: ``stats[role]`` of shape ``(t1 - t0, *extra, [L], J,
        S, 2)``, the mean of valid longitudes and their share per sector (full circle first), read and
        reduced exactly as :meth:`execute` does. One batch is held at a time (memory bounded by the
        batch); progress is reported per batch."""
        rp = self.record
        runner = Runner(self.cfg, len(rp.needed_chunks()))
        reader = BatchReader(rp, runner)
        try:
            for bi, reduced in reader.in_order(ahead=1):
                t0, t1 = rp.batches[bi]
                yield t0, t1, reduced[bi]["stats"]
                self.progress.step(t1, rp.times.size)
        except BaseException:
            runner.close(interrupted=True)
            reader.join(timeout=30)
            close_cached()
            raise
        reader.join()
        runner.close()
        close_cached()

    def zonal_means(self):
        """The full-circle zonal statistics the families see, for the run's time steps.

        Returns ``{"lat": (J,) ascending, "plev": {role: hPa levels or None}, "mean": {role: (T, *extra,
        [L], J)}, "coverage": {role: same}, "times": (T,)}``: the mean of valid longitudes and the share
        of valid longitudes, read and reduced exactly as :meth:`execute` does (same readers and tasks).
        Meant for a few time steps (``only_times``); it holds them all in memory.
        """
        rp = self.record
        parts = [stats for _, _, stats in self.zonal_batches()]
        roles = list(rp.plan.roles)
        stats = {r: np.concatenate([p[r] for p in parts], axis=0) if parts else None for r in roles}
        return {"lat": np.sort(rp.infos[0].detected.lat),
                "plev": {r: rp.infos[0].plev[r] for r in roles},
                "mean": {r: a[..., 0, 0] for r, a in stats.items() if a is not None},
                "coverage": {r: a[..., 0, 1] for r, a in stats.items() if a is not None},
                "times": rp.times}

    def execute(self):
        """Read, reduce and detect batch by batch; returns the tidy :class:`~circtrack.engine.rows.Outcome`."""
        rp = self.record
        nt = rp.times.size
        step_notes = np.full(nt, "", dtype=object)
        detector = Detector(rp)
        table = LongitudeTable(rp) if self.cores_by_longitude else None
        runner = Runner(self.cfg, len(rp.needed_chunks()))   # only_times: no worker pool for a chunk or two
        reader = BatchReader(rp, runner)
        try:
            batches = reader.in_order(ahead=2 if rp.lowpass else 1)
            while True:
                with profile.timed(STAGES, "wait for reduced batches"):
                    bi, reduced = next(batches, (None, None))
                if bi is None:
                    break
                t0, t1 = rp.batches[bi]
                step_notes[t0:t1] = reduced[bi]["notes"]
                with profile.timed(STAGES, "low-pass filter and families"):
                    lowpassed = rp.lowpass.apply(reduced, bi, rp.batches) if rp.lowpass else {}
                    detector.batch(reduced[bi], lowpassed, t0, t1)
                    if table is not None:
                        table.batch(reduced[bi], t0, t1)
                self.progress.step(t1, nt)
        except BaseException:
            runner.close(interrupted=True)       # stop the workers first, so a waiting prefetch returns
            close_early()
            reader.join(timeout=30)
            close_cached()
            raise
        else:
            reader.join()
            runner.close()
            close_early()                        # forked early, but the run had a single task
            close_cached()
        self.step_notes = step_notes
        with profile.timed(STAGES, "rows"):
            out = outcome(rp, detector.cols, step_notes, self.label)
            if table is not None:
                out.tables["cores_by_longitude"] = table.outcome(step_notes, self.label)
        return out
