"""Reductions over longitude that are not plain zonal means: covariances of two fields, column
energy sums, zonal Fourier amplitudes and per-longitude extrema.

Arrays carry longitude last, ``(..., I)``; pressure levels (where there are any) sit third from the
end, ``(..., L, J, I)``. Missing values are NaN and are left out; numpy only; NaN instead of
exceptions.
"""

from __future__ import annotations

import numpy as np

from circtrack.constants import CP_DRY, GRAVITY, LATENT_HEAT_VAPORIZATION
from circtrack.kernels.extrema import window_extremum
from circtrack.kernels.vertical import layer_weights


def zonal_covariance(a, b, mask=None):
    """Zonal covariance ``[a'b'] = [ab] - [a][b]`` over the longitudes where both are valid.

    Parameters
    ----------
    a, b : arrays ``(..., I)``, or :class:`LevelSlab` ``(..., J, I)`` (reduced a few latitude rows at
        a time, converted to float64 in cache-sized blocks: no float64 copy of the whole level).
    mask : boolean ``(I,)`` selecting a longitude band, or None for the whole circle.

    Returns
    -------
    (cov, fraction) : ``(...)`` each; ``cov`` is the population covariance (divided by the number of
    valid longitudes), NaN where none is valid; ``fraction`` is the share of valid longitudes.

    Notes
    -----
    The deviations are taken from the mean of the same valid longitudes, so ``[a'] = [b'] = 0`` on
    the points used and ``[ab] = [a][b] + [a'b']`` holds exactly (Peixoto & Oort 1992, ch. 4).
    Every row (one latitude of one time step) is reduced on its own along contiguous memory, so
    blocks of rows give the same numbers as the whole array at once.
    """
    if isinstance(a, LevelSlab) or isinstance(b, LevelSlab):
        if mask is None:
            return _covariance_by_rows(a, b)
        # a band: numpy lays ``a[..., mask]`` out with the longitudes outermost and sums its rows in
        # another order than a contiguous block's; the whole float64 level keeps those numbers
        a, b = np.asarray(a), np.asarray(b)
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    if mask is not None:
        a, b = a[..., mask], b[..., mask]
    fast = _covariance_all_valid(a, b)
    if fast is not None:
        return fast
    return _covariance_masked(a, b)


def _covariance_masked(a, b):
    """:func:`zonal_covariance` of float64 ``a, b (..., I)`` with missing values left out."""
    ok = np.isfinite(a) & np.isfinite(b)
    n = ok.sum(axis=-1)
    a0 = np.where(ok, a, 0.0)
    b0 = np.where(ok, b, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        ma = a0.sum(axis=-1) / n
        mb = b0.sum(axis=-1) / n
        cov = np.where(ok, (a0 - ma[..., None]) * (b0 - mb[..., None]), 0.0).sum(axis=-1) / n
    cov = np.where(n > 0, cov, np.nan)
    return cov, n / max(a.shape[-1], 1)


def _covariance_all_valid(a, b):
    """:func:`zonal_covariance` when every value is finite (the usual case above the ground), else
    None: the same operations in the same order without the masking passes, so the same numbers.
    Finite row sums tell that no value is NaN or infinite (a NaN or inf makes its row sum non-finite).
    The arrays keep their memory layout (as ``np.where`` would), so the sums add in the same order."""
    sa = a.sum(axis=-1)
    sb = b.sum(axis=-1)
    if not (np.isfinite(sa).all() and np.isfinite(sb).all()):
        return None
    n = a.shape[-1]
    if n == 0:
        return None
    cov = np.empty(sa.shape)
    # a few rows at a time, so the deviations stay in the processor's cache (each row is summed on
    # its own, so the blocks give the same numbers as the whole array at once)
    a2, b2 = a.reshape(-1, n), b.reshape(-1, n)
    ma, mb, c = (sa / n).reshape(-1), (sb / n).reshape(-1), cov.reshape(-1)
    step = max(1, _BLOCK_VALUES // n)
    with np.errstate(invalid="ignore", divide="ignore"):
        for r0 in range(0, a2.shape[0], step):
            r1 = r0 + step
            da = a2[r0:r1] - ma[r0:r1, None]
            da *= b2[r0:r1] - mb[r0:r1, None]
            c[r0:r1] = da.sum(axis=-1) / n
    return cov, np.ones(cov.shape)


_BLOCK_VALUES = 1 << 16     # float64 values per block of rows (512 KiB): fits a core's cache


def _covariance_by_rows(a, b):
    """:func:`zonal_covariance` over the whole circle of ``a, b (..., J, I)`` (arrays or
    :class:`LevelSlab`), a few latitude rows of one leading index at a time: each block is converted
    to float64 and reduced while in cache, by the operations of :func:`_covariance_all_valid` (done in
    place on the block's own copies: the same values) where the block has no missing value, else by
    :func:`_covariance_masked`. Each row lies along contiguous memory as in the whole level, so its
    sums add in the same order."""
    shape = tuple(a.shape)
    nj, n = shape[-2:]
    cov = np.empty(shape[:-1])
    frac = np.empty(shape[:-1])
    step = max(1, _ROWS_VALUES // max(n, 1))
    for lead in np.ndindex(*shape[:-2]):
        for j0 in range(0, nj, step):
            key = lead + (slice(j0, j0 + step),)
            ab, bb = _rows(a, key), _rows(b, key)
            sa = ab.sum(axis=-1)
            sb = bb.sum(axis=-1)
            # one NaN or inf anywhere makes the total non-finite (a finite total: every value is finite;
            # an overflowing total only sends the block to the masked formula, which gives the same numbers)
            if n and np.isfinite(sa.sum() + sb.sum()):
                ab -= (sa / n)[:, None]
                bb -= (sb / n)[:, None]
                ab *= bb
                cov[key] = ab.sum(axis=-1) / n
                frac[key] = 1.0
            else:
                cov[key], frac[key] = _covariance_masked(ab, bb)
    return cov, frac


_ROWS_VALUES = 1 << 15      # float64 values per block of converted rows (256 KiB: both blocks fit in cache)


def _rows(a, key):
    """Rows ``a[key]`` (leading indices, then a slice of rows) as a 2-d float64 array of its own (a
    :class:`LevelSlab` converts only these)."""
    out = a[key] if isinstance(a, LevelSlab) else np.asarray(np.asarray(a)[key], dtype=np.float64)
    if not out.flags.owndata:         # a view of the caller's float64 data: the block is updated in place
        out = out.copy()
    return out


class LevelSlab:
    """``arr (..., L, J, I)`` at one pressure level, ``(..., J, I)``, converted to float64 only where it
    is read: ``slab[key]`` gives exactly ``slab_at_level(arr, ...)[key]`` (the same operations on the
    same values) from the selected points only, ``np.asarray(slab)`` the whole level. Made by
    :func:`level_slab`; lets a reducer convert a few rows at a time (cache-sized blocks) or only the
    latitudes it looks at, instead of a float64 copy of the whole level."""

    def __init__(self, arr, k, t=None):
        self.arr, self.k, self.t = arr, k, t      # level k, or levels k = (a, b) mixed by t
        self.shape = tuple(arr.shape[:-3] + arr.shape[-2:])
        self.ndim = len(self.shape)

    def __getitem__(self, key):
        if self.t is None:
            return np.asarray(self.arr[..., self.k, :, :][key], dtype=np.float64)
        a, b = self.k
        # fa + t * (fb - fa) in float64, updated in place (the same operations on the same float64
        # values, so the same numbers); both levels converted first: plain float64 passes run faster
        # than ones that cast as they go
        fa = np.asarray(self.arr[..., a, :, :][key], dtype=np.float64)
        out = np.array(self.arr[..., b, :, :][key], dtype=np.float64)
        out -= fa
        out *= self.t
        out += fa
        return out

    def values(self, key):
        """``self[key]`` where it needs no arithmetic (a level of ``arr``) in ``arr``'s own float type,
        often float32 and a view (``np.float64`` of it is ``self[key]``); interpolated values as float64."""
        if self.t is None and self.arr.dtype.kind == "f":
            return self.arr[..., self.k, :, :][key]
        return self[key]

    def __array__(self, dtype=None, copy=None):
        out = self[...]
        return out if dtype is None else out.astype(dtype, copy=False)


def level_slab(arr, p, target, *, tolerance):
    """:func:`slab_at_level` as a :class:`LevelSlab` (nothing converted yet), or None outside the levels."""
    if p is None:
        return None
    p = np.asarray(p, dtype=float)
    k = int(np.argmin(np.abs(p - target)))
    if abs(p[k] - target) <= tolerance:
        return LevelSlab(arr, k)
    if target < p.min() or target > p.max():
        return None
    order = np.argsort(p)
    j = int(np.searchsorted(p[order], target)) - 1
    a, b = order[j], order[j + 1]
    t = (np.log(target) - np.log(p[a])) / (np.log(p[b]) - np.log(p[a]))
    return LevelSlab(arr, (a, b), t)


def slab_at_level(arr, p, target, *, tolerance):
    """``arr (..., L, J, I)`` at pressure ``target`` -> ``(..., J, I)`` in float64, or None outside the levels.

    Nearest level within ``tolerance``, else linear in log-pressure between the bracketing levels
    (the rule of :func:`circtrack.kernels.vertical.at_level`). Only the one or two levels used are
    converted to float64 (``arr`` may be a float32 field of every level): the same numbers as
    converting the whole field first, without the copy."""
    slab = level_slab(arr, p, target, tolerance=tolerance)
    return None if slab is None else slab[...]


def humidity_filled_aloft(q, t):
    """Specific humidity with missing values above the ground counted as 0, and the filled share.

    ``q, t (..., L, J, I)``: where ``q`` is missing but the temperature is valid (the point is above
    the ground) ``q = 0`` (common practice: water vapour is negligible for the energy transport above
    the upper troposphere, and several reanalyses ship humidity only up to about 300 hPa); where
    ``t`` is missing too the point stays missing (below the ground). Returns ``(q, filled)`` with
    ``filled`` boolean like ``q``.
    """
    q = np.asarray(q, dtype=np.float64)
    filled = ~np.isfinite(q) & np.isfinite(t)        # (a float32 value is finite as float64 too)
    if not filled.any():
        return q, filled
    return np.where(filled, 0.0, q), filled


def moist_static_energy(t, z, q):
    """``cp T + g z + L q`` in J kg-1 from temperature (K), geopotential height (m) and specific
    humidity (kg kg-1); NaN where any is missing."""
    e = np.multiply(np.asarray(t, float), CP_DRY)
    e += GRAVITY * np.asarray(z, float)
    e += LATENT_HEAT_VAPORIZATION * np.asarray(q, float)
    return e


def column_sums(v, e, p_pa, top="zero_at_top_level", all_valid=None):
    """Pressure-weighted column sums for the energy transport, ``(..., L, J, I)`` -> four ``(..., J, I)``.

    Returns ``(sum w v e, sum w v, sum w e, sum w)`` over the levels where both ``v`` and ``e`` are
    valid (below-ground NaN contributes nothing, as in the streamfunction), with ``w`` from
    :func:`circtrack.kernels.vertical.layer_weights` in Pa under the column's top rule ``top``.
    Divided by g these are column integrals per unit area. ``all_valid``: whether every value of
    the field this is a part of is valid (a caller working on part of a field at a time passes it, so
    every part takes the path the whole field would take: ``sum w`` is summed in another order
    there); None: this array decides.
    """
    v = np.asarray(v, dtype=np.float64)
    e = np.asarray(e, dtype=np.float64)
    w = layer_weights(p_pa, top)
    ok = None
    if all_valid is None:
        ok = np.isfinite(v) & np.isfinite(e)
        all_valid = bool(ok.all())
    if all_valid:                                    # the usual case above the ground: no masking
        sw = np.broadcast_to(w.sum(), v.shape[:-3] + v.shape[-2:])
        return (np.einsum("...ljk,l->...jk", v * e, w), np.einsum("...ljk,l->...jk", v, w),
                np.einsum("...ljk,l->...jk", e, w), sw)
    if ok is None:
        ok = np.isfinite(v) & np.isfinite(e)
    v0 = np.where(ok, v, 0.0)
    e0 = np.where(ok, e, 0.0)
    return (np.einsum("...ljk,l->...jk", v0 * e0, w), np.einsum("...ljk,l->...jk", v0, w),
            np.einsum("...ljk,l->...jk", e0, w), np.einsum("...ljk,l->...jk", ok.astype(np.float64), w))


def energy_column_means(v, t, z, q, w, rows):
    """Zonal means of the column sums of :func:`column_sums` for one time step where every value is
    valid, without the masking passes: ``v, t, z, q (L, J, I)`` (any float type; only ``rows``
    latitude rows at a time are converted to float64, into buffers reused from block to block) and
    the layer weights ``w (L,)`` -> ``(J, 3)``: the means over longitude of ``sum w v e``,
    ``sum w v`` and ``sum w e``, with ``e`` from :func:`moist_static_energy`. None as soon as a block
    has a sum that is not finite (a missing value somewhere, or an overflow): the caller then takes
    the general path.

    The numbers are those of :func:`humidity_filled_aloft`, :func:`moist_static_energy` and
    :func:`column_sums` with ``all_valid=True`` on the same rows (the same operations on the same
    values, updated in place; the level sums are the same ``einsum`` on C-ordered ``(L, jb, I)``
    blocks), then ``mean(axis=-1)`` per row (``tests/metrics/test_energy_fast_path.py``).
    """
    nl, nj, ni = v.shape
    w = np.asarray(w, dtype=np.float64)
    out = np.empty((nj, 3))
    size = nl * min(rows, nj) * ni
    flat = [np.empty(size) for _ in range(4)]
    with np.errstate(invalid="ignore", over="ignore"):
        for j0 in range(0, nj, rows):
            jb = min(rows, nj - j0)
            part = (slice(None), slice(j0, j0 + jb))
            # C-ordered (L, jb, I) views of the buffers, as np.asarray(..., float64) of the rows gives
            vb, eb, bb, pb = (f[:nl * jb * ni].reshape(nl, jb, ni) for f in flat)
            vb[...] = v[part]
            eb[...] = t[part]
            eb *= CP_DRY                               # cp T
            bb[...] = z[part]
            bb *= GRAVITY
            eb += bb                                   # + g z
            bb[...] = q[part]
            bb *= LATENT_HEAT_VAPORIZATION
            eb += bb                                   # + L q
            np.multiply(vb, eb, out=pb)
            res = out[j0:j0 + jb]
            res[:, 0] = np.einsum("...ljk,l->...jk", pb, w).mean(axis=-1)
            res[:, 1] = np.einsum("...ljk,l->...jk", vb, w).mean(axis=-1)
            res[:, 2] = np.einsum("...ljk,l->...jk", eb, w).mean(axis=-1)
            if not np.isfinite(res).all():
                return None
    return out


def covers_circle(lon):
    """True when the longitudes go round the whole circle: no cyclic gap wider than 1.5 times the
    median spacing (a regional grid has one large gap)."""
    lam = np.sort(np.mod(np.asarray(lon, float), 360.0))
    if lam.size < 3:
        return False
    gaps = np.diff(np.concatenate([lam, [lam[0] + 360.0]]))
    return bool(gaps.max() <= 1.5 * np.median(gaps))


def fourier_amplitudes(y, lon, wavenumbers):
    """Amplitudes ``A_k`` of zonal wavenumbers ``k`` of ``y (..., I)`` on longitudes ``lon`` (degrees).

    ``y(lon) = a_0 + sum_k A_k cos(k lon - theta_k)``; ``A_k = sqrt(a_k^2 + b_k^2)`` with
    ``a_k = 1/pi sum_i w_i y_i cos(k lon_i)``, ``b_k = 1/pi sum_i w_i y_i sin(k lon_i)`` and ``w_i`` the
    longitude spacing around each point (half the distance to each neighbour, cyclic, in radians;
    ``sum w_i = 2 pi``). On a regular grid covering the circle this is the discrete Fourier transform,
    exact for ``k < I/2``. Rows with any missing longitude give NaN. Returns ``(..., K)``.

    ``y`` may be a :class:`LevelSlab` ``(..., J, I)``: converted to float64 one ``(J, I)`` slice at a
    time. numpy's matrix product of a stack is one product per ``(J, I)`` slice, so slice by slice
    gives the same numbers.
    """
    lam = np.deg2rad(np.mod(np.asarray(lon, float), 360.0))
    order = np.argsort(lam, kind="stable")       # sum in one longitude order whatever the file's convention
    lam = lam[order]
    reorder = bool(np.any(order != np.arange(order.size)))   # in order (the usual grid): no reordered copy
    gaps = np.diff(np.concatenate([lam, [lam[0] + 2 * np.pi]]))          # to the next point, cyclic
    w = 0.5 * (gaps + np.roll(gaps, 1))
    ks = np.asarray(wavenumbers, dtype=float)
    cos = np.cos(ks[:, None] * lam[None, :]) * w[None, :]                # (K, I)
    sin = np.sin(ks[:, None] * lam[None, :]) * w[None, :]
    if isinstance(y, LevelSlab) and y.ndim > 2 and not reorder:
        # (reordered grids take the whole level, reordered into one C-ordered copy, as before)
        out = np.empty(y.shape[:-1] + (ks.size,))
        for lead in np.ndindex(*y.shape[:-2]):
            out[lead] = _amplitudes(y[lead], None, cos, sin)
        return out
    return _amplitudes(np.asarray(y, dtype=np.float64), order if reorder else None, cos, sin)


def _amplitudes(y, order, cos, sin):
    """:func:`fourier_amplitudes` of float64 ``y (..., I)`` (longitudes reordered by ``order`` unless None)."""
    if order is not None:
        # C order like an array in order: BLAS sums a differently laid-out array in another order,
        # and the same field must give the same bits from either longitude convention
        y = np.ascontiguousarray(y[..., order])
    if np.isfinite(np.sum(y)):       # no NaN or inf anywhere (else, or on overflow, row by row below)
        return np.hypot(y @ cos.T / np.pi, y @ sin.T / np.pi)
    complete = np.isfinite(y).all(axis=-1)
    y0 = y if complete.all() else np.nan_to_num(y, nan=0.0)     # nothing to replace: no copy
    a = y0 @ cos.T / np.pi
    b = y0 @ sin.T / np.pi
    amp = np.hypot(a, b)
    return np.where(complete[..., None], amp, np.nan)


def per_longitude_peak(y, lat, hemi, window, *, min_fraction):
    """Latitude (poleward-positive degrees) of the maximum of ``y (..., J, I)`` (an array or a
    :class:`LevelSlab`: only the window's rows are read) at each longitude.

    ``lat (J,)`` ascending; ``hemi`` "NH" or "SH"; ``window`` ``(lo, hi)`` in degrees poleward. The
    maximum is refined with the 3-point parabola (:func:`circtrack.kernels.extrema.window_extremum`).
    Returns ``(..., I)``: NaN where the maximum is not trusted by the extremum rule
    (:meth:`circtrack.kernels.extrema.Extremum.reason`: window edge, pole row, missing neighbour, or
    less than ``min_fraction`` valid points).
    """
    lat = np.asarray(lat, float)
    idx = np.flatnonzero(lat >= 0) if hemi == "NH" else np.flatnonzero(lat <= 0)[::-1]
    x = np.abs(lat[idx])
    # only the window's rows and one neighbour on each side (all the extremum rule looks at), copied
    # once with latitude last so the search runs along contiguous memory
    inwin = np.flatnonzero((x >= window[0]) & (x <= window[1]))
    if inwin.size:
        keep = slice(max(inwin[0] - 1, 0), inwin[-1] + 2)
        idx, x = idx[keep], x[keep]
    # (a slice where the rows are consecutive: a view, one copy; float32 stays float32: its maximum
    # is at the same index, and the refinement takes float64 of the same values)
    rows = (..., _as_slice(idx), slice(None))
    src = y.values(rows) if isinstance(y, LevelSlab) else np.asarray(y)[rows]
    yh = np.ascontiguousarray(np.moveaxis(src, -1, -2))                               # (..., I, Jh)
    if yh.dtype != np.float32:
        yh = yh.astype(float, copy=False)
    ext = window_extremum(yh, x, window[0], window[1], kind="max")
    good = ext.ok(min_fraction) & np.isfinite(ext.position)
    return np.where(good, ext.position, np.nan)


def spread(values, mask=None):
    """Population standard deviation over the last axis of the valid values, and the valid share.

    ``values (..., I)``, ``mask`` a boolean ``(I,)`` band or None. Returns ``(std, mean, fraction)``."""
    v = np.asarray(values, float)
    if mask is not None:
        v = v[..., mask]
    ok = np.isfinite(v)
    n = ok.sum(axis=-1)
    v0 = np.where(ok, v, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = v0.sum(axis=-1) / n
        var = np.where(ok, (v0 - mean[..., None]) ** 2, 0.0).sum(axis=-1) / n
    return np.sqrt(var), mean, n / max(v.shape[-1], 1)


def _as_slice(idx):
    """The index array ``idx`` as a slice when its indices are consecutive, ascending or descending
    (a view instead of a copy)."""
    if idx.size > 1 and abs(idx[1] - idx[0]) == 1 and np.all(np.diff(idx) == idx[1] - idx[0]):
        stop = idx[-1] + (idx[1] - idx[0])
        return slice(idx[0], stop if stop >= 0 else None, idx[1] - idx[0])
    return idx
