"""Read buffers in reused memory maps (inputs/slabs.py): reused only once nothing refers to them, the
values of reads and the rows of runs the same as with numpy's own arrays."""

from __future__ import annotations

import gc

import numpy as np
import pytest

from circtrack import config as C
from circtrack import engine
from circtrack.inputs import chunks as CH
from circtrack.inputs import slabs as SL
from tests.conftest import csv_rows


def address(a):
    return a.__array_interface__["data"][0]


@pytest.fixture(autouse=True)
def clean_pool():
    SL.release()
    yield
    gc.collect()
    SL.release()


def test_small_arrays_are_numpys_own():
    a = SL.empty((10, 10), np.float32)
    assert a.flags.owndata and a.shape == (10, 10) and a.dtype == np.float32


def test_a_map_is_reused_once_its_array_is_gone():
    shape = (2, SL.MIN_BYTES // 4)
    a = SL.empty(shape, np.float32)
    assert a.shape == shape and a.dtype == np.float32 and a.flags.writeable and a.flags.c_contiguous
    where = address(a)
    b = SL.empty(shape, np.float32)                     # a still alive: a map of its own
    assert address(b) != where
    del a
    assert SL.held() >= shape[0] * shape[1] * 4
    c = SL.empty(shape, np.float32)
    assert address(c) == where and SL.held() == 0
    del b, c
    SL.release()
    assert SL.held() == 0


def test_a_view_keeps_its_map_from_the_next_read():
    shape = (2, SL.MIN_BYTES // 8)
    a = SL.empty(shape, np.float64)
    a[...] = 7.0
    view = a[::-1].T                                  # what a reader hands on: reversed, transposed
    del a
    b = SL.empty(shape, np.float64)
    assert address(b) != address(view.T[::-1])
    b[...] = -1.0
    assert np.all(view == 7.0)                        # the view's values are untouched


def test_smaller_reads_take_a_free_map_larger_ones_drop_the_too_small():
    n = SL.MIN_BYTES // 4
    big = SL.empty((8, n), np.float32)
    where = address(big)
    del big
    seven = SL.empty((7, n), np.float32)               # 7 time steps in the 8 steps' map
    assert address(seven) == where and seven.shape == (7, n)
    del seven
    tiny = SL.empty((1, n), np.float32)                # less than half: a map of its own
    assert address(tiny) != where
    del tiny
    nine = SL.empty((9, n), np.float32)                # none fits: the free ones too small go
    assert SL.held() == 0
    del nine


def test_maps_kept_are_bounded(monkeypatch):
    monkeypatch.setattr(SL, "KEEP_BYTES", 3 * SL.MIN_BYTES)
    arrays = [SL.empty((SL.MIN_BYTES,), np.uint8) for _ in range(5)]
    del arrays
    assert SL.held() == 3 * SL.MIN_BYTES


@pytest.mark.parametrize("compress", [True, False])
def test_rows_identical_with_and_without_reused_maps(tmp_path, monkeypatch, compress):
    """Every read array in a reused map (the threshold lowered to 0): the same rows as numpy's
    arrays, and the maps were used and given back between tasks."""
    from circtrack import synthetic

    lat = np.arange(-90.0, 90.1, 3.0)
    lon = np.arange(0.0, 360.0, 6.0)
    ds = synthetic.dataset(lat, lon, [1000.0, 850.0, 700.0, 500.0, 300.0, 200.0, 100.0],
                           synthetic.monthly_times(2001, 2, "standard"))
    path = tmp_path / "z.nc"
    enc = {v: ({"zlib": True, "shuffle": True, "complevel": 1} if compress else {})
           | {"chunksizes": (3, 1, lat.size, lon.size)} for v in ("ua", "va")}
    ds.to_netcdf(path, encoding=enc)
    cfg = C.load(None)
    cfg["run"]["scheduler"] = "sync"
    cfg["run"]["time_chunk"] = 7                      # tasks of 7 months, the last of 3
    monkeypatch.setattr(SL, "MIN_BYTES", 10 ** 12)
    plain = csv_rows(engine.track([str(path)], cfg, label="x"))
    monkeypatch.setattr(SL, "MIN_BYTES", 0)
    taken = []
    real = SL._take
    monkeypatch.setattr(SL, "_take", lambda n: taken.append(n) or real(n))
    reused = []
    real_give = SL._give
    monkeypatch.setattr(SL, "_give", lambda r, b: reused.append(len(b)) or real_give(r, b))
    assert csv_rows(engine.track([str(path)], cfg, label="x")) == plain
    assert taken and reused                            # read into maps, given back after each task
    CH.close_all()


def test_stacked_files_in_reused_maps_give_the_same_rows(tmp_path, monkeypatch):
    """One-day files stacked into a task, every read and the stack itself in reused memory maps
    (inputs/slabs.py, its threshold lowered to 0): the rows of numpy's own arrays."""
    from circtrack.engine import reduce as RD
    from tests.test_speed_paths import SECTORS, one_day_files, rows, sync_cfg

    paths = one_day_files(tmp_path, 6)
    cfg = sync_cfg()
    cfg["run"]["time_chunk"] = 6
    monkeypatch.setattr(SL, "MIN_BYTES", 10 ** 12)
    plain = rows(paths, cfg, SECTORS)
    monkeypatch.setattr(SL, "MIN_BYTES", 0)
    stacked = []
    real = RD._stack
    monkeypatch.setattr(RD, "_stack", lambda parts: stacked.append(len(parts)) or real(parts))
    assert rows(paths, cfg, SECTORS) == plain
    assert stacked and max(stacked) > 1
    SL.release()
