"""Metric families. Each module registers its metrics in :mod:`circtrack.registry` on import;
importing this package imports every family module, so :func:`catalogue` and :func:`families`
are complete. A new family module is added to the import line below (and nowhere else).
"""

from circtrack.metrics import cells, jets, cores, momentum, surface, transport, tropopause, waves  # noqa: F401
from circtrack.registry import registered_families, registered_metrics


def catalogue():
    """All metrics by id, in registration order."""
    return registered_metrics()


def families():
    """All families by name, in registration order."""
    return registered_families()
