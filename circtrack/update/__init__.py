"""Incremental ``circtrack update``: process only new or changed inputs, keep the rest of OUT as it is.

Beside ``OUT.csv`` live ``OUT.state.json`` (what each input file was and which time steps it
contributed, the parameter hash, the source label and a SHA-256 of the CSV) and ``OUT.lock``
(``fcntl.lockf``, a record lock owned by this process alone: forked workers never share it and it
ends with the process, so two cron jobs never write at once and a dead run never blocks the next).
CSV, sidecar and state are all written and synced to temporary files first, then renamed in that
order, the state last (``output.commit``). If a run dies before the CSV is renamed into place,
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
exactly that moment. Phases: ``before-csv-rename`` (the new CSV, sidecar and state are written to their
temp files and synced, none renamed yet) and ``before-state-write`` (CSV and sidecar renamed into
place, the state not yet renamed).

Layout: state.py (the state file, lock, checksums and small helpers), steps.py (the steps of one
update: load state -> diff inputs -> plan the time steps to recompute -> run the engine -> merge
-> write atomically), command.py (the click command).
"""

from circtrack.update.command import make_command
from circtrack.update.state import (PAUSE_ENV, PAUSE_PHASES, STATE_VERSION, _sha_text, acquire_lock, checksum,
                                    file_record, lock_path, params_hash, state_path, time_key)
from circtrack.update.steps import run_update

__all__ = ["PAUSE_ENV", "PAUSE_PHASES", "STATE_VERSION", "_sha_text", "acquire_lock", "checksum", "file_record",
           "lock_path", "make_command", "params_hash", "run_update", "state_path", "time_key"]
