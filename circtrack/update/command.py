"""The ``circtrack update`` click command; its options are those of ``track`` (cli_support.py)."""

from __future__ import annotations

import click

from circtrack.cli_support import guarded, track_options
from circtrack.update.steps import run_update


def make_command():
    """The click command (circtrack.cli adds it to the group)."""

    @click.command("update")
    @track_options
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

