"""The steps of ``circtrack update``, in the order :func:`run_update` calls them:

    options -> load state -> diff inputs -> read the new files' time axes -> plan the time steps to
    recompute -> run the engine -> merge the rows -> state and sidecar -> write atomically

Every step reads and sets fields of one :class:`Update` (plain data), so each can be read alone.
The engine's own rules (joins, repeats, provisional data, file order) are never reimplemented: the
time steps to recompute go to ``engine.track(only_times=...)`` with every file that holds them.
"""

from __future__ import annotations

import json
import os
import sys
from dataclasses import dataclass, field

import click

from circtrack.errors import InputError, UsageError
from circtrack.inputs.files import input_key
from circtrack.update.state import (STATE_VERSION, _group_lines, _load_state, _pause_point, _record_step_days,
                                    _remove_stale_temps, _same_file, _sha_text, _source_paths, _step_class,
                                    acquire_lock, file_record, lock_path, params_hash, state_path, time_key)


@dataclass
class Update:
    """What one update knows, filled step by step."""

    output: str
    cfg: dict
    user_ids: list | None
    secs: list                      # --sector bands
    all_secs: list                  # with those of [sectors]
    overrides_cli: dict
    overrides: dict                 # with [variables]
    policy: str                     # --on-bad-file
    repeat_policy: str
    phash: str
    label: str | None
    quiet: bool
    workers: int | None
    scheduler: str | None
    echo: object
    # load_state
    state: dict | None = None
    old_lines: dict = field(default_factory=dict)     # time -> CSV lines of OUT
    header: str | None = None
    # diff_inputs
    files: list = field(default_factory=list)
    ab: list = field(default_factory=list)            # absolute paths in the order given
    shown: dict = field(default_factory=dict)         # absolute -> as given
    records: dict = field(default_factory=dict)
    unchanged: list = field(default_factory=list)
    fresh: list = field(default_factory=list)
    removed: list = field(default_factory=list)
    old_order: dict = field(default_factory=dict)
    policy_changed: bool = False
    order_changed: bool = False
    # read_new_files
    ids: list = field(default_factory=list)
    roles: dict = field(default_factory=dict)
    entries: dict = field(default_factory=dict)       # absolute path -> state entry
    calendar: str | None = None
    source: str = ""
    # plan_recompute
    holders: dict = field(default_factory=dict)       # time -> files holding it
    need: set = field(default_factory=set)
    lowpass: bool = False
    step_days: float | None = None
    # run_engine / merge
    blocks: dict = field(default_factory=dict)        # time -> CSV lines of the result
    new_prov: dict = field(default_factory=dict)
    repeats: dict = field(default_factory=dict)
    notes: dict = field(default_factory=dict)
    base_prov: dict = field(default_factory=dict)
    processed: list = field(default_factory=list)
    left_out: list = field(default_factory=list)   # default metrics left out for want of a variable
    read: set = field(default_factory=set)          # every file the engine read (new ones and partners)

    @property
    def old_files(self):
        return self.state["files"] if self.state else {}


def run_update(paths, output, config, variables, metrics, label, sectors, workers, scheduler, on_bad_file,
               quiet, rebuild=False, repeated_times=None, stdin=None, echo=None, units=(), levels=(),
               fail_on_empty=False, anonymous=False, cache_dir=None, vary=()):
    """Bring OUT up to date with ``paths``; returns the new state (None when nothing was new)."""
    from circtrack import output as O

    from circtrack import guards as G
    from circtrack.engine.locate import locate

    u = options(output, config, variables, metrics, label, sectors, workers, scheduler, on_bad_file, quiet,
                repeated_times, echo or click.echo, units, levels, anonymous, cache_dir, vary)
    target = O.check_output_path(u.output, beside_names=("provenance.json", "state.json", "lock"), stream_ok=False)
    G.refuse_data_file_as_output(u.output)
    if os.path.islink(u.output):
        u.output = target.path        # written through: sidecar, state and lock beside the target
    # before anything is read: neither OUT nor a file beside it may be an input
    files = locate(list(paths), stdin=stdin, cfg=u.cfg)
    G.refuse_outputs_among_inputs([("-o", u.output), ("the sidecar of -o", O.sidecar_path(u.output)),
                                   ("the state of -o", state_path(u.output)),
                                   ("the lock of -o", lock_path(u.output))], files)
    stamps = G.input_stamps(files, u.cfg)
    lock_fd = acquire_lock(u.output)
    try:
        load_state(u, rebuild)
        if not diff_inputs(u, files):
            u.echo(f"circtrack: nothing new for {u.output} ({len(u.ab)} files up to date)")
            return None
        read_new_files(u)
        plan_recompute(u)
        recompute(u)
        text = "\n".join([u.header, *[ln for t in sorted(u.blocks, key=time_key) for ln in u.blocks[t]]]) + "\n"
        new_state, prov = bookkeeping(u, text)
        G.refuse_changed_inputs(stamps, u.cfg)
        write_atomically(u.output, text, prov, new_state)
        if not quiet:
            u.echo(f"circtrack: updated {u.output}: {_files_summary(u)}; {len(u.read)} file(s) read, "
                   f"{len(u.need)} of {len(u.blocks)} time steps computed", err=True)
        from circtrack import summary
        summary.report(summary.of_csv(text, u.left_out), u.echo, fail_on_empty)   # also with --quiet
        return new_state
    finally:
        os.close(lock_fd)


def options(output, config, variables, metrics, label, sectors, workers, scheduler, on_bad_file, quiet,
            repeated_times, echo, units=(), levels=(), anonymous=False, cache_dir=None, vary=()):
    """The command's options checked and combined with the config, as ``circtrack track`` does."""
    from circtrack import config as C
    from circtrack import variants as V
    from circtrack.cli_support import apply_storage, apply_units, parse_vars
    from circtrack.engine.sectors import merge_sectors, parse_sector
    from circtrack.guards import check_cli_labels

    if output == "-":
        raise UsageError("update needs an output file (-o OUT.csv), not stdout; the state lives beside it")
    if workers and scheduler:
        raise UsageError("--workers and --scheduler exclude each other; give one")
    cfg = apply_storage(apply_units(V.apply(C.load(config), vary), units, levels), anonymous, cache_dir)   # variants are parameters: a change needs --rebuild
    user_ids = [m.strip() for m in metrics.split(",") if m.strip()] if metrics else None
    secs = [parse_sector(s) for s in sectors]
    check_cli_labels(label, sectors, secs)
    overrides_cli = parse_vars(variables)
    phash = params_hash(cfg, user_ids, secs, overrides_cli)
    policy = on_bad_file or cfg["run"]["on_bad_file"]
    if repeated_times:
        cfg["run"]["repeated_times"] = repeated_times        # after the hash: a policy change is no parameter change
    return Update(output=str(output), cfg=cfg, user_ids=user_ids, secs=secs, all_secs=merge_sectors(secs, cfg),
                  overrides_cli=overrides_cli, overrides={**cfg.get("variables", {}), **overrides_cli},
                  policy=policy, repeat_policy=cfg["run"].get("repeated_times", "refuse"), phash=phash,
                  label=label, quiet=quiet, workers=workers, scheduler=scheduler, echo=echo)


def load_state(u, rebuild):
    """The state and OUT's rows by time step, if both are there and agree (else: rebuild)."""
    from circtrack import output as O

    output, sp = u.output, state_path(u.output)
    _remove_stale_temps([output, O.sidecar_path(output), sp])
    state = _load_state(sp)
    if state is None and not rebuild and os.path.exists(sp):
        u.echo(f"circtrack: {sp} is unreadable or from an older circtrack; rebuilding {output} from all files",
               err=True)
    if state is not None and not rebuild:
        if state["params_hash"] != u.phash:
            raise UsageError(f"the parameters differ from those {output} was made with (config, --metrics, "
                             "--sector or --var changed); rerun with --rebuild to recompute everything")
        try:
            with open(output, newline="") as f:
                text = f.read()
        except FileNotFoundError:
            text = None
        if text is None or _sha_text(text) != state.get("csv_sha256"):
            u.echo(f"circtrack: {output} does not match {sp} (interrupted run or edited by hand); rebuilding",
                   err=True)
            state = None
        else:
            lines = text.split("\n")[:-1]
            u.header = lines[0] if lines else None
            u.old_lines = _group_lines(lines[1:], state["source"])
    elif rebuild:
        state = None
    if state is not None and u.label and u.label != state["source"]:
        raise UsageError(f"--label '{u.label}' differs from the source '{state['source']}' in {output}; "
                         "rerun with --rebuild to relabel everything")
    u.state = state


def diff_inputs(u, files):
    """Which inputs (``files``, located) are new or changed, which were removed, and whether file
    order or the repeat policy changed. Returns False when there is nothing to do."""
    u.files = list(files)
    u.ab = [input_key(p) for p in u.files]
    u.shown = dict(zip(u.ab, u.files))
    old_files, state = u.old_files, u.state
    u.records = {a: file_record(a, old_files.get(a), u.cfg) for a in u.ab}
    u.unchanged = [a for a in u.ab if _same_file(old_files.get(a), u.records[a])]
    u.fresh = [a for a in u.ab if a not in u.unchanged]
    u.removed = [a for a in old_files if a not in u.records]
    u.old_order = {a: i for i, a in enumerate(state.get("order", list(old_files)))} if state else {}
    u.policy_changed = state is not None and state.get("repeated_times", "refuse") != u.repeat_policy
    kept_order = [a for a in u.ab if a in u.old_order]
    u.order_changed = state is not None and kept_order != sorted(kept_order, key=u.old_order.get)
    return not (state is not None and not u.fresh and not u.removed and not u.policy_changed
                and not u.order_changed)


def read_new_files(u):
    """The metrics, then the time axes of the new files (opened for coordinates only; unreadable
    ones stop or are skipped), and the source column a clean track over all files would write.
    A file lacking some variables (one variable per file) is joined by the engine run later with
    the files holding them for the same time steps."""
    from circtrack import engine
    from circtrack.engine.locate import without_skip_hint

    u.ids = u.user_ids
    if u.ids is None:
        u.ids = u.state["metrics"] if u.state else engine.available_metrics(u.files, u.cfg, u.overrides, u.policy,
                                                                             u.left_out)
    plan = engine.Plan.make(u.ids, u.cfg, u.all_secs)
    u.roles = plan.roles
    old_files = u.old_files
    # unchanged files keep their entry; a new mtime (same bytes) is recorded so it is not hashed again
    u.entries = {a: {**old_files[a], **u.records[a]} for a in u.unchanged}
    u.calendar = (u.state or {}).get("provenance", {}).get("calendar")
    for a in u.fresh:
        partial = False
        try:
            det = engine.prepare_file(u.shown[a], plan, u.cfg, u.overrides).detected
        except engine.MissingRoles as e:
            det, partial = e.info.detected, True
        except InputError as e:
            if u.policy == "skip":
                print(f"circtrack: skipped {without_skip_hint(e)}", file=sys.stderr, flush=True)
                u.entries[a] = {**u.records[a], "skipped": str(e), "times": []}
                continue
            raise
        u.calendar = u.calendar or det.calendar
        times = list(dict.fromkeys(engine.iso_time(t) for t in det.times))
        u.entries[a] = {**u.records[a], "times": times, "attrs": det.attrs, **({"partial": True} if partial else {})}
    if not any(u.entries[a]["times"] for a in u.ab):
        raise InputError(f"{u.files[0]}: no usable input among {len(u.files)} file(s); see the messages above")
    # the source column must stay what a clean track over all files would write
    named = _source_paths(u.ab, u.entries)
    u.source = u.label or engine.derive_source([u.shown[a] for a in named], u.entries[named[0]].get("attrs", {}))
    if u.state is not None and u.source != u.state["source"]:
        raise UsageError(f"the source derived from the file names would change from '{u.state['source']}' to "
                         f"'{u.source}'; give --label '{u.state['source']}' to keep it, or --rebuild")


def plan_recompute(u):
    """The time steps to compute again: those of new or changed files, those a removed or rewritten
    file held, repeats whose file order or policy changed, and all of them when the record's time
    step changes what the eddy-flux flags say (or for the low-pass filter, which reaches across files).
    Also keeps the rows of every other time step (``u.blocks``)."""
    for a in u.ab:
        for t in u.entries[a]["times"]:
            u.holders.setdefault(t, []).append(a)
    fresh_set = set(u.fresh)
    gone = {t for a in u.removed + u.fresh for t in u.old_files.get(a, {}).get("times", [])}
    need = set()
    for t, hs in u.holders.items():
        if fresh_set & set(hs) or t in gone or t not in u.old_lines:
            need.add(t)
        elif len(hs) > 1 and (u.policy_changed or hs != sorted(hs, key=lambda h: u.old_order.get(h, -1))):
            need.add(t)
    u.lowpass = float(u.cfg.get("jets", {}).get("eddy_lowpass_days", 0) or 0) > 0 and "ua" in u.roles
    old_step = (u.state or {}).get("time_step_days")
    if u.state is None or u.lowpass or u.calendar is None:
        need = set(u.holders)
    else:
        u.step_days = _record_step_days(u.holders, u.entries, u.calendar)
        if u.step_days is None or _step_class(u.step_days, u.cfg) != _step_class(old_step, u.cfg):
            need = set(u.holders)
    u.need = need
    u.blocks = {t: u.old_lines[t] for t in u.holders if t not in need and t in u.old_lines}
    u.base_prov = u.state.get("provenance", {}) if u.state else {}


def recompute(u):
    """Run the engine on the time steps to recompute and merge its rows; once more over everything
    when the files the run skipped changed the record's time step."""
    from circtrack.engine.progress import Progress

    prog = Progress(quiet=u.quiet, describe_inputs=False)     # the files are described here, in update's terms
    for _attempt in range(2):
        if not u.need:
            break
        full = u.need == set(u.holders) and (u.lowpass or u.step_days is None)
        run_files, outcome = run_engine(u, full, prog)
        merge(u, run_files, outcome)
        # the record's time step over the time steps that have rows (files the run skipped left out)
        final_step = _record_step_days({t: hs for t, hs in u.holders.items() if t in u.blocks}, u.entries,
                                       u.calendar)
        if u.step_days is None or full or _step_class(final_step, u.cfg) == _step_class(u.step_days, u.cfg):
            u.step_days = final_step
            break
        u.step_days, u.need = final_step, set(u.holders)     # the run's skips changed the time step: redo all
    if u.need:
        prog.done(sum(len(u.blocks.get(t, [])) for t in u.need))
    if u.header is None:
        raise InputError(f"{u.output}: no rows to write and no header known; rerun with --rebuild")


def run_engine(u, full, prog):
    """``engine.track`` over every file holding a time step to recompute (so repeats are resolved as
    in one clean track), plus one kept file the new ones must fit (grid, levels, calendar, extra
    dimensions). Returns ``(run_files, outcome)``."""
    from circtrack import engine
    from circtrack.cluster import scheduler_context

    run_set = {h for t in u.need for h in u.holders[t]}
    kept = [a for a in u.unchanged if a not in run_set and u.entries[a]["times"] and not u.entries[a].get("skipped")]
    if kept:
        ref = u.entries[kept[0]]["times"]
        run_set |= {a for a in kept if u.entries[a]["times"] == ref}
    run_files = [a for a in u.ab if a in run_set]
    u.read |= set(run_files)
    prog.line(f"{_files_summary(u)}; reading {len(run_files)} file(s) for {len(u.need)} time step(s)")
    with scheduler_context(u.workers, u.scheduler, u.cfg):
        outcome = engine.track([u.shown[a] for a in run_files], u.cfg, metric_ids=u.ids, label=u.source,
                               sectors=u.secs, overrides=u.overrides_cli, progress=prog, on_bad_file=u.policy,
                               only_times=None if full else u.need,
                               time_step_days=None if full else u.step_days)
    return run_files, outcome


def _files_summary(u):
    """The inputs in the terms both the progress line and the summary use."""
    return (f"{len(u.fresh)} new or changed file(s), {len(u.unchanged)} unchanged, "
            f"{len(u.removed)} removed")


def merge(u, run_files, outcome):
    """The engine's rows replace those of the recomputed time steps; its provenance is noted."""
    from circtrack import output as O

    lines = O.sorted_lines(outcome)
    if u.header is not None and lines[0] != u.header and not (u.need == set(u.holders)):
        raise InputError(f"{u.shown[run_files[0]]}: its columns ({lines[0]}) differ from those of {u.output} "
                         f"({u.header}); rerun with --rebuild")
    u.header = lines[0]
    got = _group_lines(lines[1:], u.source)
    for t in u.need:
        u.blocks.pop(t, None)
        if got.get(t):
            u.blocks[t] = got[t]
    u.repeats, u.notes = {}, {}
    u.processed = [a for a in run_files if any(t in u.need for t in u.entries[a]["times"])]
    for a in run_files:                  # e.g. a file skipped for want of its partner, now joined
        u.entries[a].pop("skipped", None)
    for s in outcome.provenance["skipped_inputs"]:            # e.g. a variable no file supplies
        u.entries[input_key(s["path"])]["skipped"] = s["reason"]
    for inp in outcome.provenance["inputs"]:
        u.new_prov[inp["path"]] = inp
    for d in outcome.provenance["repeated_time_steps_dropped"]:
        u.repeats.setdefault(d["time"], []).append(d)
    for code, ts in outcome.provenance["time_step_notes"].items():
        for t in ts:
            u.notes.setdefault(t, []).append(code)
    u.base_prov = {k: outcome.provenance[k] for k in ("calendar", "metrics", "sectors", "extra_key_columns")}
    u.calendar = outcome.provenance["calendar"]


def bookkeeping(u, text):
    """The new state and sidecar: repeats and notes of the kept time steps come from the last state.
    Returns ``(state, provenance)``."""
    order = sorted(u.blocks, key=time_key)
    old_repeats = (u.state or {}).get("repeats", {})
    old_notes = (u.state or {}).get("notes", {})
    repeats, notes = dict(u.repeats), dict(u.notes)
    for t in order:
        if t not in u.need:
            if t in old_repeats:
                repeats[t] = old_repeats[t]
            if t in old_notes:
                notes[t] = old_notes[t]
    repeats = {t: repeats[t] for t in order if t in repeats}
    notes = {t: notes[t] for t in order if t in notes}
    entries, ab = u.entries, u.ab
    dropped_from = {t: {input_key(d["path"]) for d in ds} for t, ds in repeats.items()}
    for a in ab:
        entries[a]["owned"] = [] if entries[a].get("skipped") else [
            t for t in entries[a]["times"] if t in u.blocks and a not in dropped_from.get(t, ())]
    used = [a for a in ab if not entries[a].get("skipped")]
    for a in used:
        if a in u.new_prov:
            entries[a]["provenance"] = u.new_prov[a]
    prov = sidecar(u, order, used, repeats, notes)
    from circtrack.flags import note_summary_from_csv
    prov["flag_notes"] = note_summary_from_csv(text)      # as track writes it (e.g. ok;unbalanced_column)
    new_state = {
        "version": STATE_VERSION, "params_hash": u.phash, "source": u.source, "metrics": u.ids,
        "csv_sha256": _sha_text(text), "provenance": u.base_prov, "order": ab,
        "repeated_times": u.repeat_policy, "time_step_days": u.step_days,
        "repeats": repeats, "notes": notes,
        "files": {a: entries[a] for a in ab},
    }
    return new_state, prov


def sidecar(u, order, used, repeats, notes):
    """The provenance sidecar of the updated OUT (as ``track`` writes it, plus what was processed)."""
    from circtrack import __version__
    from circtrack import output as O

    entries, base_prov = u.entries, u.base_prov
    skipped = [{"path": u.shown[a], "reason": entries[a]["skipped"]} for a in u.ab if entries[a].get("skipped")]
    note_codes = sorted({c for cs in notes.values() for c in cs})
    return {
        "tool": "circtrack",
        "version": __version__,
        "command": ["circtrack", *sys.argv[1:]],
        "columns": u.header.split(","),
        "parameters": u.cfg,
        # joined one-variable-per-file members appear under their group's layout (joined_inputs)
        "inputs": [entries[a].get("provenance", {"path": a}) for a in used
                   if entries[a].get("provenance") or not entries[a].get("partial")],
        "skipped_inputs": skipped,
        "repeated_time_steps_dropped": [d for t in order for d in repeats.get(t, [])],
        "repeated_times_policy": u.repeat_policy,
        "calendar": base_prov.get("calendar"),
        "time_span": [order[0], order[-1]] if order else None,
        "time_steps": len(order),
        "metrics": base_prov.get("metrics", u.ids),
        "sectors": base_prov.get("sectors", {}),
        "extra_key_columns": base_prov.get("extra_key_columns", []),
        "time_step_notes": {c: [t for t in order if c in notes.get(t, [])] for c in note_codes},
        "updated_incrementally": {"processed": [u.shown[a] for a in u.processed], "removed": u.removed},
        "libraries": O.library_versions(),
    }


def write_atomically(output, text, prov, new_state):
    """CSV, sidecar and state written and synced to temp files first, then renamed in that order,
    the state last (see circtrack/update/__init__.py): a failure before the renames changes nothing."""
    from circtrack import output as O

    O.commit([(output, text), (O.sidecar_path(output), json.dumps(prov, indent=2, default=str) + "\n"),
              (state_path(output), json.dumps(new_state, indent=1, default=str) + "\n")],
             before_replace=lambda: _pause_point("before-csv-rename"),
             between={2: lambda: _pause_point("before-state-write")})
