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

from circtrack.errors import CircError, ManyLines, UsageError


def one_line(text):
    """``text`` with line breaks and other control characters shown as escapes: always one line."""
    return "".join(c if c == "\t" or not (ord(c) < 32 or ord(c) == 127) else repr(c)[1:-1] for c in str(text))


def _fail(message, code, several=False):
    for line in (str(message).split("\n") if several else [message]):
        click.echo(f"circtrack: error: {one_line(line)}", err=True)
    sys.exit(code)


# exit status when the reader of standard output goes away (``circtrack metrics | head -1``): the
# shell's status for a process ended by SIGPIPE, 128 + 13, as 'cat' or 'yes' give; nothing on stderr
BROKEN_PIPE_EXIT = 141

# optional packages and the 'pip install' that adds each (import name -> what to install)
INSTALL_HINTS = {
    "zarr": "pip install zarr",
    "cfgrib": "pip install 'circtrack[grib]'",
    "eccodes": "pip install 'circtrack[grib]'",
    "gribapi": "pip install 'circtrack[grib]'",
    "dask_jobqueue": "pip install 'circtrack[cluster]'",
    "h5netcdf": "pip install h5netcdf",
    "netCDF4": "pip install netCDF4",
    "matplotlib": "pip install matplotlib",
    "scipy": "pip install scipy",
    "distributed": "pip install distributed",
}


def _broken_pipe():
    """The reader of stdout has gone: end quietly. Point stdout at /dev/null so that Python's own
    flush at exit does not report the broken pipe again."""
    import os

    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):
        pass
    sys.exit(BROKEN_PIPE_EXIT)


def _missing_package(e):
    """One line for a package that is not installed, naming the 'pip install' that adds it."""
    name = (getattr(e, "name", None) or "").split(".")[0]
    text = str(e).splitlines()[0] if str(e) else ""
    if not name:
        for known in INSTALL_HINTS:
            if known in text:
                name = known
                break
    if name not in INSTALL_HINTS:
        return None
    return f"this needs the package '{name}', which is not installed; install it with: {INSTALL_HINTS[name]}"


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
            _fail(str(e), e.exit_code, isinstance(e, ManyLines))
        except KeyboardInterrupt:
            _fail("interrupted; the previous output is untouched", 130)
        except BrokenPipeError:
            _broken_pipe()
        except (click.exceptions.Exit, click.ClickException, SystemExit):
            raise
        except ImportError as e:
            if debug:
                traceback.print_exc()
            hint = _missing_package(e)
            if hint is None:
                raise
            _fail(hint, 1)
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


UNIT_KEYS_COORDS = ("lat", "plev", "time", "calendar")


def apply_units(cfg, pairs=(), levels=()):
    """``--units ROLE=UNITS`` and ``--level NAME=HPA`` into ``cfg["units"]``/``cfg["levels"]`` (the
    command line wins over the config); both tables are checked here, one line per mistake."""
    from circtrack.inputs.rules import VARIABLES

    units = dict(cfg.get("units", {}))
    for p in pairs:
        if "=" not in p:
            raise UsageError(f"--units '{p}': expected ROLE=UNITS, e.g. --units ta=K or "
                             "--units time=\"months since 1988-01-01\"")
        key, val = (x.strip() for x in p.split("=", 1))
        units[key] = val.strip('"').strip("'")
    for key, val in units.items():
        if key not in VARIABLES and key not in UNIT_KEYS_COORDS:
            raise UsageError(f"units for '{key}' (--units or [units]): unknown role; give one of "
                             f"{' '.join(VARIABLES)} {' '.join(UNIT_KEYS_COORDS)}")
        if not isinstance(val, str) or (not val.strip() and key != "hus"):
            raise UsageError(f"units for '{key}' (--units or [units]): expected text, e.g. {key} = \"K\"")
        _check_known_units(key, val)
    lev = dict(cfg.get("levels", {}))
    for p in levels:
        name, _, val = p.partition("=")
        try:
            lev[name.strip()] = float(val)
        except ValueError:
            raise UsageError(f"--level '{p}': expected NAME=HPA, the variable's name in the file and its pressure "
                             "level in hPa, e.g. --level U=300") from None
    for name, val in lev.items():
        if isinstance(val, bool) or not isinstance(val, (int, float)) or not 0 < float(val) <= 1100:
            raise UsageError(f"level of '{name}' (--level or [levels]) = {val!r}: expected a pressure in hPa "
                             "between 0 and 1100, e.g. U = 300.0")
    cfg["units"], cfg["levels"] = units, {k: float(v) for k, v in lev.items()}
    return cfg


def _check_known_units(key, val):
    """Units circtrack cannot read are refused at once (not after opening the files)."""
    from circtrack.inputs import units as U
    from circtrack.inputs.rules import VARIABLES

    if key in VARIABLES:
        kind = VARIABLES[key]["kind"]
        if U.conversion(val, kind) is None:
            known = sorted({U.preferred(kind, v) or k[0] for k, v in U.TABLE[kind].items()})
            raise UsageError(f"--units {key}={val}: not a unit circtrack knows for {kind.replace('_', ' ')}; "
                             f"known: {', '.join(known)}")
    elif key == "plev" and U.conversion(val, "pressure") is None:
        raise UsageError(f"--units plev={val}: expected pressure units (Pa, hPa, kPa)")
    elif key == "lat" and val.strip().lower() not in ("radians", "radian", "rad", "degrees_north", "degrees",
                                                       "degree_north"):
        raise UsageError(f"--units lat={val}: expected degrees_north or radians")
    elif key == "time" and " since " not in f" {val.lower()} ":
        raise UsageError(f"--units time={val}: expected a CF time unit, e.g. --units time=\"days since 1979-01-01\"")


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
        except BrokenPipeError:
            _broken_pipe()
        except click.ClickException as e:      # e.g. a file argument click could not open
            _fail(e.format_message(), e.exit_code)
        except SystemExit as e:
            # click's own broken-pipe exit: status 1 with stdout wrapped so that it stays quiet
            if e.code == 1 and type(sys.stdout).__name__.endswith("PacifyFlushWrapper"):
                _broken_pipe()
            raise
        try:
            sys.stdout.flush()             # a closed pipe shows here when the output was small
        except BrokenPipeError:
            _broken_pipe()
        code = rv if isinstance(rv, int) else 0
        if args is None and OUTPUTS_CLOSED["done"]:     # the program itself (not a caller such as CliRunner)
            end_without_teardown(code)
        sys.exit(code)


# set by a command when every file it wrote is committed and closed (``track``): the process may then
# end without the interpreter's teardown (:func:`end_without_teardown`)
OUTPUTS_CLOSED = {"done": False}


def end_without_teardown(code):
    """End the process now: the atexit handlers run and stdout/stderr are flushed as at a normal exit,
    but Python's teardown of every module and object is skipped; it frees nothing the system does not
    free at exit, and with pandas, xarray, dask and netCDF4 loaded it cost about 0.2 s of CPU, a tenth
    of a short run. Returns (a normal exit follows) while any other thread runs, since the interpreter
    would wait for it, or when stdout/stderr cannot be flushed."""
    import atexit
    import os
    import threading

    if threading.active_count() > 1:
        return
    atexit._run_exitfuncs()            # e.g. logging's flush; they are not run again by a normal exit
    try:
        sys.stdout.flush()
        sys.stderr.flush()
    except (OSError, ValueError):
        return
    os._exit(code)


def track_options(fn):
    """The options shared by ``track`` and ``update`` (PATH..., -o, -c, --var, --metrics, ...)."""
    opts = [
        click.argument("paths", nargs=-1, required=True),
        click.option("-o", "--output", "output", required=True, help="Output CSV path, or - for stdout."),
        click.option("-c", "--config", "config", default=None, help="TOML file overriding configs/default.toml."),
        click.option("--var", "variables", multiple=True, metavar="ROLE=NAME",
                     help="Use variable NAME for ROLE (ua va ta zg hus ps uas vas psl pr evspsbl rlut)."),
        click.option("--units", "units", multiple=True, metavar="ROLE=UNITS",
                     help="Units replacing what the file says for a role or coordinate (lat, plev; time as a full "
                          "CF unit, e.g. --units time=\"months since 1988-01-01\"; calendar, e.g. --units "
                          "calendar=360_day); circtrack never guesses them. Also [units] in the config."),
        click.option("--level", "levels", multiple=True, metavar="NAME=HPA",
                     help="Pressure level (hPa) of variable NAME, which has no level axis (e.g. --level U=300); "
                          "a variable above run.near_surface_min_hpa never stands for a near-surface role. "
                          "Also [levels] in the config."),
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
        click.option("-q", "--quiet", is_flag=True, help="No progress output (the end-of-run summary stays)."),
        click.option("--fail-on-empty", "fail_on_empty", is_flag=True,
                     help="Exit 1 (after writing the output) when a metric has no value in any row, e.g. for "
                          "cron or make; the end-of-run summary names it and its most common flag."),
    ] + STORAGE_OPTIONS
    for o in reversed(opts):
        fn = o(fn)
    return fn


# inputs in object storage (s3://, https://); they change how inputs are reached, never the rows
STORAGE_OPTIONS = [
    click.option("--anonymous", is_flag=True, default=False,
                 help="Read s3:// URLs of a public bucket without credentials."),
    click.option("--cache-dir", "cache_dir", default=None, metavar="DIR",
                 help="Keep whole-object local copies of netCDF objects from s3:// or https:// URLs in DIR "
                      "(default: read byte ranges, copy nothing)."),
]


def storage_options(fn):
    """--anonymous and --cache-dir (for commands that have no track_options, e.g. scan)."""
    for o in reversed(STORAGE_OPTIONS):
        fn = o(fn)
    return fn


def apply_storage(cfg, anonymous=False, cache_dir=None):
    """The storage options of the command line into ``cfg["storage"]`` (they win over the config)."""
    if anonymous:
        cfg["storage"]["anonymous"] = True
    if cache_dir:
        cfg["storage"]["cache_dir"] = str(cache_dir)
    return cfg
