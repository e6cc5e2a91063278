"""The one metric registry: the CLI, the ``metrics`` listing, CSV units and the docs come from here.

A *family* computes several metrics that share work (e.g. the streamfunction feeds the Hadley
edge, its strength and the cell boundary). Families declare the input roles (CMIP short names)
and the pressure levels they need, so the engine reads nothing more.

This module holds the records and the decorator only and imports no metric module (they import
it); :mod:`circtrack.metrics` imports the family modules and assembles the catalogue.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np


@dataclass(frozen=True)
class Metric:
    """One catalogue entry."""

    id: str
    long_name: str
    units: str
    scope: str            # "hemisphere" (rows NH and SH) or "global" (one row)
    definition: str
    reference: str
    family: str = ""
    inputs: tuple = ()
    sectors: bool = False  # may be computed per longitude sector


@dataclass
class Result:
    """Values and flags of one metric for N samples: ``value (N, H)``, ``flag (N, H)`` (str)."""

    value: np.ndarray
    flag: np.ndarray

    @classmethod
    def empty(cls, n, h, flag="ok"):
        return cls(np.full((n, h), np.nan), np.full((n, h), flag, dtype=object))


@dataclass
class Family:
    name: str
    inputs: tuple                      # roles, e.g. ("va",)
    levels: Callable                   # cfg -> {role: list of hPa levels, or None for all}
    compute: Callable                  # (fields, cfg) -> {metric_id: Result}
    sectors: bool = False
    metrics: list = field(default_factory=list)
    optional_inputs: tuple = ()
    # name -> module-level fn(slabs, plev, lon, masks, cfg) run inside each read task on the full
    # fields (not zonal means): e.g. zonal means of products, per-longitude features. Returns an
    # array (t, *extra, *rest, S); the family sees fields.extras[name] as (N, *rest) per sector.
    # A reducer with a keyword parameter ``lat`` also receives the ascending latitudes (J,).
    reducers: dict = field(default_factory=dict)
    # the config keys ("section.name") the reducers read; None: not declared (--vary then refused)
    reducer_keys: tuple | None = None


_FAMILIES: dict[str, Family] = {}
_METRICS: dict[str, Metric] = {}


def register_family(name, *, inputs, levels, sectors=False, metrics, optional_inputs=(), reducers=None,
                    reducer_keys=None):
    """Decorator registering a family's compute function and the metrics it produces."""

    def wrap(fn):
        fam = Family(name, tuple(inputs), levels, fn, sectors, [], tuple(optional_inputs), dict(reducers or {}),
                     None if reducer_keys is None else tuple(reducer_keys))
        for m in metrics:
            m = Metric(**{**m.__dict__, "family": name, "inputs": tuple(inputs), "sectors": sectors})
            if m.id in _METRICS:
                raise ValueError(f"metric id {m.id} registered twice")
            _METRICS[m.id] = m
            fam.metrics.append(m)
        _FAMILIES[name] = fam
        return fn

    return wrap


def registered_metrics() -> dict[str, Metric]:
    """The metrics registered so far, by id, in registration order (the full catalogue is
    :func:`circtrack.metrics.catalogue`, which imports every family module first)."""
    return dict(_METRICS)


def registered_families() -> dict[str, Family]:
    """The families registered so far (see :func:`circtrack.metrics.families`)."""
    return dict(_FAMILIES)


def hemispheres(metric: Metric):
    return ("NH", "SH") if metric.scope == "hemisphere" else ("global",)
