"""Cross-check of header detection (circtrack/inputs/header.py) against xarray.

:func:`checking_on_dataset` replaces ``engine.prepare._on_dataset``: every file whose header can
stand for xarray's view is detected both ways, and the outcomes (the Detected record and readers,
or the error raised) must be the same; so are the datasets' names, dimensions, attributes, types and
coordinate values. tests/conftest.py turns it on for the whole suite when CIRCTRACK_CHECK_HEADERS=1
is set; tests/test_header_detection.py uses it on a set of layouts in every run.
"""

from __future__ import annotations

import dataclasses

import numpy as np

CHECKED = []                 # paths cross-checked (tests count them)


def same(a, b, where="value"):
    """Recursive equality for detection outcomes: dataclasses, dicts, sequences, numpy arrays."""
    if dataclasses.is_dataclass(a) and not isinstance(a, type):
        assert type(a) is type(b), where
        for f in dataclasses.fields(a):
            same(getattr(a, f.name), getattr(b, f.name), f"{where}.{f.name}")
        return
    if hasattr(a, "__dict__") and type(a).__module__.startswith("circtrack") and not isinstance(a, Exception):
        assert type(a) is type(b), where
        same(vars(a), vars(b), where)
        return
    if isinstance(a, dict):
        assert isinstance(b, dict) and list(a) == list(b), f"{where}: keys {list(a)} != {list(b)}"
        for k in a:
            same(a[k], b[k], f"{where}[{k!r}]")
        return
    if isinstance(a, (list, tuple)):
        assert type(a) is type(b) and len(a) == len(b), f"{where}: {a!r} != {b!r}"
        for k, (x, y) in enumerate(zip(a, b)):
            same(x, y, f"{where}[{k}]")
        return
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        a, b = np.asarray(a), np.asarray(b)
        assert a.dtype == b.dtype and a.shape == b.shape, f"{where}: {a.dtype}{a.shape} != {b.dtype}{b.shape}"
        if a.dtype.kind == "O":
            assert all(type(x) is type(y) and x == y for x, y in zip(a.ravel(), b.ravel())), where
        else:
            assert np.array_equal(a, b, equal_nan=a.dtype.kind in "fc"), where
        return
    assert type(a) is type(b) and (a == b or (a != a and b != b)), f"{where}: {a!r} != {b!r}"


def same_view(head, ds):
    """The header dataset answers detection's questions as the xarray dataset does."""
    assert list(head.dims) == [str(d) for d in ds.dims]
    assert dict(head.sizes) == dict(ds.sizes)
    assert list(head.data_vars) == list(ds.data_vars) and list(head.coords) == list(ds.coords)
    assert list(head.variables) == list(ds.variables)
    assert {k: str(v) for k, v in head.attrs.items()} == {k: str(v) for k, v in ds.attrs.items()}
    for name, hv in head.variables.items():
        xv = ds[name]
        assert hv.dims == xv.dims and hv.dtype == xv.dtype and hv.shape == xv.shape, name
        assert {k: str(v) for k, v in hv.attrs.items()} == {k: str(v) for k, v in xv.attrs.items()}, name
        assert list(hv.coords) == list(xv.coords), name
        for k in ("units", "calendar"):
            assert str(hv.encoding.get(k)) == str(xv.encoding.get(k)), (name, k)
        if hv._values is not None and xv.ndim <= 1:
            same(np.asarray(hv.values), np.asarray(xv.values), name)


def _outcome(work, ds):
    try:
        return "ok", work(ds)
    except Exception as e:           # noqa: BLE001 - the error itself is compared
        return "error", (type(e).__name__, str(e), getattr(e, "info", None))


def checking_on_dataset(real):
    """A replacement for ``prepare._on_dataset`` that detects both ways and compares."""
    from circtrack.engine import prepare as PR
    from circtrack.inputs import dataset as D
    from circtrack.inputs import header as H
    from circtrack.inputs import remote

    def on_dataset(path, cfg, work):
        head = H.open_header(path, cfg)
        if head is None:
            return real(path, cfg, work)
        ds = D.open_dataset(path, remote.for_metadata(cfg))
        try:
            same_view(head, ds)
            got = _outcome(work, head)
            if got[0] == "error" and got[1][0] == "NeedsFullOpen":
                return real(path, cfg, work)
            want = _outcome(work, ds)
        finally:
            ds.close()
        same(got, want, f"detection of {path}")
        CHECKED.append(path)
        if got[0] == "error":
            return real(path, cfg, work)          # raise it as the real run does
        return got[1]

    on_dataset.checking = True
    assert PR._on_dataset is real
    return on_dataset
