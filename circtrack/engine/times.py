"""Time values in the data's own calendar: ISO text, the record's time step, calendar names.

In: cftime/datetime objects as the detection decoded them. Out: ISO 8601 text (the CSV's ``time``
column and the keys ``update`` keeps), the median time step in days, normalised calendar names.
"""

from __future__ import annotations

import numpy as np


def iso_time(t):
    """ISO 8601 in the data's own calendar: date at midnight, else date and time."""
    y = t.year
    ys = f"{y:04d}" if y >= 0 else f"-{-y:04d}"
    s = f"{ys}-{t.month:02d}-{t.day:02d}"
    if t.hour or t.minute or t.second:
        s += f"T{t.hour:02d}:{t.minute:02d}:{t.second:02d}"
    return s


def time_step_days(times):
    """Median spacing of the time axis in days (NaN for a single step)."""
    if times.size < 2:
        return float("nan")
    d = np.diff(times)
    days = np.array([x.total_seconds() / 86400.0 for x in d[: min(d.size, 400)]])
    return float(np.median(days))


def calendar_name(name):
    name = str(name).lower()
    return "standard" if name == "gregorian" else name

