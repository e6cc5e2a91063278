"""Metric families. Each module registers its metrics in :mod:`circtrack.registry` on import;
importing this package imports every family module, so :func:`catalogue` and :func:`families`
are complete. A new family module is added to the import line below (and nowhere else).

:func:`groups` names the metrics that mark the same feature of the circulation by different
definitions (``circtrack spread`` gives their spread; ``circtrack metrics`` lists them).
"""

from dataclasses import dataclass

from circtrack.metrics import cells, jets, cores, momentum, surface, transport, tropopause, waves  # noqa: F401
from circtrack.registry import registered_families, registered_metrics


@dataclass(frozen=True)
class Group:
    """Metrics marking one feature by different definitions (same units and rows per hemisphere)."""

    id: str
    long_name: str
    metric_ids: tuple
    reference: str


_GROUPS = (
    Group("tropical_edge", "Poleward edge of the tropics",
          ("hadley_edge_lat", "surface_wind_zero_lat", "subtropical_jet_lat", "subtropical_high_lat",
           "tropopause_break_lat", "p_minus_e_zero_lat", "olr_edge_lat"),
          "Davis & Rosenlof (2012) J. Climate 25, 1061-1078; Waugh et al. (2018) J. Climate 31, 7565-7581 "
          "(these measures of the tropical width compared)"),
    Group("eddy_driven_jet", "Latitude of the eddy-driven jet",
          ("eddy_jet_lat", "eddy_momentum_flux_lat"),
          "Barnes & Polvani (2013) J. Climate 26, 7117-7135 (the jet sits where the eddies converge momentum; "
          "the flux maximum lies on its equatorward flank, so the two differ by a few degrees; common practice)"),
    Group("polar_cell_edge", "Boundary between the Ferrel and polar cells",
          ("ferrel_edge_lat", "polar_easterly_edge_lat"),
          "this project's grouping: the streamfunction zero and the surface-wind zero poleward of the westerlies"),
)


def catalogue():
    """All metrics by id, in registration order."""
    return registered_metrics()


def families():
    """All families by name, in registration order."""
    return registered_families()


def groups():
    """Feature groups by id (metrics absent from the catalogue are left out)."""
    cat = catalogue()
    return {g.id: Group(g.id, g.long_name, tuple(m for m in g.metric_ids if m in cat), g.reference) for g in _GROUPS}
