"""Incremental ``circtrack update``: process only new or changed inputs, keep the rest of OUT as it is.

Beside ``OUT.csv`` live ``OUT.state.json`` (what each input file was and which time steps it
contributed, the parameter hash, the source label and a SHA-256 of the CSV) and ``OUT.lock``
(``fcntl.flock``, so two cron jobs never write at once). Writes go CSV, sidecar, state, each
atomically; the state is written last. If a run dies before the CSV is renamed into place,
everything is as before; if it dies after the CSV but before the state, the CSV no longer
matches the hash in the state and the next run rebuilds from all inputs, so the result after any
sequence of data drops equals one clean ``circtrack track`` over all files. Temp files left by a
killed run are removed by the next run (it holds the lock, so no other run can own them).

The time steps to compute again (those of new or changed files, and see DEVELOPERS.md for the
rest) are computed by ``engine.track(only_times=...)`` from every file that holds them, so the
engine's own rules apply: one-variable-per-file groups are joined, identical repeats dropped,
provisional data replaced by final data, conflicting repeats refused naming both files.

Test hook: with the environment variable ``CIRCTRACK_PAUSE_AT`` set to a phase name, the run
prints ``circtrack: paused at PHASE (pid N)`` on stderr and sleeps there, so a test can kill it at
exactly that moment. Phases: ``before-csv-rename`` (the new CSV is written to its temp file and
synced, not yet renamed) and ``before-state-write`` (CSV and sidecar renamed into place, the
state not yet written).
"""

from __future__ import annotations

import fcntl
import glob
import hashlib
import json
import math
import os
import sys
import time

import click

from circtrack.errors import InputError, UsageError

STATE_VERSION = 2
CHUNK = 1 << 20


# --------------------------------------------------------------------------- small helpers
def _base(out_path):
    return out_path[:-4] if out_path.endswith(".csv") else out_path


def state_path(out_path):
    return _base(out_path) + ".state.json"


def lock_path(out_path):
    return _base(out_path) + ".lock"


def checksum(path):
    """SHA-256 of the size, the first and the last MiB (cheap; catches rewrites of the same size)."""
    if not os.path.isfile(path):
        return None
    size = os.path.getsize(path)
    h = hashlib.sha256(str(size).encode())
    with open(path, "rb") as f:
        h.update(f.read(CHUNK))
        if size > CHUNK:
            f.seek(max(CHUNK, size - CHUNK))
            h.update(f.read(CHUNK))
    return h.hexdigest()


def file_record(path):
    st = os.stat(path)
    return {"size": st.st_size, "mtime_ns": st.st_mtime_ns, "checksum": checksum(path)}


def _same_file(old, new):
    return old is not None and all(old.get(k) == new[k] for k in ("size", "mtime_ns", "checksum"))


def _sha_text(text):
    return hashlib.sha256(text.encode()).hexdigest()


def time_key(iso):
    """ISO text (possibly negative year) -> tuple that sorts chronologically."""
    neg = iso.startswith("-")
    s = iso[1:] if neg else iso
    date, _, clock = s.partition("T")
    y, m, d = (int(x) for x in date.split("-"))
    hh, mm, ss = (int(x) for x in clock.split(":")) if clock else (0, 0, 0)
    return (-y if neg else y, m, d, hh, mm, ss)


def params_hash(cfg, metrics, sectors, overrides):
    blob = json.dumps({"config": cfg, "metrics": metrics, "sectors": [list(s) for s in sectors],
                       "variables": overrides}, sort_keys=True, default=str)
    return hashlib.sha256(blob.encode()).hexdigest()


PAUSE_ENV = "CIRCTRACK_PAUSE_AT"
PAUSE_PHASES = ("before-csv-rename", "before-state-write")


def _pause_point(phase):
    """Test hook (see the module docstring): announce the phase and sleep until killed."""
    if os.environ.get(PAUSE_ENV) == phase:
        print(f"circtrack: paused at {phase} (pid {os.getpid()})", file=sys.stderr, flush=True)
        time.sleep(600)


def _remove_stale_temps(paths):
    """Temp files of OUT, its sidecar and state left by a killed run (called with the lock held)."""
    from circtrack.output import temp_prefix

    for p in paths:
        p = os.path.abspath(p)
        for tmp in glob.glob(os.path.join(glob.escape(os.path.dirname(p)), glob.escape(temp_prefix(p)) + "*.tmp")):
            try:
                os.unlink(tmp)
            except FileNotFoundError:
                pass


def acquire_lock(out_path):
    """Non-blocking exclusive flock on OUT.lock; the lock dies with the process (no stale locks)."""
    lp = lock_path(out_path)
    fd = os.open(lp, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        os.close(fd)
        raise InputError(f"another update is running on {out_path}; lock file {lp} is held "
                         "(wait for it to finish; the lock is released when that process ends)")
    return fd


def _load_state(path):
    try:
        with open(path) as f:
            st = json.load(f)
    except FileNotFoundError:
        return None
    except (OSError, ValueError):
        return None
    return st if isinstance(st, dict) and st.get("version") == STATE_VERSION else None


def _group_lines(lines, source):
    """CSV body lines -> {time: [lines]} (all rows of one time step are contiguous in the CSV)."""
    prefix = source + ","
    out = {}
    for ln in lines:
        if not ln.startswith(prefix):
            raise InputError(f"row '{ln[:60]}' does not start with the source '{source}'; rerun with --rebuild")
        t = ln[len(prefix):].split(",", 1)[0]
        out.setdefault(t, []).append(ln)
    return out


def _record_step_days(holders, entries, calendar):
    """The time step of the whole record in days, as engine.Run computes it from its time axis
    (median spacing of the first steps; NaN for a single step), from the ISO times in the state."""
    import cftime
    import numpy as np

    from circtrack.engine import _time_step_days

    ts = sorted((t for t, hs in holders.items() if any(not entries[h].get("skipped") for h in hs)), key=time_key)
    if len(ts) > 401:
        ts = ts[:401]
    try:
        objs = [cftime.datetime(*time_key(t), calendar=calendar) for t in ts]
    except (ValueError, TypeError):
        return None          # a calendar cftime cannot rebuild from the text: the caller recomputes everything
    return _time_step_days(np.array(objs, dtype=object))


def _source_paths(ab, entries):
    """The files engine.derive_source sees in a clean track: complete files in the order given, then
    the first file of each group joined from one-variable-per-file files (same time steps)."""
    usable = [a for a in ab if entries[a]["times"] and not entries[a].get("skipped")]
    usable = usable or [a for a in ab if entries[a]["times"]]
    firsts = {}
    for a in usable:
        if entries[a].get("partial"):
            firsts.setdefault(tuple(entries[a]["times"]), a)
    return [a for a in usable if not entries[a].get("partial")] + list(firsts.values())


def _step_class(days, cfg):
    """What the families make of the record's time step (metrics.transport.time_mean_flag): unknown
    (a single step), longer than eddies.max_time_step_days, or not. Rows change only with this."""
    if days is None or not math.isfinite(days):
        return "unknown"
    return "long" if days > cfg["eddies"]["max_time_step_days"] else "short"


# --------------------------------------------------------------------------- the run
def run_update(paths, output, config, variables, metrics, label, sectors, workers, scheduler, on_bad_file,
               quiet, rebuild=False, repeated_times=None, stdin=None, echo=None):
    from circtrack import config as C
    from circtrack import engine
    from circtrack import output as O
    from circtrack.cli_support import parse_vars
    from circtrack.cluster import scheduler_context
    from circtrack.inputs.files import expand

    echo = echo or click.echo
    if output == "-":
        raise UsageError("update needs an output file (-o OUT.csv), not stdout; the state lives beside it")
    if workers and scheduler:
        raise UsageError("--workers and --scheduler exclude each other; give one")
    output = str(output)
    cfg = C.load(config)
    user_ids = [m.strip() for m in metrics.split(",") if m.strip()] if metrics else None
    secs = [engine.parse_sector(s) for s in sectors]
    overrides_cli = parse_vars(variables)
    phash = params_hash(cfg, user_ids, secs, overrides_cli)
    # as engine.track does it
    overrides = {**cfg.get("variables", {}), **overrides_cli}
    all_secs = list(secs) + [(k, float(v[0]), float(v[1])) for k, v in cfg.get("sectors", {}).items()
                             if k not in {s[0] for s in secs}]
    policy = on_bad_file or cfg["run"]["on_bad_file"]
    if repeated_times:
        cfg["run"]["repeated_times"] = repeated_times        # after the hash: a policy change is no parameter change
    repeat_policy = cfg["run"].get("repeated_times", "refuse")

    O.check_output_path(output)
    lock_fd = acquire_lock(output)
    try:
        sp = state_path(output)
        _remove_stale_temps([output, O.sidecar_path(output), sp])
        state = _load_state(sp)
        if state is None and not rebuild and os.path.exists(sp):
            echo(f"circtrack: {sp} is unreadable or from an older circtrack; rebuilding {output} from all files",
                 err=True)
        old_lines, header = {}, None
        if state is not None and not rebuild:
            if state["params_hash"] != phash:
                raise UsageError(f"the parameters differ from those {output} was made with (config, --metrics, "
                                 "--sector or --var changed); rerun with --rebuild to recompute everything")
            try:
                with open(output, newline="") as f:
                    text = f.read()
            except FileNotFoundError:
                text = None
            if text is None or _sha_text(text) != state.get("csv_sha256"):
                echo(f"circtrack: {output} does not match {sp} (interrupted run or edited by hand); rebuilding",
                     err=True)
                state = None
            else:
                lines = text.split("\n")[:-1]
                header = lines[0] if lines else None
                old_lines = _group_lines(lines[1:], state["source"])
        elif rebuild:
            state = None
        old_files = state["files"] if state else {}
        if state is not None and label and label != state["source"]:
            raise UsageError(f"--label '{label}' differs from the source '{state['source']}' in {output}; "
                             "rerun with --rebuild to relabel everything")

        files = expand(list(paths), stdin=stdin)
        ab = [os.path.abspath(p) for p in files]
        shown = dict(zip(ab, files))
        records = {a: file_record(a) for a in ab}
        unchanged = [a for a in ab if _same_file(old_files.get(a), records[a])]
        fresh = [a for a in ab if a not in unchanged]
        removed = [a for a in old_files if a not in records]
        old_order = {a: i for i, a in enumerate(state.get("order", list(old_files)))} if state else {}
        policy_changed = state is not None and state.get("repeated_times", "refuse") != repeat_policy
        order_changed = state is not None and [a for a in ab if a in old_order] != sorted(
            (a for a in ab if a in old_order), key=old_order.get)
        if state is not None and not fresh and not removed and not policy_changed and not order_changed:
            echo(f"circtrack: nothing new for {output} ({len(ab)} files up to date)")
            return None

        ids = user_ids
        if ids is None:
            ids = state["metrics"] if state else engine._available_metrics(files, cfg, overrides, policy)
        plan = engine.Plan.make(ids, cfg, all_secs)

        # ---- open the new files (lazily) for their time axes; unreadable ones stop or are skipped.
        # A file lacking some variables (one variable per file) is joined by the engine run below
        # with the files holding them for the same time steps.
        entries = {a: dict(old_files[a]) for a in unchanged}
        calendar = (state or {}).get("provenance", {}).get("calendar")
        for a in fresh:
            partial = False
            try:
                det = engine._prepare_file(shown[a], plan, cfg, all_secs, overrides).detected
            except engine.MissingRoles as e:
                det, partial = e.info.detected, True
            except InputError as e:
                if policy == "skip":
                    print(f"circtrack: skipped {e}", file=sys.stderr, flush=True)
                    entries[a] = {**records[a], "skipped": str(e), "times": []}
                    continue
                raise
            calendar = calendar or det.calendar
            times = list(dict.fromkeys(engine.iso_time(t) for t in det.times))
            entries[a] = {**records[a], "times": times, "attrs": det.attrs, **({"partial": True} if partial else {})}
        if not any(entries[a]["times"] for a in ab):
            raise InputError(f"{files[0]}: no usable input among {len(files)} file(s); see the messages above")

        # ---- the source column must stay what a clean track over all files would write
        named = _source_paths(ab, entries)
        source = label or engine.derive_source([shown[a] for a in named], entries[named[0]].get("attrs", {}))
        if state is not None and source != state["source"]:
            raise UsageError(f"the source derived from the file names would change from '{state['source']}' to "
                             f"'{source}'; give --label '{state['source']}' to keep it, or --rebuild")

        # ---- which time steps must be computed again: those of new or changed files, those a
        # removed or rewritten file held, repeats whose file order or policy changed, and all of
        # them when the record's time step changes what the eddy-flux flags say (or for the
        # low-pass filter, which reaches across files)
        holders = {}
        for a in ab:
            for t in entries[a]["times"]:
                holders.setdefault(t, []).append(a)
        fresh_set = set(fresh)
        gone = {t for a in removed + fresh for t in old_files.get(a, {}).get("times", [])}
        need = set()
        for t, hs in holders.items():
            if fresh_set & set(hs) or t in gone or t not in old_lines:
                need.add(t)
            elif len(hs) > 1 and (policy_changed or hs != sorted(hs, key=lambda h: old_order.get(h, -1))):
                need.add(t)
        lowpass = float(cfg.get("jets", {}).get("eddy_lowpass_days", 0) or 0) > 0 and "ua" in plan.roles
        old_step = (state or {}).get("time_step_days")
        step_days = None

        if state is None or lowpass or calendar is None:
            need = set(holders)
        else:
            step_days = _record_step_days(holders, entries, calendar)
            if step_days is None or _step_class(step_days, cfg) != _step_class(old_step, cfg):
                need = set(holders)

        blocks = {t: old_lines[t] for t in holders if t not in need and t in old_lines}
        new_prov, repeats, notes = {}, {}, {}
        base_prov = state.get("provenance", {}) if state else {}
        processed = []
        prog = engine.Progress(quiet=quiet)
        for _attempt in range(2):      # a second pass only when the run changed the time step
            if not need:
                break
            repeats, notes = {}, {}
            # every file holding a needed time step (so repeats are resolved as in one clean track),
            # and one kept file the new ones must fit (grid, levels, calendar, extra dimensions)
            run_set = {h for t in need for h in holders[t]}
            kept = [a for a in unchanged if a not in run_set and entries[a]["times"] and not entries[a].get("skipped")]
            if kept:
                ref = entries[kept[0]]["times"]
                run_set |= {a for a in kept if entries[a]["times"] == ref}
            run_files = [a for a in ab if a in run_set]
            full = need == set(holders) and (lowpass or step_days is None)
            with scheduler_context(workers, scheduler, cfg):
                outcome = engine.track([shown[a] for a in run_files], cfg, metric_ids=ids, label=source,
                                       sectors=secs, overrides=overrides_cli, progress=prog, on_bad_file=policy,
                                       only_times=None if full else need,
                                       time_step_days=None if full else step_days)
            lines = O.sorted_lines(outcome)
            if header is not None and lines[0] != header and not (need == set(holders)):
                raise InputError(f"{shown[run_files[0]]}: its columns ({lines[0]}) differ from those of {output} "
                                 f"({header}); rerun with --rebuild")
            header = lines[0]
            got = _group_lines(lines[1:], source)
            for t in need:
                blocks.pop(t, None)
                if got.get(t):
                    blocks[t] = got[t]
            processed = [a for a in run_files if any(t in need for t in entries[a]["times"])]
            for a in run_files:                  # e.g. a file skipped for want of its partner, now joined
                entries[a].pop("skipped", None)
            for s in outcome.provenance["skipped_inputs"]:            # e.g. a variable no file supplies
                a = os.path.abspath(s["path"])
                entries[a]["skipped"] = s["reason"]
            for inp in outcome.provenance["inputs"]:
                new_prov[inp["path"]] = inp
            for d in outcome.provenance["repeated_time_steps_dropped"]:
                repeats.setdefault(d["time"], []).append(d)
            for code, ts in outcome.provenance["time_step_notes"].items():
                for t in ts:
                    notes.setdefault(t, []).append(code)
            base_prov = {k: outcome.provenance[k] for k in ("calendar", "metrics", "sectors", "extra_key_columns")}
            calendar = outcome.provenance["calendar"]
            # the record's time step over the time steps that have rows (files the run skipped left out)
            final_step = _record_step_days({t: hs for t, hs in holders.items() if t in blocks}, entries, calendar)
            if step_days is None or full or _step_class(final_step, cfg) == _step_class(step_days, cfg):
                step_days = final_step
                break
            step_days, need = final_step, set(holders)        # the run's skips changed the time step: redo all
        if need:
            prog.done(sum(len(blocks.get(t, [])) for t in need))
        if header is None:
            raise InputError(f"{output}: no rows to write and no header known; rerun with --rebuild")

        order = sorted(blocks, key=time_key)
        body = [ln for t in order for ln in blocks[t]]
        text = "\n".join([header, *body]) + "\n"

        # ---- state bookkeeping: repeats and notes of the kept time steps come from the last state
        old_repeats = (state or {}).get("repeats", {})
        old_notes = (state or {}).get("notes", {})
        for t in order:
            if t not in need:
                if t in old_repeats:
                    repeats[t] = old_repeats[t]
                if t in old_notes:
                    notes[t] = old_notes[t]
        repeats = {t: repeats[t] for t in order if t in repeats}
        notes = {t: notes[t] for t in order if t in notes}
        used = [a for a in ab if not entries[a].get("skipped")]
        skipped = [{"path": shown[a], "reason": entries[a]["skipped"]} for a in ab if entries[a].get("skipped")]
        dropped_from = {t: {os.path.abspath(d["path"]) for d in ds} for t, ds in repeats.items()}
        for a in ab:
            entries[a]["owned"] = [] if entries[a].get("skipped") else [
                t for t in entries[a]["times"] if t in blocks and a not in dropped_from.get(t, ())]
        for a in used:
            if a in new_prov:
                entries[a]["provenance"] = new_prov[a]
        note_codes = sorted({c for cs in notes.values() for c in cs})
        prov = {
            "tool": "circtrack",
            "command": ["circtrack", *sys.argv[1:]],
            "columns": header.split(","),
            "parameters": cfg,
            # joined one-variable-per-file members appear under their group's layout (joined_inputs)
            "inputs": [entries[a].get("provenance", {"path": a}) for a in used
                       if entries[a].get("provenance") or not entries[a].get("partial")],
            "skipped_inputs": skipped,
            "repeated_time_steps_dropped": [d for t in order for d in repeats.get(t, [])],
            "repeated_times_policy": repeat_policy,
            "calendar": base_prov.get("calendar"),
            "time_span": [order[0], order[-1]] if order else None,
            "time_steps": len(order),
            "metrics": base_prov.get("metrics", ids),
            "sectors": base_prov.get("sectors", {}),
            "extra_key_columns": base_prov.get("extra_key_columns", []),
            "time_step_notes": {c: [t for t in order if c in notes.get(t, [])] for c in note_codes},
            "updated_incrementally": {"processed": [shown[a] for a in processed], "removed": removed},
        }
        from circtrack import __version__

        prov = {"tool": "circtrack", "version": __version__, **{k: v for k, v in prov.items() if k != "tool"},
                "libraries": O.library_versions()}
        new_state = {
            "version": STATE_VERSION, "params_hash": phash, "source": source, "metrics": ids,
            "csv_sha256": _sha_text(text), "provenance": base_prov, "order": ab,
            "repeated_times": repeat_policy, "time_step_days": step_days,
            "repeats": repeats, "notes": notes,
            "files": {a: entries[a] for a in ab},
        }
        O.atomic_write_text(output, text, before_replace=lambda: _pause_point("before-csv-rename"))
        O.atomic_write_text(O.sidecar_path(output), json.dumps(prov, indent=2, default=str) + "\n")
        _pause_point("before-state-write")
        O.atomic_write_text(sp, json.dumps(new_state, indent=1, default=str) + "\n")
        if not quiet:
            echo(f"circtrack: updated {output}: {len(processed)} file(s) processed, {len(ab) - len(processed)} kept, "
                 f"{len(removed)} removed, {len(order)} time steps", err=True)
        return new_state
    finally:
        os.close(lock_fd)


# --------------------------------------------------------------------------- the command
def make_command():
    """The click command; built on demand so circtrack.cli and this module import in any order."""
    from circtrack.cli import _track_options
    from circtrack.cli_support import guarded

    @click.command("update")
    @_track_options
    @click.option("--rebuild", is_flag=True, help="Recompute everything (needed after changing parameters or --label).")
    @guarded
    def update(**kw):
        """Bring OUT up to date with PATH..., processing only new or changed files (for cron).

        The state (OUT.state.json) records each input's size, mtime, checksum and time steps and a
        hash of the parameters; OUT.lock keeps concurrent runs apart (a second run exits 1). Rows of
        unchanged files are kept as they are; the result is byte-identical to one clean
        'circtrack track' over all files with the same --label. Changed parameters or a source
        label that would change are refused (exit 2) unless --rebuild. Exit 0 with one line when
        nothing is new.
        """
        run_update(**kw)

    return update

