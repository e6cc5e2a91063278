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
            if where in ("config.variables", "config.sectors"):
                out[key] = val
                continue
            raise UsageError(f"unknown key '{key}' in {where}; known keys: {', '.join(sorted(base))}")
        if isinstance(out[key], dict):
            if not isinstance(val, dict):
                raise UsageError(f"'{key}' in {where} must be a table [{key}]")
            out[key] = merge(out[key], val, f"{where}.{key}")
        else:
            out[key] = val
    return out


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
