"""kernels/cores.py: the per-longitude search (longitude last, the input's float type, window views, blocks
of time steps) gives exactly the numbers and reason codes of the straightforward one (reference below:
every field converted to float64, longitude moved before latitude and pressure, each window copied).

Fields with NaN below the ground, a longitude mostly missing, cores on the window's edge, merged and
split jets, weak cores, columns that do not change with height and ties (values rounded), float32 and
float64, an ensemble dimension, several sectors and both band widths.
"""

import numpy as np
import pytest

from circtrack import config
from circtrack.kernels import cores as K
from circtrack.kernels.extrema import parabola_vertex
from circtrack.metrics import cores as MC

LAT = np.arange(-89.0, 89.1, 2.0)
LON = np.arange(0.0, 360.0, 7.5)
P = np.array([100.0, 150.0, 200.0, 250.0, 300.0, 400.0, 500.0, 700.0, 850.0, 925.0, 1000.0])
WINDOWS = {"subtropical": ((10.0, 45.0), (100.0, 400.0)), "eddy": ((30.0, 70.0), (150.0, 850.0))}
SEARCH = dict(min_fraction=0.5, min_speed=10.0)


# --------------------------------------------------------------------------- reference (the plain way)
def ref_find_core(u, x, p, lat_window, p_window, *, min_fraction, min_speed=-np.inf):
    u = np.asarray(u, dtype=float)
    x = np.asarray(x, dtype=float)
    p = np.asarray(p, dtype=float)
    lead = u.shape[:-2]
    j0, j1 = K._window(x, *lat_window)
    k0, k1 = K._window(p, *p_window)
    nan, none = np.full(lead, np.nan), np.full(lead, -1)
    if k1 - k0 < K.MIN_LEVELS:
        return K.Core(nan, nan, nan, none, none, np.full(lead, K.COLUMN_SHORT))
    if j1 - j0 < 3:
        return K.Core(nan, nan, nan, none, none, np.full(lead, K.TOO_LITTLE))
    w = np.ascontiguousarray(u[..., k0:k1, j0:j1])
    fin = np.isfinite(w)
    frac = fin.mean(axis=(-2, -1))
    nl, nj = w.shape[-2:]
    c = w[..., 1:-1, 1:-1]
    sides = np.maximum(w[..., :, :-2], w[..., :, 2:])
    sides = np.maximum(np.maximum(sides[..., :-2, :], sides[..., 1:-1, :]), sides[..., 2:, :])
    vert = np.maximum(w[..., :-2, 1:-1], w[..., 2:, 1:-1])
    with np.errstate(invalid="ignore"):
        cand = (c >= sides) & (c > vert)
    score = np.where(cand, c, -np.inf).reshape(lead + (-1,))
    best = np.argmax(score, axis=-1)
    has = np.isfinite(np.take_along_axis(score, best[..., None], -1)[..., 0])
    kk, jj = np.divmod(best, nj - 2)
    kk, jj = kk + 1, jj + 1

    def at(dk, dj):
        k = np.clip(kk + dk, 0, nl - 1)
        j = np.clip(jj + dj, 0, nj - 1)
        return np.take_along_axis(w.reshape(lead + (-1,)), (k * nj + j)[..., None], -1)[..., 0]

    xs, ls = x[j0:j1], np.log(p[k0:k1])
    uc = at(0, 0)
    xv, ylat = parabola_vertex(xs[jj - 1], xs[jj], xs[jj + 1], at(0, -1), uc, at(0, 1))
    sv, yp = parabola_vertex(ls[kk - 1], ls[kk], ls[kk + 1], at(-1, 0), uc, at(1, 0))
    speed = uc + (ylat - uc) + (yp - uc)
    reason = np.where(has, K.OK, ref_no_core_reason(w, fin))
    with np.errstate(invalid="ignore"):
        reason = np.where(has & (speed < min_speed), K.WEAK, reason)
    reason = np.where(frac < min_fraction, K.TOO_LITTLE, reason)
    good = reason == K.OK
    return K.Core(np.where(good, xv, np.nan), np.where(good, np.exp(sv), np.nan), np.where(good, speed, np.nan),
                  np.where(good, jj + j0, -1), np.where(good, kk + k0, -1), reason)


def ref_no_core_reason(w, fin):
    lead = w.shape[:-2]
    nl, nj = w.shape[-2:]
    flat = np.where(fin, w, -np.inf).reshape(lead + (-1,))
    k, j = np.divmod(np.argmax(flat, axis=-1), nj)
    edge = (k == 0) | (k == nl - 1) | (j == 0) | (j == nj - 1)
    col = np.take_along_axis(np.moveaxis(fin, -1, -2).sum(axis=-1), j[..., None], -1)[..., 0]
    ffin = fin.reshape(lead + (-1,))
    gap = np.zeros(lead, bool)
    for dk in (-1, 0, 1):
        for dj in (-1, 0, 1):
            kn, jn = np.clip(k + dk, 0, nl - 1), np.clip(j + dj, 0, nj - 1)
            gap |= ~np.take_along_axis(ffin, (kn * nj + jn)[..., None], -1)[..., 0]
    return np.where(edge, K.AT_EDGE, np.where(col < K.MIN_LEVELS, K.COLUMN_SHORT,
                                              np.where(gap, K.NEXT_TO_MISSING, K.COLUMN_SHORT)))


def ref_hemisphere_cores(u, lat, p, windows, *, min_fraction, min_speed):
    u = np.asarray(u, float)
    out = np.full(u.shape[:-2] + (2, 2, 4), np.nan)
    for h, hemi in enumerate(("NH", "SH")):
        idx, x = K.hemisphere_columns(lat, hemi)
        cores = [ref_find_core(u[..., idx], x, p, *windows[jet], min_fraction=min_fraction, min_speed=min_speed)
                 for jet in K.JETS]
        merged = K.same_core(*cores)
        sign = 1.0 if hemi == "NH" else -1.0
        for q, c in enumerate(cores):
            reason = np.where(merged, K.MERGED, c.reason) if q == 1 else c.reason
            keep = reason == K.OK
            out[..., h, q, 0] = np.where(keep, sign * c.lat, np.nan)
            out[..., h, q, 1] = np.where(keep, c.pressure, np.nan)
            out[..., h, q, 2] = np.where(keep, c.speed, np.nan)
            out[..., h, q, 3] = reason
        out[..., h, 0, 3] = np.where(merged, -K.MERGED, out[..., h, 0, 3])
    return out


def ref_cores_by_longitude(u, lat, p, lon, windows, *, band_width, min_fraction, min_speed):
    band, centres = K.longitude_bands(lon, band_width)
    ub = K.band_means(np.asarray(u, float), band, centres.size)            # (..., L, J, B), float64
    cores = ref_hemisphere_cores(np.moveaxis(ub, -1, -3), lat, p, windows,
                                 min_fraction=min_fraction, min_speed=min_speed)
    return np.moveaxis(cores, -4, -1), centres, band


# --------------------------------------------------------------------------- the fields
def jet(lat0, p0, speed, width, depth):
    """``speed (..., I)`` times a Gaussian in |lat| and ln p centred on ``lat0 (..., I)``, ``(..., L, J, I)``."""
    s = np.log(P / p0)[:, None, None]
    d = np.abs(LAT)[None, :, None] - lat0[..., None, None, :]
    return speed[..., None, None, :] * np.exp(-(d / width) ** 2 - (s / depth) ** 2)


def fields(dtype, lead=(4,), seed=1):
    """u ``(*lead, L, J, I)``: a subtropical and an eddy-driven jet whose latitudes and speeds wander with
    longitude (split, merged, on the window's edge, weak), noise, gaps and ties."""
    rng = np.random.default_rng(seed)
    ni = LON.size
    shape = lead + (ni,)
    lam = np.deg2rad(LON)
    stj_lat = 30.0 + 16.0 * np.sin(2 * lam) + rng.normal(0, 2, shape)        # beyond 45: edge of its window
    edj_lat = 45.0 + 20.0 * np.cos(3 * lam) + rng.normal(0, 3, shape)         # sometimes on top of the other
    stj_speed = 40.0 + 30.0 * np.sin(lam) + rng.normal(0, 3, shape)           # some below 10 m/s: weak
    edj_speed = 20.0 + 15.0 * np.cos(2 * lam) + rng.normal(0, 3, shape)
    u = jet(stj_lat, 200.0, stj_speed, 7.0, 0.5) + jet(edj_lat, 300.0, edj_speed, 9.0, 1.2)
    u = u + rng.normal(0, 0.3, u.shape)
    u[..., P > 600, :, 5:12] = np.nan                       # below the ground (a plateau)
    u[..., P >= 850, 60:80, 20:26] = np.nan                 # and a high northern one, into the eddy window
    u[..., 3:, :, 30] = np.nan                              # a longitude mostly missing: too_little_data
    u[..., 60:, 31] = np.nan                                # the northern subtropics cut off at one longitude
    u[..., :, :, 40] = u[..., 4:5, :, 40]                   # no change with height: no core
    u[..., :, :, 41:44] = np.round(u[..., :, :, 41:44] * 2) / 2   # ties between neighbours
    u[..., :, 10:50, 44] = 12.0                             # flat: equal neighbours everywhere
    # a ramp towards the pole and the ground (no interior maximum) with one strong point inside the
    # northern eddy-driven window, at 51N: beside a gap, in a short column, equal to the one below it
    j51, k = np.flatnonzero(LAT == 51.0)[0], {q: np.flatnonzero(P == q)[0] for q in P}
    for i in (45, 46, 47):
        u[..., :, :, i] = np.abs(LAT)[None, :] * 0.5 + np.log(P)[:, None]
    u[..., k[300.0], j51, 45], u[..., k[400.0], j51 + 1, 45] = 200.0, np.nan
    u[..., k[200.0], j51, 46], u[..., k[250.0]:, j51, 46] = 200.0, np.nan
    u[..., k[300.0], j51, 47] = u[..., k[400.0], j51, 47] = 200.0
    return u.astype(dtype)


def assert_same(a, b):
    assert a.shape == b.shape
    assert np.array_equal(a, b, equal_nan=True)


# --------------------------------------------------------------------------- the checks
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("band_width", [0.0, 30.0, 7.5])
def test_cores_by_longitude_equal_the_plain_search(dtype, band_width):
    u = fields(dtype, lead=(5, 2))                           # time x ensemble member
    got = K.cores_by_longitude(u, LAT, P, LON, WINDOWS, band_width=band_width, **SEARCH)
    ref = ref_cores_by_longitude(u, LAT, P, LON, WINDOWS, band_width=band_width, **SEARCH)
    for g, r in zip(got, ref):
        assert_same(g, r)
    reasons = got[0][..., 3, :]
    # the fields exercise every reason code (not a test of nothing)
    for code in (K.OK, K.AT_EDGE, K.TOO_LITTLE, K.WEAK, K.MERGED, -K.MERGED):
        assert (reasons == code).any() or band_width > 0, code
    if band_width == 0:
        for code in (K.COLUMN_SHORT, K.NEXT_TO_MISSING):
            assert (reasons == code).any(), code


def test_blocks_of_every_size_give_the_same_cores(monkeypatch):
    u = fields(np.float32, lead=(7,), seed=3)
    ref = ref_cores_by_longitude(u, LAT, P, LON, WINDOWS, band_width=0.0, **SEARCH)[0]
    for block in (1, 5000, 200_000, 1 << 30):               # one column per block .. everything at once
        monkeypatch.setattr(K, "BLOCK", block)
        assert_same(K.cores_by_longitude(u, LAT, P, LON, WINDOWS, band_width=0.0, **SEARCH)[0], ref)


def test_zonal_mean_search_equals_the_plain_search():
    u = np.nanmean(fields(np.float64, lead=(6,), seed=2), axis=-1)          # (T, L, J)
    u[2, P > 250] = np.nan                                  # a time step with too few levels below 250 hPa
    assert_same(K.hemisphere_cores(u, LAT, P, WINDOWS, **SEARCH), ref_hemisphere_cores(u, LAT, P, WINDOWS, **SEARCH))
    x = np.abs(LAT[LAT >= 0])
    for window in (WINDOWS["subtropical"], WINDOWS["eddy"], ((10.0, 45.0), (100.0, 200.0)), ((1.0, 4.0), (100, 900))):
        got = K.find_core(u[..., LAT >= 0], x, P, *window, **SEARCH)
        ref = ref_find_core(u[..., LAT >= 0], x, P, *window, **SEARCH)
        for f in ("lat", "pressure", "speed", "j", "k", "reason"):
            assert_same(getattr(got, f), getattr(ref, f))
    u0 = u[0][:, LAT >= 0]
    one, ref = (f(u0, x, P, *WINDOWS["eddy"], **SEARCH) for f in (K.find_core, ref_find_core))
    for f in ("lat", "pressure", "speed", "j", "k", "reason"):    # no leading axis: 0-d results
        assert np.shape(getattr(one, f)) == () and np.array_equal(getattr(one, f), getattr(ref, f), equal_nan=True)
    none = K.cores_by_longitude(fields(np.float32)[:0], LAT, P, LON, WINDOWS, band_width=0.0, **SEARCH)[0]
    assert none.shape == (0, 2, 2, 4, LON.size)                 # no time steps: no cores


@pytest.mark.parametrize("band_width", [0.0, 30.0])
def test_sector_summaries_equal_the_plain_search(band_width):
    cfg = config.load()
    cfg["cores"]["longitude_band_deg"] = band_width
    u = fields(np.float32, lead=(3,), seed=5)
    masks = [None, (LON >= 100) & (LON <= 250), (LON >= 280) | (LON <= 20)]
    got = MC.per_longitude_reducer({"ua": u}, {"ua": P}, LON, masks, cfg, LAT)
    wins = MC.windows(cfg)
    search = dict(min_fraction=cfg["run"]["min_window_fraction"], min_speed=cfg["cores"]["min_core_speed_m_s"])
    cores, _, band = ref_cores_by_longitude(u, LAT, P, LON, wins, band_width=band_width, **search)
    for s, m in enumerate(masks):
        assert_same(got[..., s], K.summarize(cores, K.bands_in(m, band, cores.shape[-1])))
    table = MC.by_longitude_reducer({"ua": u}, {"ua": P}, LON, masks, cfg, LAT)
    assert_same(table[..., 0], cores)


def ref_locate(w):
    """The candidate search as it was: a score at every point (c at candidates, -inf elsewhere) and an
    argmax across the window, k-major."""
    w = np.asarray(w)
    n, nl, nj, ni = w.shape
    c = w[:, 1:-1, 1:-1]
    sides = np.maximum(w[:, :, :-2], w[:, :, 2:])
    around = np.maximum(np.maximum(sides[:, :-2], sides[:, 1:-1]), sides[:, 2:])
    vert = np.maximum(w[:, :-2, 1:-1], w[:, 2:, 1:-1])
    with np.errstate(invalid="ignore"):
        cand = (c >= around) & (c > vert)
    score = np.where(cand, c, -np.inf).reshape(n, -1, ni)
    best = np.argmax(score, axis=1)
    has = np.isfinite(np.take_along_axis(score, best[:, None], 1)[:, 0])
    count = np.isfinite(w).reshape(n, -1, ni).sum(axis=1)
    return best, has, count


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_candidate_list_picks_the_points_of_the_argmax_over_a_score(dtype):
    """The strongest candidate taken from the list of candidates (few per column) is the point the
    argmax over a score at every point gives: ties (the first k-major), several candidates per column,
    none, NaN and infinite values, views with negative strides, several time steps at once."""
    rng = np.random.default_rng(12)
    w = np.round(rng.normal(size=(3, 6, 13, 40)) * 3).astype(dtype)      # rounded: many ties and candidates
    w[0, 2, 5, 3] = np.nan
    w[1, :, :, 7] = np.nan
    w[2, 3, 6, 9] = np.inf
    w[2, 1, 4, 11] = -np.inf
    w[1, 2, 3:9, 13] = 50.0                                              # a plateau of equal maxima
    w[0, :, :, 20] = 1.0                                                 # constant: no candidate
    for arr in (w, w[:, :, ::-1], w[:, 1:, 2:-1], w[1:2]):
        got, want = K._locate(arr), ref_locate(arr)
        has = want[1]
        assert np.array_equal(got[1], has)
        assert np.array_equal(got[0][has], want[0][has])                 # where there is a core, the same point
        assert np.array_equal(got[2], want[2])
    assert has.any() and not has.all()


@pytest.mark.parametrize("band_width", [0.0, 15.0])
def test_cores_without_reasons_are_the_same_cores(band_width):
    """Summaries do not ask why a longitude has no core: the cores (positions, speeds, ok and merged
    codes) are those of the search that works the reasons out; only the reasons of the others differ."""
    u = fields(np.float32, lead=(3, 2))
    full = K.cores_by_longitude(u, LAT, P, LON, WINDOWS, band_width=band_width, **SEARCH)[0]
    lean = K.cores_by_longitude(u, LAT, P, LON, WINDOWS, band_width=band_width, reasons=False, **SEARCH)[0]
    assert np.array_equal(full[..., :3, :], lean[..., :3, :], equal_nan=True)
    kept = np.isin(full[..., 3, :], (K.OK, -K.MERGED, K.MERGED, K.WEAK, K.TOO_LITTLE))
    assert np.array_equal(full[..., 3, :][kept], lean[..., 3, :][kept])
    assert set(np.unique(lean[..., 3, :][~kept])) <= {K.UNEXPLAINED}
    assert (~kept).any() and kept.any()
