"""Lanczos low-pass filtering of reduced time series, across chunk, batch and file boundaries.

The eddy-driven jet is often diagnosed from low-pass filtered daily wind so that synoptic eddies
do not move it from day to day. Filtering is linear, so filtering the zonal-mean (or sector-mean)
wind equals the mean of the filtered field; the engine therefore filters the small reduced arrays,
never the raw fields, and never per chunk: each batch is filtered with the samples of the batches
before and after it (the halo), so the result does not depend on how the record is cut.

Weights after Duchon, C. E. (1979) J. Appl. Meteor. 18, 1016-1022, eq. (12): the ideal low-pass
response ``sin(2 pi fc k) / (pi k)`` times the Lanczos sigma factor ``sin(pi k / n) / (pi k / n)``,
k = -n..n, normalised to sum to one (common practice, so a constant passes unchanged).
Samples whose window reaches past either end of the record or across a gap in the time axis are
NaN; the families flag them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from circtrack.errors import UsageError


def lanczos_weights(cutoff_steps, half_width):
    """2n+1 Lanczos low-pass weights for a cutoff period of ``cutoff_steps`` samples."""
    n = int(half_width)
    if n < 1:
        raise ValueError("half_width must be at least 1")
    fc = 1.0 / float(cutoff_steps)
    k = np.arange(-n, n + 1, dtype=float)
    w = np.empty_like(k)
    nz = k != 0
    w[~nz] = 2.0 * fc
    w[nz] = np.sin(2.0 * np.pi * fc * k[nz]) / (np.pi * k[nz])
    sigma = np.ones_like(k)
    sigma[nz] = np.sin(np.pi * k[nz] / n) / (np.pi * k[nz] / n)
    w *= sigma
    return w / w.sum()


def response(weights, freq):
    """Amplitude response of symmetric weights at ``freq`` (cycles per sample)."""
    n = (len(weights) - 1) // 2
    k = np.arange(-n, n + 1)
    return np.array([np.sum(weights * np.cos(2 * np.pi * f * k)) for f in np.atleast_1d(freq)])


def filter_valid(times, half_width, step_days):
    """Per sample: does its window lie inside the record without a gap in the time axis?"""
    nt = times.size
    ok = np.zeros(nt, dtype=bool)
    if nt == 0:
        return ok
    gaps = np.zeros(max(nt - 1, 0), dtype=int)
    for i, d in enumerate(np.diff(times)):
        gaps[i] = abs(d.total_seconds() / 86400.0 - step_days) > 1e-6
    csum = np.concatenate([[0], np.cumsum(gaps)])
    n = half_width
    for i in range(n, nt - n):
        ok[i] = csum[i + n] - csum[i - n] == 0
    return ok


@dataclass
class LowPass:
    roles: tuple
    weights: np.ndarray
    half_width: int
    cutoff_days: float
    step_days: float
    valid: np.ndarray            # per kept time step

    def __bool__(self):
        return True

    def describe(self):
        return {"filter": "Lanczos (Duchon 1979)", "cutoff_days": self.cutoff_days,
                "weights": int(self.weights.size), "step_days": self.step_days, "roles": list(self.roles),
                "applies_to": "eddy-driven jet metrics"}

    def apply(self, reduced, bi, batches):
        """Filtered means ``{role: (bt, ..., S)}`` of batch ``bi`` using its neighbours as the halo."""
        t0, t1 = batches[bi]
        n = self.half_width
        out = {}
        for r in self.roles:
            parts, first = [], t0
            if bi - 1 in reduced:
                prev = reduced[bi - 1]["stats"][r][..., 0]
                take = min(n, prev.shape[0])
                parts.append(prev[prev.shape[0] - take:])
                first = t0 - take
            parts.append(reduced[bi]["stats"][r][..., 0])
            if bi + 1 in reduced:
                parts.append(reduced[bi + 1]["stats"][r][..., 0][:n])
            series = np.concatenate(parts, axis=0)
            filt = np.full((t1 - t0,) + series.shape[1:], np.nan)
            for i in range(t0, t1):
                if not self.valid[i]:
                    continue
                lo = i - n - first
                filt[i - t0] = np.tensordot(self.weights, series[lo:lo + 2 * n + 1], axes=(0, 0))
            out[r] = filt
        return out


def setup(cfg, times, plan, path):
    """The run's low-pass filter, or None when ``jets.eddy_lowpass_days`` is 0 or no u is read."""
    j = cfg.get("jets", {})
    cutoff = float(j.get("eddy_lowpass_days", 0) or 0)
    if cutoff <= 0 or "ua" not in plan.roles:
        return None
    if times.size < 2:
        raise UsageError(f"{path}: jets.eddy_lowpass_days = {cutoff:g} needs a daily (or finer) record of many time "
                         "steps; set it to 0 for this input")
    d = np.diff(times[: min(times.size, 400)])
    step = float(np.median([x.total_seconds() / 86400.0 for x in d]))
    if step * 2.0 >= cutoff:
        raise UsageError(f"{path}: a {cutoff:g}-day low-pass needs time steps shorter than {cutoff / 2:g} days, "
                         f"but this record's step is {step:g} days; set jets.eddy_lowpass_days = 0 for it")
    half = int(round(float(j.get("eddy_lowpass_half_width_days", 30)) / step))
    w = lanczos_weights(cutoff / step, half)
    return LowPass(("ua",), w, half, cutoff, step, filter_valid(times, half, step))
