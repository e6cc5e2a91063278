"""Longitude sectors: ``--sector NAME=LON0:LON1`` and ``[sectors]`` -> bands and longitude masks.

In: the command-line texts and the config. Out: ``[(name, lon0, lon1), ...]`` and, per input
grid, boolean longitude masks (the full circle, ``None``, first) that the reduce tasks apply.
"""

from __future__ import annotations

import numpy as np

from circtrack.errors import UsageError


def parse_sector(text):
    """``NAME=LON0:LON1`` -> (name, lon0, lon1)."""
    try:
        name, rng = text.split("=", 1)
        a, b = rng.split(":", 1)
        lon0, lon1 = float(a), float(b)
    except ValueError:
        raise UsageError(f"--sector '{text}': expected NAME=LON0:LON1 in degrees east, e.g. pacific=150:240")
    name = name.strip()
    if not name or name == "zonal" or not name.replace("_", "").replace("-", "").isalnum():
        raise UsageError(f"--sector '{text}': the name must be letters, digits, '_' or '-' and not 'zonal'")
    if (lon1 - lon0) % 360.0 == 0.0:
        raise UsageError(f"--sector '{text}': the band is empty or the full circle; use two different longitudes")
    return name, lon0, lon1


def sector_mask(lon, lon0, lon1):
    """Longitudes inside the band going east from lon0 to lon1 (any convention, may cross 0 or 180)."""
    width = (lon1 - lon0) % 360.0
    return ((np.asarray(lon, float) - lon0) % 360.0) <= width + 1e-9


def sector_masks(lon, sectors):
    """The full circle (None) first, then one boolean longitude mask per sector."""
    return [None] + [sector_mask(lon, a, b) for _, a, b in sectors]


def merge_sectors(sectors, cfg):
    """The command line's sectors, then those of ``[sectors]`` in the config not named there."""
    return list(sectors) + [(k, float(v[0]), float(v[1])) for k, v in cfg.get("sectors", {}).items()
                            if k not in {s[0] for s in sectors}]


def masks_per_input(infos, sectors):
    """Longitude masks of every input; refuses a name given twice and a band holding no longitude."""
    names = [n for n, _, _ in sectors]
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise UsageError(f"sector name(s) {', '.join(dup)} given twice (--sector or [sectors]); give each band its own name")
    masks_of = [sector_masks(i.detected.lon, sectors) for i in infos]
    for inf, masks in zip(infos, masks_of):
        for (name, a, b), m in zip(sectors, masks[1:]):
            if not m.any():
                raise UsageError(f"--sector {name}={a:g}:{b:g} holds no grid longitude of {inf.path} "
                                 f"(longitudes every {np.median(np.abs(np.diff(inf.detected.lon))):g} deg); widen the band")
    return masks_of
