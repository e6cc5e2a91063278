"""Parameters: the packaged defaults merged with a user TOML file and command-line overrides."""

from __future__ import annotations

import copy
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
            if where in ("config.variables", "config.sectors", "config.vary"):
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


def load(path: str | None = None) -> dict:
    cfg = defaults()
    if path:
        p = Path(path)
        try:
            user = tomllib.loads(p.read_text())
        except FileNotFoundError:
            raise UsageError(f"{path}: config file not found; give the path of a TOML file (see configs/default.toml)")
        except tomllib.TOMLDecodeError as e:
            raise UsageError(f"{path}: not valid TOML ({e}); fix the line named or start from configs/default.toml")
        cfg = merge(cfg, user)
    return cfg
