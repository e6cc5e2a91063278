"""Metric families. Each module registers its metrics in :mod:`circtrack.registry` on import."""
