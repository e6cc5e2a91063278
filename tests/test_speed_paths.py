"""The fast paths give the same numbers as the straightforward ones.

* reductions: reducers get float32 slabs and convert only the levels they use (reference: a float64
  copy of every slab first), the covariance and Fourier kernels skip masking and copies when nothing
  is missing (reference: the masked formulas always) -> identical rows, on data with missing values
  below the ground, several sectors and ensemble members along a dimension, every family;
* files of one layout share one detection (reference: every file opened and detected) -> identical
  rows, and a file of another layout among them is detected by itself;
* ``track --profile`` prints where the time went and leaves the output unchanged.
"""

from __future__ import annotations

import functools

import numpy as np
import pytest
import xarray as xr
from click.testing import CliRunner

from circtrack import config as C
from circtrack import engine, synthetic
from circtrack.cli import main
from circtrack.engine import layouts as LY
from circtrack.engine import plan as P
from circtrack.engine import prepare as PR
from circtrack.kernels import vertical as V
from circtrack.kernels import zonal as Z
from tests.conftest import csv_rows

LAT = np.arange(-88.0, 88.1, 4.0)
LON = np.arange(0.0, 360.0, 10.0)
PLEV = [1000.0, 925.0, 850.0, 700.0, 500.0, 400.0, 300.0, 250.0, 200.0, 150.0, 100.0]
SECTORS = [("atlantic", 300.0, 20.0), ("pacific", 150.0, 240.0)]


# --------------------------------------------------------------------------- references (the plain way)
def ref_slab_at_level(arr, p, target, *, tolerance):
    if p is None:
        return None
    moved = np.moveaxis(np.asarray(arr, dtype=np.float64), -1, -3)
    out = V.at_level(moved, p, target, tolerance=tolerance)
    return None if out is None else np.moveaxis(out, -2, -1)


def ref_zonal_covariance(a, b, mask=None):
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    if mask is not None:
        a, b = a[..., mask], b[..., mask]
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


def ref_fourier_amplitudes(y, lon, wavenumbers):
    lam = np.deg2rad(np.mod(np.asarray(lon, float), 360.0))
    order = np.argsort(lam, kind="stable")
    lam = lam[order]
    y = np.ascontiguousarray(np.asarray(y, dtype=np.float64)[..., order])
    gaps = np.diff(np.concatenate([lam, [lam[0] + 2 * np.pi]]))
    w = 0.5 * (gaps + np.roll(gaps, 1))
    ks = np.asarray(wavenumbers, dtype=float)
    cos = np.cos(ks[:, None] * lam[None, :]) * w[None, :]
    sin = np.sin(ks[:, None] * lam[None, :]) * w[None, :]
    y0 = np.nan_to_num(y, nan=0.0)
    amp = np.hypot(y0 @ cos.T / np.pi, y0 @ sin.T / np.pi)
    return np.where(np.isfinite(y).all(axis=-1)[..., None], amp, np.nan)


CALLS = []


def _float64_first(fn):
    @functools.wraps(fn)                  # keeps the signature (the engine looks for a 'lat' keyword)
    def wrapped(slabs, *args, **kw):
        CALLS.append(fn.__name__)
        return fn({r: np.array(a, dtype=np.float64) for r, a in slabs.items()}, *args, **kw)
    return wrapped


def use_references(monkeypatch):
    """The engine as it was: float64 copies of every slab, masked kernels always."""
    monkeypatch.setattr(Z, "slab_at_level", ref_slab_at_level)
    monkeypatch.setattr(Z, "level_slab", ref_slab_at_level)          # a whole float64 level, not a lazy one
    monkeypatch.setattr(Z, "zonal_covariance", ref_zonal_covariance)
    monkeypatch.setattr(Z, "fourier_amplitudes", ref_fourier_amplitudes)
    make = P.Plan.make.__func__

    def plain_make(cls, *a, **k):
        plan = make(cls, *a, **k)
        plan.reducers = {n: _float64_first(f) for n, f in plan.reducers.items()}
        return plan

    monkeypatch.setattr(P.Plan, "make", classmethod(plain_make))


# --------------------------------------------------------------------------- data
def full_set(ntime=4, members=2, seed=0, start=0):
    """ua, va, ta, zg, hus, ps with members along a dimension and NaN below a mountain range."""
    rng = np.random.default_rng(seed)
    t = [synthetic.monthly_times(2000, 1, "noleap")[0].__class__(2000, 1, 1 + start + k, calendar="noleap")
         for k in range(ntime)]
    base = synthetic.dataset(LAT, LON, PLEV, t)
    p = np.asarray(PLEV)
    shape = (ntime, members, len(PLEV), LAT.size, LON.size)
    lat = np.deg2rad(LAT)
    fields = {
        "ua": np.repeat(base["ua"].values[:, None], members, axis=1),
        "va": np.repeat(base["va"].values[:, None], members, axis=1),
        "ta": np.broadcast_to(np.maximum((300 - 45 * np.sin(lat) ** 2)[None, :] * (p[:, None] / 1000) ** 0.19, 212.0)
                              [None, None, :, :, None], shape),
        "zg": np.broadcast_to((7460.0 * np.log(1013.0 / p))[None, None, :, None, None], shape),
        "hus": np.broadcast_to((0.018 * np.cos(lat) ** 2)[None, None, None, :, None]
                               * ((p / 1000) ** 3)[None, None, :, None, None], shape),
    }
    scale = {"ua": 2.0, "va": 1.0, "ta": 1.0, "zg": 5.0, "hus": 1e-4}
    ground = np.zeros(shape, dtype=bool)                 # a mountain range: 1000/925 hPa below ground
    ground[:, :, :2, 25:35, 3:9] = True
    units = {"ua": "m s-1", "va": "m s-1", "ta": "K", "zg": "m", "hus": "1"}
    sn = {"ua": "eastward_wind", "va": "northward_wind", "ta": "air_temperature", "zg": "geopotential_height",
          "hus": "specific_humidity"}
    dims = ("time", "realization", "plev", "lat", "lon")
    data = {}
    for name, f in fields.items():
        a = (f + scale[name] * rng.standard_normal(shape)).astype(np.float32)
        if name == "hus":
            a = np.abs(a)
        a[ground] = np.nan
        data[name] = (dims, a, {"units": units[name], "standard_name": sn[name]})
    ps = 101300.0 + 300.0 * rng.standard_normal((ntime, members, LAT.size, LON.size))
    data["ps"] = (("time", "realization", "lat", "lon"), ps.astype(np.float32),
                  {"units": "Pa", "standard_name": "surface_air_pressure"})
    coords = {k: base[k] for k in ("time", "plev", "lat", "lon")}
    coords["realization"] = ("realization", np.arange(1, members + 1))
    return xr.Dataset(data, coords=coords)


def write(ds, path):
    ds.to_netcdf(str(path), encoding=synthetic.time_encoding("noleap", "days since 2000-01-01"))
    return str(path)


def sync_cfg():
    cfg = C.load(None)
    cfg["run"]["scheduler"] = "sync"
    cfg["run"]["time_chunk"] = 3               # several tasks per file
    return cfg


def rows(paths, cfg, sectors=()):
    return csv_rows(engine.track([str(p) for p in paths], cfg, label="x", sectors=list(sectors)))


# --------------------------------------------------------------------------- kernels
def test_slab_at_level_converts_only_the_levels_it_uses_with_the_same_numbers():
    rng = np.random.default_rng(1)
    arr = rng.standard_normal((3, 2, 5, 7, 12)).astype(np.float32)
    arr[0, 1, 2, 3, :4] = np.nan
    p = np.array([100.0, 250.0, 500.0, 850.0, 1000.0])
    for target in (500.0, 503.0, 300.0, 925.0, 100.0, 1000.0, 50.0, 1100.0):
        got = Z.slab_at_level(arr, p, target, tolerance=5.0)
        want = ref_slab_at_level(arr, p, target, tolerance=5.0)
        if want is None:
            assert got is None
            continue
        assert got.dtype == np.float64 and got.shape == want.shape
        assert np.array_equal(got, want, equal_nan=True), target


def test_covariance_and_fourier_fast_paths_equal_the_masked_formulas():
    rng = np.random.default_rng(2)
    lon = np.arange(0.0, 360.0, 7.5)
    a = rng.standard_normal((4, 9, lon.size)) * 10
    b = rng.standard_normal((4, 9, lon.size)) * 3 + 1
    holes = a.copy()
    holes[1, 2, 5] = np.nan
    holes[3, :, 7:9] = np.inf
    band = (lon > 100) & (lon < 200)
    for x, y, m in ((a, b, None), (a, b, band), (holes, b, None), (b, holes, band), (a.astype(np.float32), b, None)):
        got, want = Z.zonal_covariance(x, y, m), ref_zonal_covariance(x, y, m)
        assert np.array_equal(got[0], want[0], equal_nan=True) and np.array_equal(got[1], want[1])
    for lons in (lon, np.mod(lon + 180.0, 360.0) - 180.0):       # in order, and from -180 (reordered)
        for y in (a, holes):
            assert np.array_equal(Z.fourier_amplitudes(y, lons, (1, 2, 3)), ref_fourier_amplitudes(y, lons, (1, 2, 3)),
                                  equal_nan=True)


def test_fourier_amplitudes_the_same_bits_from_either_longitude_convention():
    """The same field on a 0..360 grid and on a -180..180 grid gives identical amplitudes (BLAS may
    sum a non-contiguous array in another order: the reordered field is made contiguous)."""
    rng = np.random.default_rng(5)
    lon = np.arange(0.0, 360.0, 2.5)
    y = rng.standard_normal((6, 31, lon.size)) * 10
    rolled = np.roll(np.arange(lon.size), -lon.size // 2)            # the points from 180 E on...
    west = np.mod(lon[rolled] + 180.0, 360.0) - 180.0                # ... named -180 .. 177.5, as read from a file
    assert west[0] == -180.0 and np.all(np.diff(west) > 0)
    assert np.array_equal(Z.fourier_amplitudes(y, lon, (1, 2, 3, 4)),
                          Z.fourier_amplitudes(np.ascontiguousarray(y[..., rolled]), west, (1, 2, 3, 4)))


def test_covariance_in_blocks_of_rows_equals_the_whole_array_at_once(monkeypatch):
    """Rows are reduced a block at a time (cache-sized): the same numbers as one pass over everything."""
    rng = np.random.default_rng(3)
    a = rng.standard_normal((7, 61, 144)) * 12 + 5
    b = (rng.standard_normal((7, 61, 144)) * 4).astype(np.float32)
    monkeypatch.setattr(Z, "_BLOCK_VALUES", 1000)          # 6 rows per block, 427 rows: many blocks
    got = Z.zonal_covariance(a, b)
    assert np.array_equal(got[0], ref_zonal_covariance(a, b)[0])
    monkeypatch.setattr(Z, "_BLOCK_VALUES", 1 << 30)       # one block
    assert np.array_equal(got[0], Z.zonal_covariance(a, b)[0])


def test_level_slab_gives_the_numbers_of_slab_at_level_for_any_selection():
    """A lazy level converts (or interpolates) only what is indexed: the same numbers as the whole level."""
    rng = np.random.default_rng(5)
    p = np.array([100.0, 250.0, 500.0, 850.0, 1000.0])
    for dtype in (np.float32, np.float64):
        arr = (rng.standard_normal((3, 2, 5, 7, 12)) * 20).astype(dtype)
        arr[0, 1, 2, 3, :4] = np.nan
        for target in (500.0, 503.0, 300.0, 925.0, 100.0, 1000.0, 50.0, 1100.0):
            slab = Z.level_slab(arr, p, target, tolerance=5.0)
            want = ref_slab_at_level(arr, p, target, tolerance=5.0)
            if want is None:
                assert slab is None
                continue
            assert slab.shape == want.shape
            assert np.array_equal(np.asarray(slab), want, equal_nan=True)
            for key in ((1, 0, slice(2, 5)), (..., [1, 4, 6], slice(None)), (2, 1, slice(0, 3), np.arange(12) > 5)):
                got = slab[key]
                assert got.dtype == np.float64 and np.array_equal(got, want[key], equal_nan=True), (target, key)


@pytest.mark.parametrize("rows", [1, 7, 1 << 15])
def test_covariance_of_level_slabs_by_blocks_of_rows_equals_the_plain_formula(monkeypatch, rows):
    """The eddy flux reduces its level a few rows at a time (float64 blocks in cache, the fast formula
    where a block has no missing value): the numbers of the masked formula on the whole float64 level."""
    monkeypatch.setattr(Z, "_ROWS_VALUES", rows * 48)
    rng = np.random.default_rng(6)
    lon = np.arange(0.0, 360.0, 7.5)
    p = np.array([100.0, 200.0, 300.0, 500.0, 850.0])
    u = (rng.standard_normal((3, 2, p.size, 23, lon.size)) * 15 + 10).astype(np.float32)
    v = (rng.standard_normal((3, 2, p.size, 23, lon.size)) * 5).astype(np.float32)
    u[1, 0, 1:3, 4, 10:14] = np.nan                  # gaps on the levels used: masked rows among fast ones
    v[2, 1, 2, 20:, :] = np.nan                      # whole rows missing
    v[0, 0, 1, 7, 3] = np.inf
    band = (lon > 100) & (lon < 200)
    for target in (250.0, 300.0, 200.0):
        for m in (None, band, np.zeros(lon.size, bool)):
            for a, b in ((u, v), (v, u), (u, u.astype(np.float64))):
                got = Z.zonal_covariance(Z.level_slab(a, p, target, tolerance=1.0),
                                         Z.level_slab(b, p, target, tolerance=1.0), m)
                # (the reference level made contiguous: each row summed along its memory, as the
                # engine's float64 level always was; a strided view may be summed in another order)
                want = ref_zonal_covariance(np.ascontiguousarray(ref_slab_at_level(a, p, target, tolerance=1.0)),
                                            np.ascontiguousarray(ref_slab_at_level(b, p, target, tolerance=1.0)), m)
                assert np.array_equal(got[0], want[0], equal_nan=True) and np.array_equal(got[1], want[1])


def test_fourier_amplitudes_of_a_lazy_level_slice_by_slice_equal_the_whole_level():
    """The wave amplitudes convert their level one (J, I) slice at a time: numpy's stacked matrix
    product is one product per slice, so the numbers are those of the whole float64 level at once;
    slices without missing values skip the masking."""
    rng = np.random.default_rng(8)
    lon = np.arange(0.0, 360.0, 7.5)
    p = np.array([200.0, 300.0, 500.0])
    v = (rng.standard_normal((3, 2, p.size, 19, lon.size)) * 8).astype(np.float32)
    v[1, 0, 1, 4, 10] = np.nan
    v[2, 1, :, 7, :] = np.nan
    v[0, 1, 1, 3, 3] = np.inf
    for lons in (lon, np.mod(lon + 180.0, 360.0) - 180.0):
        for target in (300.0, 250.0):
            slab = Z.level_slab(v, p, target, tolerance=1.0)
            got = Z.fourier_amplitudes(slab, lons, (1, 2, 3))
            want = Z.fourier_amplitudes(np.asarray(slab), lons, (1, 2, 3))
            assert got.shape == want.shape and np.array_equal(got, want, equal_nan=True), target
            assert np.isnan(got[1, 0, 4]).all() and np.isfinite(got[1, 0, 5]).all()
            np.testing.assert_allclose(got, ref_fourier_amplitudes(np.asarray(slab), lons, (1, 2, 3)), rtol=1e-12,
                                       atol=1e-12)


def ref_per_longitude_peak(y, lat, hemi, window, *, min_fraction):
    from circtrack.kernels.extrema import window_extremum

    lat = np.asarray(lat, float)
    idx = np.flatnonzero(lat >= 0) if hemi == "NH" else np.flatnonzero(lat <= 0)[::-1]
    yh = np.moveaxis(np.asarray(y, float)[..., idx, :], -1, -2)
    ext = window_extremum(yh, np.abs(lat[idx]), window[0], window[1], kind="max")
    good = (ext.reason(min_fraction) == "ok") & np.isfinite(ext.position)
    return np.where(good, ext.position, np.nan)


def test_per_longitude_peak_on_the_window_rows_equals_the_whole_hemisphere():
    """Only the window's rows and a neighbour each side are searched: same positions and verdicts,
    also with windows reaching the equator or the pole, gaps next to the maximum and maxima on the edge."""
    rng = np.random.default_rng(4)
    lat = np.arange(-90.0, 90.1, 2.5)
    lon = np.arange(0.0, 360.0, 15.0)
    jet = 40.0 + 15.0 * np.sin(np.deg2rad(lon))                      # 25..55 degrees: some at the edges
    y = 30.0 * np.exp(-((np.abs(lat)[:, None] - jet[None, :]) / 8.0) ** 2) + rng.standard_normal((3, lat.size, lon.size))
    y[1, 60:62, 4] = np.nan                                          # a gap next to the NH maximum
    y[2, :, 9] = np.nan
    seen = set()
    for arr in (y, y.astype(np.float32)):
        for hemi in ("NH", "SH"):
            for window in ((15.0, 70.0), (30.0, 50.0), (0.0, 45.0), (60.0, 90.0), (0.0, 90.0), (91.0, 95.0)):
                got = Z.per_longitude_peak(arr, lat, hemi, window, min_fraction=0.5)
                want = ref_per_longitude_peak(arr, lat, hemi, window, min_fraction=0.5)
                assert np.array_equal(got, want, equal_nan=True), (hemi, window)
                seen.update({"finite"} if np.isfinite(got).any() else set())
                seen.update({"nan"} if np.isnan(got).any() else set())
    assert seen == {"finite", "nan"}


def test_per_longitude_peak_on_a_lazy_level_equals_the_float64_level():
    """The waviness reads only the window's rows of its level, float32 as read at a level of the file
    (interpolated levels in float64): the positions of the search on the whole float64 level."""
    rng = np.random.default_rng(7)
    lat = np.arange(-90.0, 90.1, 2.5)
    lon = np.arange(0.0, 360.0, 15.0)
    p = np.array([300.0, 500.0, 700.0, 850.0, 925.0])
    jet = 40.0 + 15.0 * np.sin(np.deg2rad(lon))
    base = 30.0 * np.exp(-((np.abs(lat)[:, None] - jet[None, :]) / 8.0) ** 2)
    u = (base[None, None, None] + rng.standard_normal((3, 2, p.size, lat.size, lon.size))).astype(np.float32)
    u[1, 0, 3, 60:62, 4] = np.nan
    u[2, 1, :, :, 9] = np.nan
    u[0, 0, 3, 20, 11] = np.inf
    for arr in (u, u.astype(np.float64)):
        for target in (850.0, 800.0):
            slab = Z.level_slab(arr, p, target, tolerance=1.0)
            whole = np.ascontiguousarray(ref_slab_at_level(arr, p, target, tolerance=1.0))
            for hemi in ("NH", "SH"):
                for window in ((15.0, 70.0), (0.0, 45.0), (60.0, 90.0)):
                    got = Z.per_longitude_peak(slab, lat, hemi, window, min_fraction=0.5)
                    want = ref_per_longitude_peak(whole, lat, hemi, window, min_fraction=0.5)
                    assert np.array_equal(got, want, equal_nan=True), (target, hemi, window)


# --------------------------------------------------------------------------- whole runs
def test_rows_identical_to_float64_copies_with_missing_data_sectors_and_members(tmp_path, monkeypatch):
    paths = [write(full_set(4, seed=k, start=4 * k), tmp_path / f"f{k}.nc") for k in range(2)]
    fast = rows(paths, sync_cfg(), SECTORS)
    metrics = {r.split(",")[-4] for r in fast}
    # every family ran, among them those whose reducers changed
    assert {"eddy_momentum_flux_lat", "planetary_wave_1_amplitude", "jet_waviness",
            "energy_transport_max_lat"} <= metrics
    assert any(",atlantic," in r for r in fast) and any(",pacific," in r for r in fast)
    finite = [r for r in fast if r.split(",")[-3] not in ("NaN", "")]
    assert len(finite) > len(fast) // 2
    use_references(monkeypatch)
    CALLS.clear()
    assert rows(paths, sync_cfg(), SECTORS) == fast
    assert {"energy_reducer", "eddy_momentum_reducer", "planetary_wave_reducer", "jet_waviness_reducer"} <= set(CALLS)


def test_rows_identical_in_worker_processes(tmp_path):
    paths = [write(full_set(3, members=1, seed=5), tmp_path / "one.nc")]
    cfg = C.load(None)
    cfg["run"]["time_chunk"] = 1
    assert rows(paths, cfg, SECTORS) == rows(paths, sync_cfg(), SECTORS)


# --------------------------------------------------------------------------- files of one layout
def one_day_files(tmp_path, n, **kw):
    out = []
    for k in range(n):
        ds = full_set(1, members=1, seed=k, start=k)
        ds.attrs.update(history=f"written at step {k}", tracking_id=f"id-{k}")    # differ per file, as usual
        out.append(write(ds, tmp_path / f"day{k:03d}.nc"))
    return out


def counting_prepare(monkeypatch):
    calls = []
    real = PR.prepare_file

    def counted(path, *a, **k):
        calls.append(path)
        return real(path, *a, **k)

    monkeypatch.setattr(P, "prepare_file", counted)
    return calls


def test_one_layout_is_detected_once_with_the_same_rows(tmp_path, monkeypatch):
    paths = one_day_files(tmp_path, 6)
    calls = counting_prepare(monkeypatch)
    shared = rows(paths, sync_cfg())
    assert calls == [paths[0]]                                    # the others: a header read each
    run = engine.Run(paths, sync_cfg())
    monkeypatch.setattr(LY.LayoutCache, "shared", lambda self, path: None)
    calls.clear()
    assert rows(paths, sync_cfg()) == shared
    assert calls == paths
    alone = engine.Run(paths, sync_cfg())
    for a, b in zip(run.infos, alone.infos):                        # the detections agree file by file
        assert a.path == b.path and a.detected.path == b.detected.path
        assert list(a.detected.times) == list(b.detected.times)
        assert {r: (x.path, x.ntime, x.selection, x.dims) for r, x in a.readers.items()} == \
            {r: (x.path, x.ntime, x.selection, x.dims) for r, x in b.readers.items()}


def test_another_layout_among_them_is_detected_by_itself(tmp_path, monkeypatch):
    paths = one_day_files(tmp_path, 4)
    other = full_set(1, members=1, seed=9, start=10)
    other["time"].encoding = {}
    # same variables and shapes, other time units: not the same header, detected itself, same rows
    other.to_netcdf(tmp_path / "other.nc", encoding={"time": {"units": "hours since 2000-01-01", "calendar": "noleap"}})
    odd = full_set(1, members=1, seed=3, start=11)
    odd = odd.assign_coords(lat=odd["lat"].values + 1.0)                # another grid, same header otherwise
    write(odd, tmp_path / "odd.nc")
    calls = counting_prepare(monkeypatch)
    both = paths + [str(tmp_path / "other.nc")]
    shared = rows(both, sync_cfg())
    assert calls == [paths[0], str(tmp_path / "other.nc")]
    monkeypatch.setattr(LY.LayoutCache, "shared", lambda self, path: None)
    assert rows(both, sync_cfg()) == shared
    monkeypatch.undo()
    calls = counting_prepare(monkeypatch)
    with pytest.raises(engine.InputError if hasattr(engine, "InputError") else Exception, match="latitude grid"):
        engine.Run(paths + [str(tmp_path / "odd.nc")], sync_cfg())
    assert str(tmp_path / "odd.nc") in calls


def test_headers_read_by_worker_processes_give_the_same_rows(tmp_path, monkeypatch):
    """Many files: worker processes read the headers in parallel; the parent reads none itself."""
    import os

    from circtrack.engine import run as R

    paths = one_day_files(tmp_path, 6)
    ref = rows(paths, sync_cfg())
    cfg = C.load(None)
    cfg["run"]["processes"] = 2
    monkeypatch.setattr(R, "HEADERS_IN_WORKERS", 4)
    in_workers = (os.cpu_count() or 1) >= 2
    heads = R.read_headers(paths, cfg).wait()
    if in_workers:
        assert set(heads) == set(paths) and all(heads[p]["key"] == LY._header(p, cfg)["key"] for p in paths)
    assert R.read_headers(paths, sync_cfg()).wait() is None and R.read_headers(paths[:3], cfg).wait() is None
    pending = R.read_headers(paths, cfg)          # an error while they are read: the pool is stopped
    pending.cancel()
    assert pending.runner is None and pending.wait() is None
    parent, real = [], LY._header
    monkeypatch.setattr(LY, "_header", lambda p, c: parent.append(p) or real(p, c))   # counts in this process only
    calls = counting_prepare(monkeypatch)
    assert rows(paths, cfg) == ref
    assert calls == [paths[0]]
    if in_workers:
        assert parent == []


def test_time_steps_decoded_at_once_equal_file_by_file(tmp_path):
    paths = one_day_files(tmp_path, 3)
    for k, (units, cal, dtype) in enumerate([("hours since 2000-01-01", "noleap", "float64"),
                                             ("days since 1850-01-01", "360_day", "int32"),
                                             ("days since 1850-01-01 12:00", "standard", "float64")]):
        ds = full_set(2, members=1, seed=k, start=7 * k)
        ds["time"].encoding = {}
        p = str(tmp_path / f"enc{k}.nc")
        ds.to_netcdf(p, encoding={"time": {"units": units, "calendar": cal, "dtype": dtype}})
        paths.append(p)
    cfg = C.load(None)
    heads = {p: LY._header(p, cfg) for p in paths}
    many = LY._decode_many(heads, "time")
    assert set(many) == set(paths)
    for p in paths:
        one = LY._decode_times(heads[p], "time")
        assert [(type(a), repr(a)) for a in many[p]] == [(type(a), repr(a)) for a in one], p


# --------------------------------------------------------------------------- the CSV and its summary
def ref_sorted_lines(outcome):
    """Row by row, every field formatted on its own (the plain way)."""
    from circtrack.output import format_value

    cols, keys = outcome.columns, outcome.key_columns
    sort_keys = [outcome.time_order if k == "time" else np.asarray(cols[k], dtype=str) for k in reversed(keys)]
    lines = [",".join(cols)]
    for i in np.lexsort(sort_keys):
        lines.append(",".join(format_value(cols[k][i]) if k == "value" else str(cols[k][i]) for k in cols))
    return lines


def ref_counts(metrics, values, flags):
    import collections

    out = {}
    for m, v, f in zip(metrics, values, flags):
        c = out.setdefault(str(m), [collections.Counter(), 0, 0])
        c[0][str(f).split(";", 1)[0]] += 1
        c[1] += 1
        c[2] += int(np.isfinite(v))
    return out


def test_csv_lines_and_summary_counts_equal_the_row_by_row_way():
    from circtrack import summary
    from circtrack.engine.rows import Outcome
    from circtrack.output import sorted_lines

    rng = np.random.default_rng(3)
    n = 400
    values = rng.choice([0.0, -0.0, 1e-7, -2.5e-12, 123456789.0, 1 / 3, np.nan, np.inf, -np.inf, 12.5], n)
    values = values * rng.choice([1.0, -1.0, 1e5, 1e-5], n)
    cols = {"source": np.array(["b", "a"] * (n // 2), dtype=object),
            "time": np.array([f"2001-01-{1 + k % 9:02d}" for k in range(n)], dtype=object),
            "hemisphere": rng.choice(np.array(["NH", "SH"], dtype=object), n),
            "metric": rng.choice(np.array(["m1", "m2", "m3"], dtype=object), n),
            "value": values,
            "units": np.array(["deg"] * n, dtype=object),
            "flag": rng.choice(np.array(["ok", "weak_peak", "weak_peak;note", "too_little_data"], dtype=object), n)}
    out = Outcome(cols, ["source", "time", "hemisphere", "metric"], {}, np.array([k % 9 for k in range(n)]))
    assert sorted_lines(out) == ref_sorted_lines(out)
    got = summary.counts(cols["metric"], values, cols["flag"])
    ref = ref_counts(cols["metric"], values, cols["flag"])
    assert list(got) == list(ref)
    for m in ref:           # same counts, and the flags in the same order (most_common breaks ties by it)
        assert got[m][1:] == ref[m][1:] and list(got[m][0].items()) == list(ref[m][0].items())


# --------------------------------------------------------------------------- --profile
def test_profile_prints_where_the_time_went_and_changes_nothing(tmp_path):
    path = write(full_set(2, members=1), tmp_path / "p.nc")
    plain = CliRunner().invoke(main, ["track", path, "-o", str(tmp_path / "a.csv"), "-q"])
    prof = CliRunner().invoke(main, ["track", path, "-o", str(tmp_path / "b.csv"), "-q", "--profile"])
    assert plain.exit_code == 0 and prof.exit_code == 0, prof.output
    assert (tmp_path / "a.csv").read_text() == (tmp_path / "b.csv").read_text()
    text = prof.stderr if hasattr(prof, "stderr") else prof.output
    for part in ("open and detect every file", "wait for reduced batches", "read ua", "zonal means va",
                 "reducer eddy_momentum_flux", "reducer energy_column_sums", "cells", "energy_transport"):
        assert part in text, part
    assert "CPU time in workers" in text and "wall time beyond CPU" in text
    assert "circtrack profile" not in plain.output


def reduced_sizes(monkeypatch):
    """A list that fills with the number of time steps of every reduction (engine/reduce.py _reduce)."""
    from circtrack.engine import reduce as RD

    sizes = []
    real = RD._reduce

    def spy(job, slabs, clock):
        sizes.append(next(iter(slabs.values())).shape[0])
        return real(job, slabs, clock)

    monkeypatch.setattr(RD, "_reduce", spy)
    return sizes


def test_one_day_files_reduced_together_give_the_rows_of_one_at_a_time(tmp_path, monkeypatch):
    """A task of several one-day files stacks them along time for the reductions (engine/reduce.py):
    the same rows as reducing each file on its own, every family included."""
    paths = one_day_files(tmp_path, 6)
    alone = sync_cfg()
    alone["run"]["time_chunk"] = 1                 # one file per task: nothing stacked
    one_by_one = rows(paths, alone, SECTORS)
    sizes = reduced_sizes(monkeypatch)
    together = sync_cfg()
    together["run"]["time_chunk"] = 6
    assert rows(paths, together, SECTORS) == one_by_one
    assert max(sizes) > 1                          # the files were reduced together
    assert {"energy_transport_max_lat", "jet_waviness", "planetary_wave_1_amplitude",
            "eddy_jet_core_lat"} <= {r.split(",")[-4] for r in one_by_one}


def test_large_chunks_of_one_task_are_reduced_one_at_a_time(tmp_path, monkeypatch):
    """Chunks too large to stack (engine/reduce.py STACK_MAX_BYTES) are read and reduced one after
    the other, one in memory at a time: the same rows again."""
    from circtrack.engine import reduce as RD

    paths = one_day_files(tmp_path, 4)
    alone = sync_cfg()
    alone["run"]["time_chunk"] = 1
    one_by_one = rows(paths, alone, SECTORS)
    sizes = reduced_sizes(monkeypatch)
    monkeypatch.setattr(RD, "STACK_MAX_BYTES", 1)
    grouped = sync_cfg()
    grouped["run"]["time_chunk"] = 4
    assert rows(paths, grouped, SECTORS) == one_by_one
    assert sizes and max(sizes) == 1
