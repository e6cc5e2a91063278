"""Jet cores: maxima of the zonal wind in the latitude-pressure plane.

A core is the strongest local maximum of ``u`` inside a latitude-pressure window: a grid point
strictly inside the window (not on its first or last latitude or level) that is at least as large as
its eight neighbours and larger than the points above and below it (a column whose wind does not
change with height has no core). It is refined separately in latitude (the 3-point parabola through the
neighbours at the core's level, on the actual latitudes) and in log-pressure (the 3-point parabola
through the levels above and below at the core's latitude, in ln p). The speed is the value of the
separable quadratic through those five points,
``u_core = u_c + (u_lat_vertex - u_c) + (u_p_vertex - u_c)``, exact for
``u = u0 - a (lat - lat0)^2 - b (ln p - ln p0)^2``.

Arrays carry pressure and latitude last, ``(..., L, J)``, with ``p`` ascending (hPa, top first) and
latitude ``x`` ascending (in the families: degrees poleward of the equator). NaN are missing points
(below the ground, gaps); numpy only; no exceptions for "not found": a reason code instead.

The per-longitude reducer :func:`per_longitude_cores` runs inside the read tasks: it finds the cores
at every longitude (or on longitude bands) and returns only small summaries per sector, plus, when
asked, the cores themselves (a few numbers per longitude), never the fields.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from circtrack.kernels.extrema import parabola_vertex

# reason codes of find_core (index into REASONS); the flag names are those of circtrack.flags
OK, AT_EDGE, TOO_LITTLE, COLUMN_SHORT, NEXT_TO_MISSING, WEAK, MERGED = range(7)
REASONS = ("ok", "extremum_at_window_edge", "too_little_data", "column_too_short", "extremum_next_to_missing_data",
           "weak_jet_core", "merged_jets")
JETS = ("subtropical", "eddy")
QUANTITIES = ("lat", "pressure", "speed", "reason")   # per core, in that order
SUMMARY = ("split_share", "core_share", "subtropical_lat_spread", "subtropical_pressure_spread",
           "subtropical_share", "eddy_lat_spread", "eddy_pressure_spread", "eddy_share")
MIN_LEVELS = 3          # a core needs a level above and below it inside the window
UNEXPLAINED = 99        # reason of a column without a core when the caller did not ask why (reasons=False)


@dataclass
class Core:
    """Result of :func:`find_core`; every field has the leading shape ``(...)``."""

    lat: np.ndarray        # refined position in the units of x (NaN when no core)
    pressure: np.ndarray   # refined pressure, hPa (NaN when no core)
    speed: np.ndarray      # value of the quadratic at the refined point (NaN when no core)
    j: np.ndarray          # grid index of the core along x (-1 when none)
    k: np.ndarray          # grid index of the core along p (-1 when none)
    reason: np.ndarray     # int, index into REASONS


def _window(x, lo, hi):
    idx = np.flatnonzero((x >= lo) & (x <= hi))
    return (idx[0], idx[-1] + 1) if idx.size else (0, 0)


def find_core(u, x, p, lat_window, p_window, *, min_fraction, min_speed=-np.inf):
    """Strongest interior local maximum of ``u (..., L, J)`` in a latitude-pressure window.

    Parameters
    ----------
    u : array ``(..., L, J)``; NaN points are missing.
    x : array ``(J,)`` strictly increasing (latitude, degrees).
    p : array ``(L,)`` strictly increasing pressure, hPa.
    lat_window, p_window : ``(lo, hi)`` inclusive bounds in x and in hPa.
    min_fraction : the window needs at least this share of finite points (else ``too_little_data``).
    min_speed : a core weaker than this is not a jet (``weak_jet_core``).

    Returns
    -------
    Core
        Reason codes where no core is reported: fewer than three levels in the pressure window
        (``column_too_short``); too few finite points (``too_little_data``); no interior local maximum
        and the window's maximum on its edge, so the true one may lie outside (``extremum_at_window_edge``);
        the window's maximum inside but next to a missing point (``extremum_next_to_missing_data``), in a
        column with fewer than three valid levels or with the same wind above or below it
        (``column_too_short``); the core weaker than ``min_speed`` (``weak_jet_core``).
    """
    u = np.asarray(u, dtype=float)
    c = _find_cores(u[..., None], x, p, lat_window, p_window, min_fraction=min_fraction, min_speed=min_speed)
    return Core(*(a[..., 0] for a in (c.lat, c.pressure, c.speed, c.j, c.k, c.reason)))


def _find_cores(u, x, p, lat_window, p_window, *, min_fraction, min_speed, reasons=True):
    """:func:`find_core` for every column ``i`` of ``u (..., L, J, I)`` -> :class:`Core` of shape ``(..., I)``.

    One implementation for both layouts: the zonal mean is ``I = 1``; at every longitude the
    longitudes stay the last (contiguous) axis and ``u`` keeps its own float type (float32 comparisons
    select the same points as float64 ones of the same values); only the five points of each core are
    converted to float64 for the refinement, so the results equal a float64 search exactly.
    """
    x = np.asarray(x, dtype=float)
    p = np.asarray(p, dtype=float)
    shape = u.shape[:-3] + u.shape[-1:]
    j0, j1 = _window(x, *lat_window)
    k0, k1 = _window(p, *p_window)
    nan = np.full(shape, np.nan)
    none = np.full(shape, -1)
    if k1 - k0 < MIN_LEVELS:
        return Core(nan, nan.copy(), nan.copy(), none, none.copy(), np.full(shape, COLUMN_SHORT))
    if j1 - j0 < 3:
        return Core(nan, nan.copy(), nan.copy(), none, none.copy(), np.full(shape, TOO_LITTLE))
    w = u[..., k0:k1, j0:j1, :]                                # a view: no copy of the window
    w = w.reshape((int(np.prod(shape[:-1])),) + w.shape[-3:])  # (N, nl, nj, I)
    lat, logp, speed, jj, kk, reason = _search(w, x[j0:j1], np.log(p[k0:k1]), min_fraction, min_speed, reasons)
    good = reason == OK
    return Core(*(a.reshape(shape) for a in (
        np.where(good, lat, np.nan), np.where(good, np.exp(logp), np.nan), np.where(good, speed, np.nan),
        np.where(good, jj + j0, -1), np.where(good, kk + k0, -1), reason)))


_DK, _DJ = np.array([0, 0, -1, 0, 1]), np.array([0, -1, 0, 1, 0])   # centre, equatorward, above, poleward, below
BLOCK = 1 << 18     # grid points of a window searched at once (the temporaries stay in cache)


def _search(w, xs, ls, min_fraction, min_speed, reasons=True):
    """The search of :func:`find_core` in one window ``w (N, nl, nj, I)`` (any float type, any strides),
    ``xs (nj,)`` its latitudes and ``ls (nl,)`` its ln p. Returns ``(lat, ln p, speed, j, k, reason)``,
    each ``(N, I)``, positions and speed unmasked (only meaningful where the reason is ok). With
    ``reasons`` false the columns without a core get :data:`UNEXPLAINED` instead of the reason why
    (the cores themselves are the same)."""
    n, nl, nj, ni = w.shape
    best = np.zeros((n, ni), np.intp)
    has = np.zeros((n, ni), bool)
    count = np.zeros((n, ni), np.int64)
    step = max(BLOCK // (nl * nj * ni), 1)
    for t0 in range(0, n, step):                        # a few time steps at a time
        best[t0:t0 + step], has[t0:t0 + step], count[t0:t0 + step] = _locate(w[t0:t0 + step])
    kk, jj = np.divmod(best, nj - 2)
    kk, jj = kk + 1, jj + 1                                              # indices inside w
    # the core and its neighbours (equatorward, above, poleward, below) in one gather, as float64
    t, i = np.arange(n)[:, None], np.arange(ni)
    pts = w[t, kk + _DK[:, None, None], jj + _DJ[:, None, None], i].astype(float)      # (5, N, I)
    uc, y0, y2 = pts[0], pts[1:3], pts[3:5]
    # the parabola in latitude and the one in ln p in one call (elementwise: the same numbers)
    (xv, sv), (ylat, yp) = parabola_vertex(np.stack((xs[jj - 1], ls[kk - 1])), np.stack((xs[jj], ls[kk])),
                                           np.stack((xs[jj + 1], ls[kk + 1])), y0, uc, y2)
    speed = uc + (ylat - uc) + (yp - uc)
    reason = np.full((n, ni), OK)
    none = ~has
    if not reasons:
        reason[none] = UNEXPLAINED
    elif none.any():                    # why not: only for the columns without a core
        tn, inn = np.nonzero(none)                          # (the same (t, i) order as a boolean mask)
        wn = w[tn, :, :, inn]                               # (M, nl, nj): only those columns are read
        reason[none] = _no_core_reason(wn, np.isfinite(wn))
    with np.errstate(invalid="ignore"):
        reason = np.where(has & (speed < min_speed), WEAK, reason)
    reason = np.where(count / (nl * nj) < min_fraction, TOO_LITTLE, reason)   # as isfinite(w).mean: exact
    return xv, sv, speed, jj, kk, reason


def _locate(w):
    """For :func:`_search`: the flat index (in ``(nl-2, nj-2)``) of the strongest candidate of each
    column of ``w (n, nl, nj, I)``, whether there is one, and the number of finite points."""
    n, nl, nj, ni = w.shape
    c = w[:, 1:-1, 1:-1]
    # neighbours' maxima (NaN propagates, so a missing neighbour makes no candidate): the six to the
    # sides (>=), and the two above and below (>, a column constant with height has no core). The
    # maximum above and below every point of the interior levels, then with the point itself (the
    # three levels of each column), then of the columns on both sides: the same six points and two
    # points (a maximum is exact), in fewer passes
    updown = np.maximum(w[:, :-2], w[:, 2:])                             # (n, nl-2, nj, I)
    three = np.maximum(updown, w[:, 1:-1])
    around = np.maximum(three[:, :, :-2], three[:, :, 2:])               # (n, nl-2, nj-2, I)
    vert = updown[:, :, 1:-1]
    with np.errstate(invalid="ignore"):
        cand = np.greater_equal(c, around)
        cand &= np.greater(c, vert)
    # the candidates are few (a handful per column): the strongest of each column from their list
    # (its first, k-major, among equal values, as an argmax over the flattened (k, j) would give)
    # instead of a score at every point and an argmax across the window
    m = (nl - 2) * (nj - 2)
    f = np.flatnonzero(cand)                                             # C order of (n, nl-2, nj-2, I)
    t, r = np.divmod(f, m * ni)
    mm, i = np.divmod(r, ni)
    vals = c[t, mm // (nj - 2), mm % (nj - 2), i]
    col = t * ni + i
    top = np.full(n * ni, -np.inf, dtype=c.dtype)
    np.maximum.at(top, col, vals)
    first = vals == top[col]
    best = np.full(n * ni, m, np.intp)
    np.minimum.at(best, col[first], mm[first])
    best[best == m] = 0                                                  # no candidate: as argmax of all -inf
    has = np.isfinite(top)                                               # (a +inf candidate is no core)
    fin = np.isfinite(w)
    if fin.all():
        count = np.full((n, ni), nl * nj, np.uint16 if nl * nj < 1 << 16 else np.int64)
    else:
        count = np.add.reduce(fin.reshape(n, -1, ni).view(np.uint8), axis=1,
                              dtype=np.uint16 if nl * nj < 1 << 16 else np.int64)
    return best.reshape(n, ni), has.reshape(n, ni), count


def _no_core_reason(w, fin):
    """Why a window ``w (M, nl, nj)`` without an interior local maximum gives no core (see :func:`find_core`);
    ``fin`` is ``isfinite(w)``."""
    nl, nj = w.shape[-2:]
    flat = np.where(fin, w, -np.inf).reshape(-1, nl * nj)
    r = np.arange(flat.shape[0])[:, None]
    k, j = np.divmod(np.argmax(flat, axis=-1)[:, None], nj)        # the window's largest value, (M, 1)
    edge = ((k == 0) | (k == nl - 1) | (j == 0) | (j == nj - 1))[:, 0]
    col = fin[r, :, j][:, 0].sum(axis=-1)                          # valid levels in its column
    # its 3 x 3 neighbourhood (clipped to the window: only points inside it matter, the edge wins)
    kn = np.clip(k + np.repeat((-1, 0, 1), 3), 0, nl - 1)
    jn = np.clip(j + np.tile((-1, 0, 1), 3), 0, nj - 1)
    gap = ~fin.reshape(-1, nl * nj)[r, kn * nj + jn].all(axis=-1)
    # inside, no missing neighbour, yet no local maximum: the wind equals it above or below (it does
    # not change with height there), so the core cannot be placed in the vertical either
    return np.where(edge, AT_EDGE, np.where(col < MIN_LEVELS, COLUMN_SHORT, np.where(gap, NEXT_TO_MISSING,
                                                                                       COLUMN_SHORT)))


def hemisphere_columns(lat, hemi):
    """Indices ordering one hemisphere from the equator to the pole, and |lat| along them."""
    lat = np.asarray(lat, float)
    idx = np.flatnonzero(lat >= 0) if hemi == "NH" else np.flatnonzero(lat <= 0)[::-1]
    return idx, np.abs(lat[idx])


def same_core(a, b):
    """True where two :class:`Core` results sit on the same grid point (one merged jet)."""
    return (a.j >= 0) & (a.j == b.j) & (a.k == b.k)


def longitude_bands(lon, width):
    """Group longitudes into bands of ``width`` degrees (0: every longitude its own band).

    Returns ``(band, centres)``: ``band (I,)`` the band index of each longitude and ``centres (B,)``
    each band's centre in degrees east, 0..360. Bands start at 0 degrees east; with ``width`` 0 the
    bands are the longitudes in the grid's order.
    """
    lam = np.mod(np.asarray(lon, float), 360.0)
    if not width or width <= 0:
        return np.arange(lam.size), lam
    raw = np.floor(lam / float(width)).astype(int)
    used, band = np.unique(raw, return_inverse=True)
    return band.reshape(-1), np.minimum((used + 0.5) * float(width), 360.0)


def band_means(a, band, nbands):
    """Mean over longitudes of each band, ``(..., I)`` -> ``(..., B)``, of the finite values.

    Bands of one longitude each (``nbands == I``, from :func:`longitude_bands` with width 0) are the
    longitudes themselves."""
    a = np.asarray(a, float)
    band = np.asarray(band)
    if nbands == band.size and np.array_equal(band, np.arange(band.size)):
        return a
    order = np.argsort(band, kind="stable")
    a = a[..., order]
    starts = np.flatnonzero(np.r_[True, np.diff(band[order]) != 0])
    ok = np.isfinite(a)
    s = np.add.reduceat(np.where(ok, a, 0.0), starts, axis=-1)
    n = np.add.reduceat(ok, starts, axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n > 0, s / n, np.nan)


def hemisphere_cores(u, lat, p, windows, *, min_fraction, min_speed):
    """Both jets' cores in both hemispheres of ``u (..., L, J)`` (``lat`` ascending, degrees_north).

    ``windows``: ``{"subtropical": (lat_window, p_window), "eddy": (...)}`` in degrees poleward and hPa.
    Returns ``(..., 2, 2, 4)``: hemisphere (NH, SH) x jet (:data:`JETS`) x :data:`QUANTITIES`, latitudes
    in degrees_north (SH negative) and the reason as a float code. Where both windows give the same
    grid point (one merged jet) the core is kept for the subtropical jet and the eddy-driven one gets
    ``merged_jets``.
    """
    u = np.asarray(u, float)
    return _hemisphere_cores(u[..., None], lat, p, windows, min_fraction=min_fraction, min_speed=min_speed)[..., 0]


def _hemisphere_cores(u, lat, p, windows, *, min_fraction, min_speed, reasons=True):
    """:func:`hemisphere_cores` for every column ``i`` of ``u (..., L, J, I)`` -> ``(..., 2, 2, 4, I)``."""
    out = np.full(u.shape[:-3] + (2, 2, 4, u.shape[-1]), np.nan)
    for h, hemi in enumerate(("NH", "SH")):
        idx, x = hemisphere_columns(lat, hemi)
        uh = u[..., _as_slice(idx), :]
        cores = [_find_cores(uh, x, p, *windows[jet], min_fraction=min_fraction, min_speed=min_speed,
                             reasons=reasons)
                 for jet in JETS]
        merged = same_core(*cores)
        sign = 1.0 if hemi == "NH" else -1.0
        for q, c in enumerate(cores):
            reason = np.where(merged, MERGED, c.reason) if q == 1 else c.reason
            keep = reason == OK
            out[..., h, q, 0, :] = np.where(keep, sign * c.lat, np.nan)
            out[..., h, q, 1, :] = np.where(keep, c.pressure, np.nan)
            out[..., h, q, 2, :] = np.where(keep, c.speed, np.nan)
            out[..., h, q, 3, :] = reason
        out[..., h, 0, 3, :] = np.where(merged, -MERGED, out[..., h, 0, 3, :])   # negative: ok, merged with the other
    return out


def _as_slice(idx):
    """The index array ``idx`` as a slice when its indices are consecutive (a view instead of a copy)."""
    if idx.size > 1 and np.all(np.diff(idx) == idx[1] - idx[0]) and abs(idx[1] - idx[0]) == 1:
        stop = idx[-1] + (idx[1] - idx[0])
        return slice(idx[0], stop if stop >= 0 else None, idx[1] - idx[0])
    return idx


def cores_by_longitude(u, lat, p, lon, windows, *, band_width, min_fraction, min_speed, reasons=True):
    """Cores at every longitude (or longitude band) of ``u (..., L, J, I)``.

    Longitudes are grouped with :func:`longitude_bands` and ``u`` averaged over each band (finite
    values) before the search. Returns ``(cores, centres, band)``: ``cores (..., 2, 2, 4, B)`` as in
    :func:`hemisphere_cores` per band, the band centres ``(B,)`` (degrees east, 0..360) and the band
    of each longitude ``(I,)``. With ``reasons`` false a band without a core has the reason
    :data:`UNEXPLAINED` (not worked out: for summaries that only count cores; the cores are the same).
    """
    band, centres = longitude_bands(lon, band_width)
    # only the levels and latitudes some window holds (slices before any copy of the field)
    p = np.asarray(p, float)
    lat = np.asarray(lat, float)
    plo = min(w[1][0] for w in windows.values())
    phi = max(w[1][1] for w in windows.values())
    ks = np.flatnonzero((p >= plo) & (p <= phi))
    k0, k1 = (ks[0], ks[-1] + 1) if ks.size else (0, 0)
    alat = np.abs(lat)
    js = np.flatnonzero((alat >= min(w[0][0] for w in windows.values())) &
                        (alat <= max(w[0][1] for w in windows.values())))
    j0, j1 = (js[0], js[-1] + 1) if js.size else (0, 0)
    u = np.asarray(u)[..., k0:k1, j0:j1, :]
    p, lat = p[k0:k1], lat[j0:j1]
    if u.dtype.kind != "f":
        u = u.astype(float)
    if centres.size != band.size:                              # bands of several longitudes: float64 means
        u = band_means(u, band, centres.size)                  # (..., L, J, B)
    elif not np.array_equal(band, np.arange(band.size)):       # a longitude per band, bands in another order
        u = u[..., np.argsort(band, kind="stable")]            # (e.g. a grid from -180 and bands from 0 east)
    cores = _hemisphere_cores(u, lat, p, windows, min_fraction=min_fraction, min_speed=min_speed, reasons=reasons)
    return cores, centres, band


def bands_in(mask, band, nbands):
    """Bands of which at least half the longitudes lie in ``mask (I,)`` (None: the full circle)."""
    mask = np.ones(band.size, bool) if mask is None else np.asarray(mask, bool)
    tot = np.bincount(band, minlength=nbands)
    inside = np.bincount(band, weights=mask.astype(float), minlength=nbands)
    return (inside >= 0.5 * tot) & (tot > 0)


def summarize(cores, sel):
    """Summaries over the selected bands ``sel (B,)`` of ``cores (..., 2, 2, 4, B)`` -> ``(..., 2, 8)``.

    Per hemisphere, in the order of :data:`SUMMARY`: the share of bands with a core where the two jets
    are split (both cores found, not the same grid point); the share of bands with any core; per jet
    the population standard deviation over bands of the core latitude (degrees) and pressure (hPa) and
    the share of bands where that jet's core was found.
    """
    c = np.asarray(cores, float)[..., sel]
    nb = max(int(np.count_nonzero(sel)), 1)
    stj_ok = np.isfinite(c[..., 0, 0, :])
    edj_ok = np.isfinite(c[..., 1, 0, :])
    anyc = (stj_ok | edj_ok).sum(axis=-1)
    out = np.full(c.shape[:-4] + (2, 8), np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        out[..., 0] = np.where(anyc > 0, (stj_ok & edj_ok).sum(axis=-1) / anyc, np.nan)
    out[..., 1] = anyc / nb
    for q in range(2):
        for i, col in enumerate((0, 1)):
            out[..., 2 + 3 * q + i] = _std(c[..., q, col, :])
        out[..., 4 + 3 * q] = np.isfinite(c[..., q, 0, :]).sum(axis=-1) / nb
    return out


def _std(v):
    ok = np.isfinite(v)
    n = ok.sum(axis=-1)
    v0 = np.where(ok, v, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = v0.sum(axis=-1) / n
        return np.sqrt(np.where(ok, (v0 - mean[..., None]) ** 2, 0.0).sum(axis=-1) / n)
