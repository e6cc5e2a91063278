"""The engine's execution: every way of cutting and scheduling the work gives the same rows;
planning reads nothing; the low-pass filter does not see chunk or file boundaries."""

from __future__ import annotations

import datetime

import cftime
import dask
import numpy as np
import pytest
import scipy.signal

from circtrack import config as C
from circtrack import engine, synthetic
from circtrack.errors import UsageError
from circtrack.inputs import dataset as D
from circtrack.lowpass import filter_valid, lanczos_weights, response
from tests.conftest import csv_rows, make_dataset, write


@pytest.fixture(scope="module")
def four_files(tmp_path_factory):
    d = tmp_path_factory.mktemp("runs")
    n = 12
    hadley = 1.0e11 * (1.0 + 0.3 * np.sin(np.arange(n) / 3.0))
    edj = np.stack([45.0 + 3.0 * np.sin(np.arange(n) / 2.0), -50.0 + 2.0 * np.cos(np.arange(n) / 2.0)], axis=1)
    ds = make_dataset(n, hadley_peak=hadley, edj=edj)
    return [write(ds.isel(time=slice(k, k + 3)), d / f"part_{k // 3}.nc") for k in range(0, n, 3)]


def _rows(files, **run):
    cfg = C.load(None)
    cfg["run"].update(run)
    return csv_rows(engine.track(files, cfg, label="L"))


def test_chunking_and_schedulers_give_identical_rows(four_files):
    ref = _rows(four_files, time_chunk=1000, scheduler="sync")
    assert len(ref) > 250
    for chunk in (1, 2, 5):
        for sched in ("sync", "threads", "processes"):
            assert _rows(four_files, time_chunk=chunk, scheduler=sched, batch_time_steps=7) == ref, (chunk, sched)


def test_distributed_cluster_gives_identical_rows(four_files):
    pytest.importorskip("distributed")
    from circtrack.cluster import scheduler_context

    ref = _rows(four_files, time_chunk=1000, scheduler="sync")
    cfg = C.load(None)
    cfg["run"]["time_chunk"] = 3
    with scheduler_context(2, None, cfg) as client:
        assert client is not None
        rows = csv_rows(engine.track(four_files, cfg, label="L"))
    assert rows == ref


def test_planning_reads_nothing(four_files, monkeypatch):
    calls = []

    def counting(real):
        def wrapped(self, ds, t0, t1):
            calls.append((self.path, self.role, t0, t1))
            return real(self, ds, t0, t1)
        return wrapped

    def counting_direct(real):
        def wrapped(self, t0, t1):
            arr = real(self, t0, t1)
            if arr is not None:
                calls.append((self.path, self.role, t0, t1))
            return arr
        return wrapped

    # what the tasks call: the chunks read here (no netCDF4 open), else the plain netCDF4 path, else
    # xarray's (values and per-time-step notes)
    monkeypatch.setattr(D.RoleReader, "read_direct", counting_direct(D.RoleReader.read_direct))
    monkeypatch.setattr(D.RoleReader, "read_fast", counting(D.RoleReader.read_fast))
    monkeypatch.setattr(D.RoleReader, "read_noted", counting(D.RoleReader.read_noted))
    cfg = C.load(None)
    cfg["run"]["time_chunk"] = 2
    run = engine.Run(four_files, cfg, metric_ids=["hadley_edge_lat", "eddy_jet_lat"])
    tasks = run.tasks()
    assert len(tasks) == 8 and calls == []          # 4 files x 3 steps in chunks of 2: 8 tasks, no read yet
    (out,) = dask.compute(tasks[1], scheduler="sync")
    assert sorted(c[1] for c in calls) == ["ua", "va"] and {c[2:] for c in calls} == {(2, 3)}
    assert out["stats"]["ua"].shape[0] == 1
    assert calls[0][0] == four_files[0]


# ---------------------------------------------------------------- the low-pass filter
def test_lanczos_weights_equal_the_reference_library():
    # scipy.signal.firwin with the Lanczos (sinc) window designs the same windowed-sinc low-pass
    # filter as Duchon (1979) eq. (12), normalised to unit gain at zero frequency
    for cutoff, n in ((10, 30), (10, 60), (40, 120), (7.5, 25)):
        ref = scipy.signal.firwin(2 * n + 1, 1.0 / cutoff, window="lanczos", fs=1.0)
        assert np.allclose(lanczos_weights(cutoff, n), ref, atol=1e-15)


def test_lanczos_response():
    w = lanczos_weights(10, 30)
    assert w.sum() == pytest.approx(1.0)
    # Duchon (1979): the Lanczos response passes through one half at the cutoff frequency (from memory)
    assert response(w, 0.1)[0] == pytest.approx(0.5, abs=0.02)
    assert response(w, 1 / 40)[0] == pytest.approx(1.0, abs=0.01)       # slow variations pass
    assert abs(response(w, 1 / 3)[0]) < 0.01                          # 3-day wiggles are removed


def test_filter_validity_at_edges_and_gaps():
    days = list(range(20)) + list(range(25, 40))               # a 5-day gap after day 19
    t = np.array([cftime.datetime(2001, 1, 1, calendar="noleap") + datetime.timedelta(days=d)
                  for d in days])
    ok = filter_valid(t, 3, 1.0)
    assert not ok[:3].any() and not ok[-3:].any()                # the ends
    assert ok[3:17].all()                                        # windows inside the first stretch
    assert not ok[17:23].any()                                   # windows across the gap
    assert ok[23:32].all()


@pytest.fixture(scope="module")
def daily_files(tmp_path_factory):
    d = tmp_path_factory.mktemp("daily")
    n = 150
    k = np.arange(n)
    slow_nh = 45.0 + 3.0 * np.sin(2 * np.pi * k / 60.0)
    wiggle = 4.0 * np.sin(2 * np.pi * k / 3.0)
    edj = np.stack([slow_nh + wiggle, -50.0 - wiggle], axis=1)
    times = np.array([cftime.datetime(2001, 1, 1, calendar="noleap") + datetime.timedelta(days=int(i))
                      for i in k])
    ds = synthetic.dataset(np.arange(-90.0, 91.0, 1.0), np.arange(0.0, 360.0, 45.0), [850.0, 500.0, 200.0], times,
                           edj=edj, wave_amplitude=0.0)
    enc = synthetic.time_encoding("noleap")
    paths = []
    for j, (a, b) in enumerate(((0, 40), (40, 95), (95, 150))):
        p = str(d / f"day_{j}.nc")
        ds.isel(time=slice(a, b)).to_netcdf(p, encoding=enc)
        paths.append(p)
    return paths, slow_nh


def _jet(paths, **run):
    cfg = C.load(None)
    cfg["jets"]["eddy_lowpass_days"] = 10.0
    cfg["run"].update(run)
    out = engine.track(paths, cfg, metric_ids=["eddy_jet_lat"], label="L")
    c = out.columns
    sel = (c["hemisphere"] == "NH") & (c["sector"] == "zonal")
    order = np.argsort(c["time"][sel], kind="stable")
    return c["value"][sel][order], c["flag"][sel][order], out


def test_lowpass_jet_ignores_chunk_and_file_boundaries(daily_files):
    paths, slow = daily_files
    v_ref, f_ref, out = _jet(paths, time_chunk=1000, scheduler="sync", batch_time_steps=1000)
    assert out.provenance["lowpass"]["cutoff_days"] == 10.0 and out.provenance["lowpass"]["weights"] == 61
    for chunk, batch in ((1, 31), (7, 40), (16, 64)):
        v, f, _ = _jet(paths, time_chunk=chunk, batch_time_steps=batch)
        assert np.array_equal(f, f_ref)
        assert np.allclose(v, v_ref, equal_nan=True, rtol=0, atol=1e-9), (chunk, batch)
    # the record's first and last 30 days have no full window
    assert np.all(f_ref[:30] == "lowpass_window_incomplete") and np.all(f_ref[-30:] == "lowpass_window_incomplete")
    assert np.isnan(v_ref[:30]).all() and np.isnan(v_ref[-30:]).all()


def test_lowpass_removes_the_synoptic_wiggle(daily_files):
    paths, slow = daily_files
    v, f, _ = _jet(paths, scheduler="sync")
    cfg = C.load(None)
    raw = engine.track(paths, cfg, metric_ids=["eddy_jet_lat"], label="L").columns
    sel = (raw["hemisphere"] == "NH")
    r = raw["value"][sel][np.argsort(raw["time"][sel], kind="stable")]
    inner = slice(30, 120)
    assert np.all(f[inner] == "ok")
    day_to_day_raw = np.std(np.diff(r[inner]))
    day_to_day_low = np.std(np.diff(v[inner]))
    assert day_to_day_raw > 3.0 and day_to_day_low < day_to_day_raw / 20
    assert np.max(np.abs(v[inner] - slow[inner])) < 0.6        # follows the slow 60-day swing


def test_lowpass_refused_for_monthly_steps(tmp_path):
    p = write(make_dataset(4), tmp_path / "m.nc")
    cfg = C.load(None)
    cfg["jets"]["eddy_lowpass_days"] = 10.0
    with pytest.raises(UsageError, match="low-pass needs time steps shorter than 5 days"):
        engine.track([p], cfg, metric_ids=["eddy_jet_lat"])


def test_progress_lines_in_logs_and_bar_on_terminals(monkeypatch):
    import io

    clock = iter(range(0, 1000, 5))
    monkeypatch.setattr(engine.progress._time, "time", lambda: float(next(clock)))
    log = io.StringIO()
    p = engine.Progress(stream=log)
    for done in range(10, 101, 10):
        p.step(done, 100)
    lines = log.getvalue().splitlines()
    # a line when a quarter is passed, with the share actually done (issue 16: the quarter's label
    # used to be printed, e.g. "25 %" at 30/100 and "75 %" at 240/240; the last quarter had no line)
    assert [ln.split(" (")[1].split(")")[0] for ln in lines] == ["30 %", "50 %", "80 %", "100 %"]

    class Tty(io.StringIO):
        def isatty(self):
            return True

    tty = Tty()
    q = engine.Progress(stream=tty)
    q.step(50, 100)
    q.step(100, 100)
    assert "\r[###############...............] 50/100 time steps" in tty.getvalue()
    assert tty.getvalue().endswith("100/100 time steps\n")
    quiet = io.StringIO()
    r = engine.Progress(quiet=True, stream=quiet)
    r.step(100, 100)
    r.line("x")
    assert quiet.getvalue() == ""


def _pid_after_a_nap(job):
    import os
    import time

    time.sleep(0.3)
    return [os.getpid()]


def test_process_pool_runs_tasks_in_parallel_workers():
    cfg = C.load(None)
    cfg["run"]["processes"] = 2
    runner = engine.Runner(cfg, 4)
    try:
        pids = runner.run(_pid_after_a_nap, [1, 2, 3, 4])
    finally:
        runner.close()
    assert runner.mode == "processes" and len({p[0] for p in pids}) == 2   # not one batch in one worker


def layout_dataset(layout, storage):
    """Three time steps of the test dataset laid out as ``layout``, and its netCDF encoding
    (``storage``: the compression settings of ua and va)."""
    ds = make_dataset(3)
    enc = {v: dict(storage) for v in ("ua", "va")}
    if layout == "lat_descending":
        ds = ds.isel(lat=slice(None, None, -1))
    elif layout == "levels_in_pa_descending":
        ds = ds.assign_coords(plev=ds["plev"] * 100.0)
        ds["plev"].attrs.update(units="Pa")
    elif layout == "fill_below_ground":
        for v in ("ua", "va"):
            ds[v][:, 0, :, ::3] = np.nan
            enc[v].update(_FillValue=np.float32(1.0e20), dtype="float32")
    elif layout == "lon_first":
        ds = ds.transpose("time", "lon", "plev", "lat")
    elif layout == "packed":
        for v in ("ua", "va"):
            enc[v].update(dtype="int16", scale_factor=0.01, add_offset=0.0, _FillValue=np.int16(-32767))
    return ds, enc


@pytest.mark.parametrize("layout", ["plain", "lat_descending", "levels_in_pa_descending", "fill_below_ground",
                                    "lon_first", "packed"])
def test_fast_read_equals_xarray_decoding(tmp_path, layout):
    """The plain-netCDF4 read path gives exactly what xarray's CF decoding gives, or steps aside."""
    import netCDF4

    ds, enc = layout_dataset(layout, {})
    path = str(tmp_path / f"{layout}.nc")
    ds.to_netcdf(path, encoding={**synthetic.time_encoding("noleap"), **enc})
    cfg = C.load(None)
    run = engine.Run([path], cfg, metric_ids=["hadley_edge_lat", "subtropical_jet_lat", "eddy_jet_lat"])
    xds = D.open_dataset(path, cfg)
    nc = netCDF4.Dataset(path)
    try:
        for role, reader in run.infos[0].readers.items():
            slow, _ = reader.read_noted(xds, 1, 3)
            fast = reader.read_fast(nc, 1, 3)
            if layout == "packed":
                assert fast is None                      # scale/offset: xarray's decoding is used
                continue
            assert fast is not None and fast.shape == slow.shape and fast.dtype == slow.dtype, role
            assert np.array_equal(fast, slow, equal_nan=True), role
            if layout == "fill_below_ground" and role == "va":    # va is read on every level
                assert np.isnan(fast).any()
    finally:
        nc.close()
        xds.close()


@pytest.mark.parametrize("layout", ["plain", "lat_descending", "levels_in_pa_descending", "fill_below_ground",
                                    "lon_first", "packed", "uncompressed"])
def test_direct_read_without_netcdf4_equals_xarray_decoding(tmp_path, layout, monkeypatch):
    """Readers that carry their variable's header read the chunks without a netCDF4 open and give
    exactly what xarray's CF decoding gives, or step aside (packed values; chunks HDF5 must decode).
    "uncompressed" is contiguous storage (xarray's default), read by byte offset."""
    from circtrack.engine import reduce as R
    from circtrack.inputs import chunks as CH

    ds, enc = layout_dataset(layout, {"zlib": True, "complevel": 1, "shuffle": True})
    if layout == "fill_below_ground":                  # values equal to the fill value become NaN too
        ds["ua"][:, 1, :, ::5] = 1.0e20
        ds["va"][:, 1, :, ::5] = 1.0e20
    elif layout == "uncompressed":
        enc = {}
    path = str(tmp_path / f"{layout}.nc")
    ds.to_netcdf(path, encoding={**synthetic.time_encoding("noleap"), **enc})
    cfg = C.load(None)
    run = engine.Run([path], cfg, metric_ids=["hadley_edge_lat", "subtropical_jet_lat", "eddy_jet_lat"])
    xds = D.open_dataset(path, cfg)
    try:
        for role, reader in run.infos[0].readers.items():
            slow, _ = reader.read_noted(xds, 1, 3)
            direct = reader.read_direct(1, 3)
            if layout == "packed":
                assert reader.direct is None and direct is None
                continue
            assert reader.direct is not None and reader.direct["dims"][0] == "time"
            if not CH.available() and layout != "uncompressed":
                assert direct is None                    # HDF5 inflates these chunks itself
                continue
            assert direct is not None and direct.shape == slow.shape and direct.dtype == slow.dtype, role
            assert np.array_equal(direct, slow, equal_nan=True), role
    finally:
        xds.close()
        CH.close_all()
    # a whole run: no netCDF4 open in the tasks when every role reads directly; rows as without
    opened = []
    real = D.open_raw
    monkeypatch.setattr(D, "open_raw", lambda p, c: opened.append(p) or real(p, c))
    sync = C.load(None)
    sync["run"]["scheduler"] = "sync"
    rows = csv_rows(engine.track([path], sync, label="x"))
    assert (opened == []) == (layout != "packed" and (CH.available() or layout == "uncompressed"))
    monkeypatch.setattr(type(run.infos[0].readers["ua"]), "read_direct", lambda self, t0, t1: None)
    R.close_cached()
    assert csv_rows(engine.track([path], sync, label="x")) == rows


def test_fast_read_of_shuffled_latitudes_and_scattered_levels(tmp_path):
    import netCDF4

    ds = make_dataset(2)
    rng = np.random.default_rng(3)
    ds = ds.isel(lat=rng.permutation(ds.sizes["lat"]), plev=rng.permutation(ds.sizes["plev"]))
    path = str(tmp_path / "shuffled.nc")
    ds.to_netcdf(path, encoding=synthetic.time_encoding("noleap"))
    cfg = C.load(None)
    run = engine.Run([path], cfg, metric_ids=["hadley_edge_lat", "subtropical_jet_lat"])
    xds, nc = D.open_dataset(path, cfg), netCDF4.Dataset(path)
    try:
        for role, reader in run.infos[0].readers.items():
            slow, _ = reader.read_noted(xds, 0, 2)
            fast = reader.read_fast(nc, 0, 2)
            assert np.array_equal(fast, slow, equal_nan=True), role
    finally:
        nc.close()
        xds.close()
    ref = make_dataset(2)
    plain = str(tmp_path / "plain.nc")
    ref.to_netcdf(plain, encoding=synthetic.time_encoding("noleap"))
    a = csv_rows(engine.track([path], cfg, label="L", metric_ids=["hadley_edge_lat", "subtropical_jet_lat"]))
    b = csv_rows(engine.track([plain], cfg, label="L", metric_ids=["hadley_edge_lat", "subtropical_jet_lat"]))
    assert a == b
