"""The plan of a run is plain data: built without reading any value, and printable."""

from __future__ import annotations

import numpy as np

from circtrack import config as C
from circtrack import engine
from circtrack.inputs import dataset as D
from tests.conftest import make_dataset, write


def test_plan_record_of_overlapping_files(tmp_path, monkeypatch):
    ds = make_dataset(6)
    a = write(ds.isel(time=slice(0, 4)), tmp_path / "a.nc")
    b = write(ds.isel(time=slice(3, 6)), tmp_path / "b.nc")           # time step 4 is in both files

    def no_read(*args, **kw):
        raise AssertionError("planning read data")

    monkeypatch.setattr(D.RoleReader, "read_fast", no_read)
    monkeypatch.setattr(D.RoleReader, "read_noted", no_read)
    cfg = C.load(None)
    cfg["run"].update(time_chunk=3, batch_time_steps=4)
    run = engine.Run([a, b], cfg, metric_ids=["hadley_edge_lat"])
    rp = run.record
    assert isinstance(rp, engine.RunPlan) and run.times is rp.times
    assert rp.times.size == 6 and rp.dropped == [4] and rp.partner == [3]     # the repeat read from b is dropped
    assert [engine.iso_time(t) for t in rp.times] == [engine.iso_time(t) for t in ds["time"].values]
    assert rp.chunks == [(0, 0, 3), (0, 3, 4), (1, 0, 3)] and rp.batches == [(0, 4), (4, 6)]
    assert list(rp.chunk_of) == [0, 0, 0, 1, 2, 2, 2] and np.array_equal(rp.starts, [0, 4, 7])
    text = rp.describe()
    assert "time steps: 6" in text and "1 dropped (policy refuse)" in text and "tasks: 3, batches: 2" in text
    assert "va (" in text and "hadley_edge_lat" in text
