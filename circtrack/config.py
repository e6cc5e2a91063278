"""Parameters: the packaged defaults merged with a user TOML file and command-line overrides."""

from __future__ import annotations

import copy
import math
import os
import tomllib
from importlib import resources
from pathlib import Path

from circtrack.errors import UsageError


def defaults() -> dict:
    text = resources.files("circtrack").joinpath("data/default.toml").read_text()
    return tomllib.loads(text)


def merge(base: dict, extra: dict, where="config") -> dict:
    """Recursively merge ``extra`` into a copy of ``base``; unknown sections or keys are an error."""
    out = copy.deepcopy(base)
    for key, val in extra.items():
        if key not in out:
            if where in ("config.variables", "config.sectors", "config.units", "config.levels", "config.vary"):
                out[key] = val
                continue
            raise UsageError(f"unknown key '{key}' in {where}; known keys: {', '.join(sorted(base))}")
        if isinstance(out[key], dict):
            if not isinstance(val, dict):
                raise UsageError(f"'{key}' in {where} must be a table [{key}]")
            out[key] = merge(out[key], val, f"{where}.{key}")
        else:
            out[key] = _checked(out[key], val, f"{where}.{key}")
    return out


def _checked(default, val, where):
    """``val`` if it has the kind of value the default has (number, text, list of numbers, ...)."""
    def kind(v):
        if isinstance(v, bool):
            return "true or false"
        if isinstance(v, (int, float)):
            return "a number"
        if isinstance(v, str):
            return "text in quotes"
        if isinstance(v, list):
            return "a list"
        return type(v).__name__

    name = where.replace("config.", "", 1)
    if kind(default) != kind(val):
        raise UsageError(f"{name} = {val!r} in the config: expected {kind(default)}, like the default {default!r}")
    if isinstance(default, list) and default and isinstance(val, list):
        if len(val) != len(default) and all(isinstance(x, (int, float)) for x in default) and len(default) == 2:
            raise UsageError(f"{name} = {val!r} in the config: expected two numbers [low, high]")
        for x in val:
            if default and kind(x) != kind(default[0]):
                raise UsageError(f"{name} = {val!r} in the config: expected a list of {kind(default[0])}s")
        if len(default) == 2 and all(isinstance(x, (int, float)) for x in val) and len(val) == 2 and \
                name.endswith(("window", "_hpa")) and val[0] > val[1]:
            raise UsageError(f"{name} = {val!r} in the config: give the lower bound first, e.g. [{val[1]!r}, {val[0]!r}]")
    return val


COORDINATE_ROLES = ("time", "lat", "lon", "plev")


def check_role(role, where):
    """``role`` is a variable role (CMIP short name) or a coordinate; UsageError naming ``where`` otherwise."""
    from circtrack.inputs.rules import VARIABLES

    if role not in VARIABLES and role not in COORDINATE_ROLES:
        raise UsageError(f"{where}: unknown role '{role}'; roles are {' '.join(VARIABLES)} "
                         f"(and the coordinates {' '.join(COORDINATE_ROLES)})")


def check_sector_name(name, where):
    """A sector name: letters, digits, '_' or '-', not 'zonal' (the full circle), and a valid CSV text field."""
    from circtrack.guards import check_label

    if not name or name == "zonal" or not name.replace("_", "").replace("-", "").isalnum():
        raise UsageError(f"{where}: the sector name must be letters, digits, '_' or '-' and not 'zonal' "
                         "(reserved for the full circle)")
    check_label(name, where, "rename the sector, e.g. with letters and '_' only")


def _non_finite(value, where=""):
    """The first key whose number is NaN or infinite (TOML allows nan and inf), or None."""
    if isinstance(value, dict):
        for k, v in value.items():
            hit = _non_finite(v, f"{where}.{k}" if where else k)
            if hit:
                return hit
    elif isinstance(value, list):
        for v in value:
            hit = _non_finite(v, where)
            if hit:
                return hit
    elif isinstance(value, float) and not math.isfinite(value):
        return where
    return None


def _validate(cfg, user):
    """Values that have the right kind but cannot work, refused before anything is read."""
    bad = _non_finite(user)
    if bad:
        raise UsageError(f"{bad} in the config: not a finite number (nan or inf); give a number")
    run = cfg["run"]
    procs = run.get("processes", 0)
    if not isinstance(procs, int) or procs < 0:    # more than the cores: capped at the core count by the engine
        raise UsageError(f"run.processes = {procs!r} in the config: give a whole number, 0 for one per core "
                         f"(at most {os.cpu_count() or 1} are used here)")
    for key, low in (("chunk_cache_bytes", 0), ("time_chunk", 1), ("batch_time_steps", 0)):
        v = run.get(key)
        if not isinstance(v, int) or v < low:
            raise UsageError(f"run.{key} = {v!r} in the config: give a whole number of at least {low} "
                             f"(default {defaults()['run'][key]})")
    choices = {"netcdf_engine": ("netcdf4", "h5netcdf"), "on_bad_file": ("stop", "skip"),
               "repeated_times": ("refuse", "keep-first", "keep-last"),
               "scheduler": ("processes", "threads", "sync")}
    for key, allowed in choices.items():
        if run.get(key) not in allowed:
            raise UsageError(f"run.{key} = {run.get(key)!r} in the config: use one of {', '.join(allowed)}")
    for key in ("level_tolerance_hpa", "min_coverage", "min_window_fraction"):
        if run.get(key, 0) < 0:
            raise UsageError(f"run.{key} = {run[key]!r} in the config: give a number of at least 0")
    timeout = cfg.get("cluster", {}).get("connect_timeout_s", 30.0)
    if timeout <= 0:
        raise UsageError(f"cluster.connect_timeout_s = {timeout!r} in the config: give a positive number of seconds")
    for role, name in (user.get("variables") or {}).items():
        check_role(role, f"[variables] {role} = {name!r} in the config")
        if not isinstance(name, str) or not name.strip():
            raise UsageError(f"[variables] {role} = {name!r} in the config: give the variable's name in quotes, "
                             f'e.g. {role} = "NAME"')
    for name, band in (user.get("sectors") or {}).items():
        where = f"[sectors] {name!r} in the config"
        check_sector_name(str(name), where)
        if (not isinstance(band, list) or len(band) != 2
                or not all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in band)):
            raise UsageError(f"{where}: expected two longitudes [LON0, LON1] in degrees east, e.g. {name} = [150.0, 240.0]")
        if (float(band[1]) - float(band[0])) % 360.0 == 0.0:
            raise UsageError(f"{where}: the band is empty or the full circle; use two different longitudes")


def load(path: str | None = None) -> dict:
    cfg = defaults()
    if path:
        p = Path(path)
        try:
            user = tomllib.loads(p.read_text())
        except FileNotFoundError:
            raise UsageError(f"{path}: config file not found; give the path of a TOML file (see configs/default.toml)")
        except IsADirectoryError:
            raise UsageError(f"-c {path}: is a directory; give the path of a TOML file, e.g. configs/default.toml")
        except PermissionError:
            raise UsageError(f"-c {path}: cannot be read (permission denied); make it readable or copy it")
        except UnicodeDecodeError:
            raise UsageError(f"-c {path}: not a text file; give a TOML file such as configs/default.toml")
        except OSError as e:
            raise UsageError(f"-c {path}: cannot be read ({e.strerror}); give the path of a TOML file")
        except tomllib.TOMLDecodeError as e:
            raise UsageError(f"{path}: not valid TOML ({e}); fix the line named or start from configs/default.toml")
        cfg = merge(cfg, user)
        _validate(cfg, user)
    return cfg
