"""What every command shares: one clear error line and exit status, ROLE=NAME parsing, and the
options of `track` and `update`.

Kept apart from circtrack.cli so command modules (findings, update) can import it while cli.py
imports them, whichever module Python loads first (``python -m circtrack.cli`` included).
"""

from __future__ import annotations

import functools
import logging
import os
import sys
import warnings
import traceback

import click

from circtrack.errors import CircError, UsageError


def one_line(text):
    """``text`` with line breaks and other control characters shown as escapes: always one line."""
    return "".join(c if c == "\t" or not (ord(c) < 32 or ord(c) == 127) else repr(c)[1:-1] for c in str(text))


def _fail(message, code):
    click.echo(f"circtrack: error: {one_line(message)}", err=True)
    sys.exit(code)


def _one_line_notes(quiet):
    """Library warnings (numpy, cftime, matplotlib, ...) as one ``circtrack: note:`` line each, once;
    none at all with ``--quiet``. Call inside ``warnings.catch_warnings()``."""
    if quiet:
        warnings.simplefilter("ignore")
        logging.getLogger("matplotlib").setLevel(logging.ERROR)
        return
    warnings.simplefilter("always")
    seen = set()

    def show(message, category, filename, lineno, file=None, line=None):
        text = " ".join(str(message).split()) or category.__name__
        where = os.path.basename(os.path.dirname(filename)) or "python"
        note = f"{text} ({category.__name__} from {where})"
        if note not in seen:
            seen.add(note)
            click.echo(f"circtrack: note: {note}", err=True)

    warnings.showwarning = show


def guarded(fn):
    """One clear line and an exit status for every failure; a traceback only with --debug.
    Library warnings become one-line notes (none with --quiet)."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        debug = click.get_current_context().find_root().params.get("debug", False)
        try:
            with warnings.catch_warnings():
                _one_line_notes(bool(kwargs.get("quiet")))
                return fn(*args, **kwargs)
        except CircError as e:
            if debug:
                traceback.print_exc()
            _fail(str(e), e.exit_code)
        except KeyboardInterrupt:
            _fail("interrupted; the previous output is untouched", 130)
        except (click.exceptions.Exit, click.ClickException, SystemExit):
            raise
        except Exception as e:  # pragma: no cover - the safety net
            if debug:
                traceback.print_exc()
            first = str(e).splitlines()[0] if str(e) else ""
            _fail(f"unexpected {type(e).__name__}: {first} (rerun with --debug for the traceback and report it)", 1)

    return wrapper


def parse_vars(pairs):
    from circtrack.config import check_role

    out = {}
    for p in pairs:
        if "=" not in p:
            raise UsageError(f"--var '{p}': expected ROLE=NAME, e.g. --var ua=U")
        role, name = (x.strip() for x in p.split("=", 1))
        check_role(role, f"--var '{p}'")
        out[role] = name
    return out


class OneLineGroup(click.Group):
    """A click group whose usage errors (unknown option, bad choice, missing argument) are one
    ``circtrack: error:`` line with exit status 2, like every other error, not click's usage block."""

    def main(self, args=None, prog_name=None, **kwargs):
        kwargs.pop("standalone_mode", None)
        try:
            rv = super().main(args=args, prog_name=prog_name, standalone_mode=False, **kwargs)
        except click.UsageError as e:
            where = e.ctx.command_path if e.ctx is not None else "circtrack"
            _fail(f"{e.format_message()} (see '{where} --help')", 2)
        except click.exceptions.Abort:
            _fail("interrupted; the previous output is untouched", 130)
        except click.ClickException as e:      # e.g. a file argument click could not open
            _fail(e.format_message(), e.exit_code)
        sys.exit(rv if isinstance(rv, int) else 0)


def track_options(fn):
    """The options shared by ``track`` and ``update`` (PATH..., -o, -c, --var, --metrics, ...)."""
    opts = [
        click.argument("paths", nargs=-1, required=True),
        click.option("-o", "--output", "output", required=True, help="Output CSV path, or - for stdout."),
        click.option("-c", "--config", "config", default=None, help="TOML file overriding configs/default.toml."),
        click.option("--var", "variables", multiple=True, metavar="ROLE=NAME",
                     help="Use variable NAME for ROLE (ua va ta zg hus ps uas vas psl pr evspsbl rlut)."),
        click.option("--metrics", "metrics", default=None, metavar="ID,...", help="Comma-separated metric ids (default: all)."),
        click.option("--label", default=None, help="Value of the 'source' column (default: derived from the inputs)."),
        click.option("--sector", "sectors", multiple=True, metavar="NAME=LON0:LON1",
                     help="Also compute sector metrics for this longitude band."),
        click.option("--workers", type=click.IntRange(1), default=None, help="Start a local dask.distributed cluster of N worker processes."),
        click.option("--scheduler", default=None, metavar="ADDRESS", help="Use a running dask.distributed scheduler."),
        click.option("--on-bad-file", type=click.Choice(["stop", "skip"]), default=None,
                     help="Stop at an unreadable input (default) or skip it and report it."),
        click.option("--repeated-times", type=click.Choice(["refuse", "keep-first", "keep-last"]), default=None,
                     help="A time step found in two files with different values: refuse (default) or keep the "
                          "one from the file given first/last."),
        click.option("--vary", "vary", multiple=True, metavar="KEY=V1,V2,...",
                     help="Compute with each of these values of config KEY (e.g. cells.level_hpa=400,500,600) from "
                          "one read of the data; repeat for every combination; rows get a 'variant' column."),
        click.option("-q", "--quiet", is_flag=True, help="No progress output."),
    ]
    for o in reversed(opts):
        fn = o(fn)
    return fn
