"""One input file in, readers of its roles out: the names the engine, ``scan`` and tests use.

A facade over the rooms of :mod:`circtrack.inputs`, in the order data flows through them:

- :mod:`~circtrack.inputs.opening`: path and config -> lazily opened dataset (engines per kind of
  input, netCDF chunk cache, truncated-file check, GRIB index directory). A new input source goes here.
- :mod:`~circtrack.inputs.times`: every special case of decoding time axes (year 0, "months since").
- :mod:`~circtrack.inputs.detect`: dataset -> :class:`Detected` (coordinates, vertical axis, roles,
  suggestions), by the rules kept as data in :mod:`~circtrack.inputs.rules`.
- :mod:`~circtrack.inputs.streams`: final and provisional data streams (``expver``) and per-time-step notes.
- :mod:`~circtrack.inputs.readers`: :class:`Detected` and a role -> :class:`RoleReader`, the
  picklable recipe a worker reads a time chunk with in canonical layout and units.
- :mod:`~circtrack.inputs.units`, :mod:`~circtrack.inputs.model_levels`, :mod:`~circtrack.inputs.files`:
  unit tables, hybrid sigma-pressure numerics, PATH expansion.
"""

from circtrack.inputs.detect import RANK_WORDS, Detected, detect, require_axes
from circtrack.inputs.opening import GRIB_SUFFIXES, grib_index_dir, open_dataset, open_raw
from circtrack.inputs.readers import (SURFACE_SUBSTITUTES, RoleReader, check_grid, lowest_level_substitute,
                                      model_level_targets, standardise)
from circtrack.inputs.streams import PROVISIONAL, merge_notes, provisional_steps
from circtrack.inputs.times import YEAR_ZERO_CALENDAR, year_zero_time

__all__ = ["GRIB_SUFFIXES", "PROVISIONAL", "RANK_WORDS", "SURFACE_SUBSTITUTES", "YEAR_ZERO_CALENDAR", "Detected",
           "RoleReader", "check_grid", "detect", "grib_index_dir", "lowest_level_substitute", "merge_notes", "model_level_targets",
           "open_dataset", "open_raw", "provisional_steps", "require_axes", "standardise", "year_zero_time"]
