"""Reducer fast paths that work a block at a time (engine/reduce.py zonal means, the energy-transport
reducer in metrics/transport.py) give the numbers of the whole array at once, and tasks run BLAS on
one thread. Moved from tests/test_speed_paths.py, which had grown past 600 lines."""

from __future__ import annotations

import numpy as np
import pytest

from circtrack import config as C


def test_tasks_run_blas_on_one_thread():
    """BLAS threads spinning on cores busy with other tasks made the wave amplitudes 4-15x slower."""
    import threadpoolctl

    from circtrack.engine import reduce as RD

    RD.reduce_chunks([])
    blas = [i for i in threadpoolctl.threadpool_info() if i["user_api"] == "blas"]
    assert blas and all(i["num_threads"] == 1 for i in blas)


@pytest.mark.parametrize("block_bytes", [8 * 720 * 3, 2 ** 21, 10 ** 9])
def test_zonal_means_in_converted_blocks_equal_numpys_mean(monkeypatch, block_bytes):
    """The full-circle zonal mean converts float32 rows a block at a time: bit for bit numpy's
    ``mean(axis=-1, dtype=float64)``, for NaN and infinite rows too, any block size."""
    from circtrack.engine import reduce as RD

    monkeypatch.setattr(RD, "MEAN_BLOCK_BYTES", block_bytes)
    rng = np.random.default_rng(11)
    x = (rng.standard_normal((5, 3, 37, 720)) * 30 + 8).astype(np.float32)
    x[1, 2, 4, 100] = np.nan
    x[3, 0, 7, :5] = np.inf
    for arr in (x, x[2], x[..., :719].copy(), x.astype(np.float64), x[:, ::2]):
        got = RD._row_means(arr)
        want = arr.mean(axis=-1, dtype=np.float64)
        assert got.shape == want.shape and np.array_equal(got, want, equal_nan=True)
    stats = RD._zonal_block(x, [None])
    clean = np.isfinite(x).all(axis=-1)
    assert np.array_equal(stats[..., 0, 0][clean], x.mean(axis=-1, dtype=np.float64)[clean])
    assert stats[1, 2, 4, 0, 0] == pytest.approx(np.nanmean(x[1, 2, 4].astype(np.float64)))   # NaN rows redone
    assert stats[1, 2, 4, 0, 1] == pytest.approx(719 / 720)


@pytest.mark.parametrize("holes", [False, True])
def test_energy_sums_in_blocks_of_rows_equal_the_whole_step(monkeypatch, holes):
    """The energy reducer works on a few latitude rows at a time: the same numbers as the whole time
    step at once, for clean steps and for steps with points below the ground and humidity missing
    aloft (every block takes the path the whole step takes)."""
    from circtrack.metrics import transport as T

    rng = np.random.default_rng(8)
    plev = np.array([100.0, 200.0, 300.0, 500.0, 700.0, 850.0, 1000.0])
    shape = (3, plev.size, 23, 40)
    slabs = {"va": (rng.standard_normal(shape) * 5).astype(np.float32),
             "ta": (250 + rng.standard_normal(shape) * 10).astype(np.float32),
             "zg": (np.linspace(16000, 100, plev.size)[:, None, None] + rng.standard_normal(shape) * 50).astype(np.float32),
             "hus": np.abs(rng.standard_normal(shape) * 0.004).astype(np.float32)}
    if holes:
        slabs["hus"][:, 0, 3:9] = np.nan                             # missing aloft: counted as 0
        for r in ("va", "ta", "zg", "hus"):
            slabs[r][1, -1, 10:12, 5:20] = np.nan                    # below the ground in step 1 only
    lon = np.arange(0.0, 360.0, 9.0)
    cfg = C.load(None)
    args = (slabs, {r: plev for r in slabs}, lon, [None], cfg)
    monkeypatch.setattr(T, "ENERGY_BLOCK_VALUES", 10 ** 12)
    whole = T.energy_reducer(*args)
    monkeypatch.setattr(T, "ENERGY_BLOCK_VALUES", plev.size * lon.size * 3)      # 3 rows a block
    assert np.array_equal(T.energy_reducer(*args), whole, equal_nan=True)
    assert np.isfinite(whole[..., 0, 0]).all() and (whole[..., 5, 0].max() > 0) == holes
