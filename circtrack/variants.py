"""Variants: several settings of the same run, computed from one read of the data.

In: ``--vary KEY=V1,V2,...`` options and the config's ``[vary]`` table (KEY a config key such as
``cells.level_hpa``; values written as in the config file). Out: ``cfg["vary"]``, a plain
``{key: [values]}`` (validated like config values), and :func:`expand`, the list of
:class:`Variant` (name, settings, full config) in a fixed order: the product of the values, keys in
alphabetical order, values in the order given.

A variant's name is what its rows carry in the ``variant`` column: ``KEY=VALUE`` for every varied
key, keys in alphabetical order, joined by one space, e.g. ``cells.level_hpa=400 jets.upper_level_hpa=250``.
Numbers are written shortest (``400``, ``0.25``), lists as ``[10 60]``, text as it is. The variant
whose settings equal the run's own configuration has no special name: it names its settings like
every other variant (``cells.level_hpa=500``); :func:`base_name` tells which one it is, if any.

Settings read inside the read tasks (the reducers of eddy fluxes, waves, energy transport, jet
cores), settings that change how the data are read (``run.*`` other than the quality thresholds,
the low-pass filter) and tables that are not parameters cannot vary: :func:`check_keys` refuses
them with one line. Families declare the settings their reducers read (``reducer_keys``).
"""

from __future__ import annotations

import copy
import itertools
import tomllib
from dataclasses import dataclass

from circtrack.errors import UsageError

# tables whose keys are not parameters of a definition
FIXED_TABLES = ("variables", "sectors", "cluster", "vary")
# run.* keys that are quality thresholds of the definitions (the rest say how the data are read)
RUN_KEYS = ("run.min_coverage", "run.min_window_fraction", "run.level_tolerance_hpa")
# settings the planning stage uses (the low-pass filter reaches across batches)
PLAN_KEYS = ("jets.eddy_lowpass_days", "jets.eddy_lowpass_half_width_days")


@dataclass(frozen=True)
class Variant:
    name: str          # the value of the variant column
    settings: dict     # key -> value
    cfg: dict          # the full config of this variant


def format_value(v):
    """Stable, readable, comma-free text of one setting value."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return str(int(v)) if v.is_integer() and abs(v) < 1e15 else repr(v)
    if isinstance(v, list):
        return "[" + " ".join(format_value(x) for x in v) + "]"
    return str(v)


def name_of(settings):
    return " ".join(f"{k}={format_value(settings[k])}" for k in sorted(settings))


def _split_values(text):
    """``V1,V2,...`` split at commas outside brackets and quotes."""
    parts, depth, quote, cur = [], 0, None, ""
    for ch in text:
        if quote:
            quote = None if ch == quote else quote
        elif ch in "\"'":
            quote = ch
        elif ch == "[":
            depth += 1
        elif ch == "]":
            depth -= 1
        elif ch == "," and depth == 0:
            parts.append(cur.strip())
            cur = ""
            continue
        cur += ch
    parts.append(cur.strip())
    return parts


def _lookup(defaults, key, where):
    section, _, name = key.partition(".")
    if section in FIXED_TABLES:
        raise UsageError(f"{where}: [{section}] holds no definition setting and cannot vary; run once per choice")
    if not name or section not in defaults or not isinstance(defaults[section], dict) or \
            name not in defaults[section]:
        raise UsageError(f"{where}: unknown setting '{key}'; give a key of the config file as SECTION.NAME, "
                         "e.g. cells.level_hpa (configs/default.toml lists them)")
    if (section == "run" and key not in RUN_KEYS) or key in PLAN_KEYS:
        raise UsageError(f"{where}: '{key}' says how the data are read, not how an index is defined, and cannot "
                         "vary within one run; run once per setting (-c CONFIG)")
    return defaults[section][name]


def check_value(defaults, key, value, where):
    """``value`` validated like the config file's value of ``key`` (same kind, windows ordered, ...)."""
    from circtrack.config import merge

    section, _, name = key.partition(".")
    _lookup(defaults, key, where)
    try:
        merged = merge(defaults, {section: {name: value}})
    except UsageError as e:
        raise UsageError(f"{where}: {e}") from None
    value, default = merged[section][name], defaults[section][name]
    if isinstance(default, float) and isinstance(value, int) and not isinstance(value, bool):
        value = float(value)                # 400 and 400.0 are one setting
    return value


def parse_option(text, defaults):
    """One ``--vary KEY=V1,V2,...`` -> ``(key, [values])``, each value parsed as in a TOML file."""
    where = f"--vary '{text}'"
    if "=" not in text:
        raise UsageError(f"{where}: expected KEY=V1,V2,..., e.g. --vary cells.level_hpa=400,500,600")
    key, raw = (x.strip() for x in text.split("=", 1))
    _lookup(defaults, key, where)
    values = []
    for part in _split_values(raw):
        if not part:
            raise UsageError(f"{where}: an empty value; give values separated by commas, e.g. {key}=400,500")
        try:
            v = tomllib.loads(f"v = {part}")["v"]
        except tomllib.TOMLDecodeError:
            try:       # bare text such as remove_net_flux: as if quoted
                v = tomllib.loads(f'v = "{part}"')["v"] if '"' not in part else None
            except tomllib.TOMLDecodeError:
                v = None
            if v is None:
                raise UsageError(f"{where}: '{part}' is not a value as in the config file (numbers, \"text\", "
                                 "[low, high])") from None
        values.append(check_value(defaults, key, v, where))
    return key, values


def from_table(table, defaults):
    """The config's ``[vary]`` table -> ``{key: [values]}``; dotted keys may be quoted or nested."""
    flat = {}

    def walk(prefix, t):
        for k, v in t.items():
            key = f"{prefix}.{k}" if prefix else k
            if isinstance(v, dict):
                walk(key, v)
            else:
                flat[key] = v
    walk("", table)
    out = {}
    for key, vals in flat.items():
        where = f"[vary] {key} in the config"
        if not isinstance(vals, list) or not vals:
            raise UsageError(f"{where}: expected a list of values, e.g. \"cells.level_hpa\" = [400.0, 500.0]")
        _lookup(defaults, key, where)
        out[key] = [check_value(defaults, key, v, where) for v in vals]
    return out


def apply(cfg, options):
    """``cfg["vary"]`` from the config's ``[vary]`` and the ``--vary`` options (an option replaces
    the same key of the config). Returns cfg."""
    from circtrack.config import defaults as _defaults

    base = _defaults()
    vary = from_table(cfg.get("vary", {}), base)
    for text in options or ():
        key, values = parse_option(text, base)
        vary[key] = values
    for key, values in vary.items():
        if len({format_value(v) for v in values}) != len(values):
            raise UsageError(f"--vary {key}: a value is given twice; give each value once")
    cfg["vary"] = vary
    return cfg


def expand(cfg):
    """The variants of ``cfg`` (empty list when nothing varies): product of the values, keys sorted."""
    if not cfg.get("vary"):
        return []
    from circtrack.config import defaults as _defaults

    vary = from_table(cfg["vary"], _defaults())      # as written in a config file, or already checked
    keys = sorted(vary)
    out = []
    for combo in itertools.product(*[vary[k] for k in keys]):
        settings = dict(zip(keys, combo))
        vc = copy.deepcopy(cfg)
        for k, v in settings.items():
            section, _, name = k.partition(".")
            vc[section][name] = v
        vc["vary"] = {}
        out.append(Variant(name_of(settings), settings, vc))
    return out


def base_name(cfg):
    """Name of the variant whose settings equal ``cfg``'s own values (None when no variant does)."""
    for v in expand(cfg):
        if all(format_value(cfg[k.split(".")[0]][k.split(".", 1)[1]]) == format_value(val)
               for k, val in v.settings.items()):
            return v.name
    return None


def check_keys(cfg, families):
    """Refuse varied keys the chosen families' in-task reducers read (one line, exit 2)."""
    keys = sorted((cfg.get("vary") or {}))
    if not keys:
        return
    for fam in families:
        if not fam.reducers:
            continue
        declared = getattr(fam, "reducer_keys", None)
        if declared is None:
            raise UsageError(f"--vary: the {fam.name} family reduces inside the read tasks and does not say which "
                             f"settings it reads; leave its metrics out with --metrics, or run once per setting")
        clash = [k for k in keys if k in declared]
        if clash:
            ids = ", ".join(m.id for m in fam.metrics)
            raise UsageError(f"--vary {clash[0]}: this setting is read inside the read tasks ({ids}), once per run; "
                             "run once per setting (-c CONFIG), or leave those metrics out with --metrics")
