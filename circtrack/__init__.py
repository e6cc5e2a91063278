"""circtrack: tidy time series of general-circulation indices from gridded climate data.

The public API is small and never imports click:

- :data:`__version__`
- :func:`circtrack.metrics.catalogue` -- the metric catalogue
- :func:`circtrack.engine.track` -- run metrics over files, yielding a tidy table
"""

__version__ = "0.1.0"
