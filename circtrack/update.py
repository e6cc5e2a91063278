"""Incremental ``circtrack update``: process only new or changed inputs, keep the rest of OUT as it is.

Beside ``OUT.csv`` live ``OUT.state.json`` (what each input file was and which time steps it
contributed, the parameter hash, the source label and a SHA-256 of the CSV) and ``OUT.lock``
(``fcntl.flock``, so two cron jobs never write at once). Writes go CSV, sidecar, state, each
atomically; the state is written last. If a run dies before the CSV is renamed into place,
everything is as before; if it dies after the CSV but before the state, the CSV no longer
matches the hash in the state and the next run rebuilds from all inputs, so the result after any
sequence of data drops equals one clean ``circtrack track`` over all files. Temp files left by a
killed run are removed by the next run (it holds the lock, so no other run can own them).

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
import os
import sys
import time

import click

from circtrack.errors import InputError, UsageError

STATE_VERSION = 1
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


def _disjoint_groups(files, times_of):
    """Split files into groups whose time steps do not overlap (so engine.track drops nothing)."""
    groups = []
    for f in files:
        ts = set(times_of[f])
        for g in groups:
            if not (g["times"] & ts):
                g["files"].append(f)
                g["times"] |= ts
                break
        else:
            groups.append({"files": [f], "times": set(ts)})
    return [g["files"] for g in groups]


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

    O.check_output_path(output)
    lock_fd = acquire_lock(output)
    try:
        sp = state_path(output)
        _remove_stale_temps([output, O.sidecar_path(output), sp])
        state = _load_state(sp)
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
        if state is not None and not fresh and not removed:
            echo(f"circtrack: nothing new for {output} ({len(ab)} files up to date)")
            return None

        ids = user_ids
        if ids is None:
            ids = state["metrics"] if state else engine._available_metrics(files, cfg, overrides, policy)
        plan = engine.Plan.make(ids, cfg, all_secs)

        # ---- open the new files (lazily) for their time axes; unreadable ones stop or are skipped
        entries = {a: dict(old_files[a]) for a in unchanged}
        skipped, infos = [], []
        for a in fresh:
            try:
                info = engine._prepare_file(shown[a], plan, cfg, all_secs, overrides)
            except InputError as e:
                if policy == "skip":
                    print(f"circtrack: skipped {e}", file=sys.stderr, flush=True)
                    entries[a] = {**records[a], "skipped": str(e), "times": [], "owned": [], "attrs": {}}
                    continue
                raise
            infos.append(info)
            times = list(dict.fromkeys(engine.iso_time(t) for t in info.detected.times))
            entries[a] = {**records[a], "times": times, "owned": [], "attrs": info.detected.attrs}
        # new files must fit those already in OUT (grid, levels, calendar, extra dimensions), as in
        # one track over all files; only new files are computed, so compare them with a kept one
        kept = [a for a in unchanged if not entries[a].get("skipped")]
        if infos and kept:
            infos.insert(0, engine._prepare_file(shown[kept[0]], plan, cfg, all_secs, overrides))
        if len(infos) > 1:
            engine._check_consistent(infos)
        for a in ab:
            if entries[a].get("skipped"):
                skipped.append({"path": shown[a], "reason": entries[a]["skipped"]})
        used = [a for a in ab if not entries[a].get("skipped")]
        if not used:
            raise InputError(f"{files[0]}: no usable input among {len(files)} file(s); see the messages above")
        fresh_used = [a for a in fresh if a in used]

        # ---- the source column must stay what a clean track over all files would write
        source = label or engine.derive_source([shown[a] for a in used], entries[used[0]].get("attrs", {}))
        if state is not None and source != state["source"]:
            raise UsageError(f"the source derived from the file names would change from '{state['source']}' to "
                             f"'{source}'; give --label '{state['source']}' to keep it, or --rebuild")

        # ---- who owns each time step
        holders = {}
        for a in used:
            for t in entries[a]["times"]:
                holders.setdefault(t, []).append(a)
        old_owner = {t: a for a, e in old_files.items() for t in e.get("owned", [])}
        owner, dropped = {}, []
        fresh_set = set(fresh_used)
        for t, hs in holders.items():
            if len(hs) > 1 and fresh_set & set(hs):
                if repeated_times in (None, "refuse"):
                    new = next(h for h in hs if h in fresh_set)
                    other = next(h for h in hs if h != new)
                    raise InputError(f"{shown[new]}: time step {t} is also in {shown[other]}; remove one of the "
                                     "files or rerun with --repeated-times keep-first (the file listed first wins) "
                                     "or --repeated-times keep-last")
                owner[t] = hs[0] if repeated_times == "keep-first" else hs[-1]
            elif old_owner.get(t) in hs:
                owner[t] = old_owner[t]
            else:
                owner[t] = hs[0]
            dropped += [{"time": t, "path": shown[h]} for h in hs if h != owner[t]]
        need = {t for t, o in owner.items() if o in fresh_set or old_owner.get(t) != o or t not in old_lines}
        to_run = [a for a in used if any(owner[t] == a for t in entries[a]["times"] if t in need)]

        # ---- compute what is needed, keep the rest as text
        blocks = {t: old_lines[t] for t in owner if t not in need}
        new_prov = {}
        base_prov = state.get("provenance", {}) if state else {}
        if to_run:
            prog = engine.Progress(quiet=quiet)
            with scheduler_context(workers, scheduler, cfg):
                for group in _disjoint_groups(to_run, {a: entries[a]["times"] for a in to_run}):
                    outcome = engine.track([shown[a] for a in group], cfg, metric_ids=ids, label=source,
                                           sectors=secs, overrides=overrides_cli, progress=prog,
                                           on_bad_file="stop")
                    lines = O.sorted_lines(outcome)
                    if header is not None and lines[0] != header:
                        raise InputError(f"{shown[group[0]]}: its columns ({lines[0]}) differ from those of {output} "
                                         f"({header}); rerun with --rebuild")
                    header = lines[0]
                    got = _group_lines(lines[1:], source)
                    for a in group:
                        for t in entries[a]["times"]:
                            if t in need and owner[t] == a:
                                blocks[t] = got.get(t, [])
                    for inp in outcome.provenance["inputs"]:
                        new_prov[inp["path"]] = inp
                    base_prov = {k: outcome.provenance[k] for k in
                                 ("calendar", "metrics", "sectors", "extra_key_columns")}
            prog.done(sum(len(blocks[t]) for t in need if t in blocks))
        if header is None:
            raise InputError(f"{output}: no rows to write and no header known; rerun with --rebuild")

        order = sorted(owner, key=time_key)
        body = [ln for t in order for ln in blocks.get(t, [])]
        text = "\n".join([header, *body]) + "\n"

        # ---- state bookkeeping
        for a in used:
            entries[a]["owned"] = [t for t in entries[a]["times"] if owner[t] == a]
            if a in new_prov:
                entries[a]["provenance"] = new_prov[a]
        prov = {
            "tool": "circtrack",
            "command": ["circtrack", *sys.argv[1:]],
            "columns": header.split(","),
            "parameters": cfg,
            "inputs": [entries[a].get("provenance", {"path": a}) for a in used],
            "skipped_inputs": skipped,
            "duplicate_time_steps_dropped": dropped,
            "calendar": base_prov.get("calendar"),
            "time_span": [order[0], order[-1]] if order else None,
            "time_steps": len(order),
            "metrics": base_prov.get("metrics", ids),
            "sectors": base_prov.get("sectors", {}),
            "extra_key_columns": base_prov.get("extra_key_columns", []),
            "updated_incrementally": {"processed": [shown[a] for a in to_run], "removed": removed},
        }
        from circtrack import __version__

        prov = {"tool": "circtrack", "version": __version__, **{k: v for k, v in prov.items() if k != "tool"},
                "libraries": O.library_versions()}
        new_state = {
            "version": STATE_VERSION, "params_hash": phash, "source": source, "metrics": ids,
            "csv_sha256": _sha_text(text), "provenance": base_prov,
            "files": {a: entries[a] for a in ab},
        }
        O.atomic_write_text(output, text, before_replace=lambda: _pause_point("before-csv-rename"))
        O.atomic_write_text(O.sidecar_path(output), json.dumps(prov, indent=2, default=str) + "\n")
        _pause_point("before-state-write")
        O.atomic_write_text(sp, json.dumps(new_state, indent=1, default=str) + "\n")
        if not quiet:
            echo(f"circtrack: updated {output}: {len(to_run)} file(s) processed, {len(unchanged)} kept, "
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

