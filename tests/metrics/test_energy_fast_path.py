"""The energy-transport reducer's all-valid fast path gives the plain formula's numbers bit for bit.

The fast path (:func:`circtrack.kernels.zonal.energy_column_means`, used by
``metrics.transport._all_valid_step``) converts a few latitude rows at a time into reused float64
buffers and updates them in place; the plain formula is :func:`humidity_filled_aloft`,
:func:`moist_static_energy` and :func:`column_sums`, then the zonal mean. A step with a missing value
anywhere (or a sum that overflows) must take the plain path.
"""

from __future__ import annotations

import numpy as np
import pytest

from circtrack import config as C
from circtrack.kernels import zonal as Z
from circtrack.kernels.vertical import layer_weights
from circtrack.metrics import transport as T

PLEV = np.array([100.0, 200.0, 250.0, 300.0, 500.0, 700.0, 850.0, 925.0, 1000.0])


def _fields(rng, shape):
    nl = shape[-3]
    return {"va": (rng.standard_normal(shape) * 8).astype(np.float32),
            "ta": (250 + rng.standard_normal(shape) * 15).astype(np.float32),
            "zg": (np.linspace(16000, 100, nl)[:, None, None] + rng.standard_normal(shape) * 50).astype(np.float32),
            "hus": np.abs(rng.standard_normal(shape) * 0.004).astype(np.float32)}


def _plain(slabs, plev, lon, cfg, monkeypatch):
    """The reducer with every step on the general (masking) path."""
    with monkeypatch.context() as m:
        m.setattr(T, "_all_valid_step", lambda *a: False)
        return T.energy_reducer(slabs, plev, lon, [None], cfg)


@pytest.mark.parametrize("top", ["zero_at_top_level", "constant_above_top"])
@pytest.mark.parametrize("block", [None, 3])
def test_fast_path_equals_the_plain_formula(monkeypatch, top, block):
    rng = np.random.default_rng(21)
    slabs = _fields(rng, (4, PLEV.size, 37, 96))
    slabs["va"][2, -1, 5:8, 10:30] = np.nan          # below the ground in step 2
    slabs["hus"][3, 0, :, :] = np.nan                # humidity missing aloft in step 3 (counted as 0)
    lon = np.arange(0.0, 360.0, 3.75)
    cfg = C.load(None)
    cfg["cells"]["top"] = top
    if block is not None:
        monkeypatch.setattr(T, "ENERGY_BLOCK_VALUES", PLEV.size * lon.size * block)
    plev = {r: PLEV for r in slabs}
    calls = []
    real = T._all_valid_step
    monkeypatch.setattr(T, "_all_valid_step", lambda *a: calls.append(real(*a)) or calls[-1])
    got = T.energy_reducer(slabs, plev, lon, [None], cfg)
    assert calls == [True, True, False, False]      # clean steps fast, the others on the general path
    want = _plain(slabs, plev, lon, cfg, monkeypatch)
    assert np.array_equal(got, want, equal_nan=True)
    assert np.isfinite(got[..., :5, 0]).all() and got[3, :, 5, 0].max() > 0 and not got[:2, :, 5, 0].any()


def test_fast_path_with_members_and_levels_not_shared(monkeypatch):
    """Extra dimensions (members) and roles on different level sets (the shared levels taken)."""
    rng = np.random.default_rng(5)
    slabs = _fields(rng, (2, 3, PLEV.size, 19, 48))
    plev = {r: PLEV for r in slabs}
    # humidity on fewer levels (up to 300 hPa): the energy uses the six levels all four share
    slabs["hus"] = np.ascontiguousarray(slabs["hus"][:, :, 3:])
    plev["hus"] = PLEV[3:]
    lon = np.arange(0.0, 360.0, 7.5)
    cfg = C.load(None)
    got = T.energy_reducer(slabs, plev, lon, [None], cfg)
    assert np.array_equal(got, _plain(slabs, plev, lon, cfg, monkeypatch), equal_nan=True)
    assert np.isfinite(got[..., :5, 0]).all()


@pytest.mark.parametrize("rows", [1, 4, 10, 64])
def test_column_means_equal_the_plain_sums(rows):
    """:func:`energy_column_means` against the plain kernels on the whole step, any block of rows."""
    rng = np.random.default_rng(rows)
    f = _fields(rng, (PLEV.size, 23, 64))
    w = layer_weights(PLEV * 100.0, "zero_at_top_level")
    got = Z.energy_column_means(f["va"], f["ta"], f["zg"], f["hus"], w, rows)
    q, filled = Z.humidity_filled_aloft(f["hus"], f["ta"])
    e = Z.moist_static_energy(f["ta"], f["zg"], q)
    sums = Z.column_sums(f["va"], e, PLEV * 100.0, all_valid=True)
    want = np.stack([s.mean(axis=-1) for s in sums[:3]], axis=-1)
    assert not filled.any() and np.array_equal(got, want)


@pytest.mark.parametrize("where", ["va", "ta", "zg", "hus"])
def test_column_means_refuse_a_missing_value_or_an_overflow(where):
    rng = np.random.default_rng(2)
    f = _fields(rng, (PLEV.size, 23, 64))
    w = layer_weights(PLEV * 100.0, "zero_at_top_level")
    g = {k: v.copy() for k, v in f.items()}
    g[where][4, 20, 7] = np.nan                      # in the last block
    assert Z.energy_column_means(g["va"], g["ta"], g["zg"], g["hus"], w, 8) is None
    g = {k: v.astype(np.float64) for k, v in f.items()}
    g["va"][0, 0, 0] = 1e305                         # finite values whose product overflows
    assert Z.energy_column_means(g["va"], g["ta"], g["zg"], g["hus"], w, 8) is None
