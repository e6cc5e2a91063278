"""Data streams of one product in one file (e.g. ERA-style ``expver``: final and provisional).

In: the opened dataset and its :class:`~circtrack.inputs.detect.Detected` record (coordinates
found). Out: ``det.streams`` describing the streams (as a dimension, a coordinate along time, or a
scalar), the picklable stream part of a :class:`~circtrack.inputs.readers.RoleReader`, and per
time step which data are provisional. Readers combine the streams per time chunk with
:func:`combine_streams`; notes of several readers are joined by :func:`merge_notes`.
"""

from __future__ import annotations

import numpy as np

from circtrack.inputs.rules import STREAM_NAMES

PROVISIONAL = "provisional_data"


def is_final_stream(label):
    """ERA-style experiment versions: 1 ("0001") is the final product, anything else provisional."""
    if isinstance(label, bytes):
        label = label.decode(errors="replace")
    try:
        return int(str(label).strip()) == 1
    except ValueError:
        return False


def _label(x):
    return x.decode(errors="replace").strip() if isinstance(x, bytes) else str(x).strip()


def detect_streams(ds, det):
    """An ``expver`` dimension (two streams, NaN where a stream has no data) or coordinate along time."""
    names = [n for n in list(ds.dims) + list(ds.coords) if str(n).lower() in STREAM_NAMES]
    if not names:
        return
    name = names[0]
    tdim = det.coords.get("time")
    if name in ds.dims and ds.sizes[name] > 1:
        labels = [_label(x) for x in (ds[name].values if name in ds.variables else range(ds.sizes[name]))]
        final = [is_final_stream(x) for x in labels]
        order = sorted(range(len(labels)), key=lambda k: (not final[k], labels[k]))
        det.streams = {"name": name, "kind": "dim", "labels": labels, "final": final, "order": order}
        det.layout["streams"] = (f"'{name}' dimension with streams {', '.join(labels)}: per time step the final "
                                 f"stream ({', '.join(l for l, f in zip(labels, final) if f) or 'none'}) is used "
                                 f"where it has data, else the next; time steps taken from another stream are flagged '{PROVISIONAL}'")
    elif name in ds.variables and tdim is not None and ds[name].dims == (tdim,):
        along = [_label(x) for x in np.asarray(ds[name].values).ravel()]
        det.streams = {"name": name, "kind": "coord", "labels_along_time": along}
        labels = sorted(set(along))
        det.layout["streams"] = (f"'{name}' along time with values {', '.join(labels)}: time steps of "
                                 f"provisional streams are flagged '{PROVISIONAL}'")
    elif name in ds.variables and ds[name].size == 1:
        label = _label(np.asarray(ds[name].values).ravel()[0])
        if not is_final_stream(label):
            det.streams = {"name": name, "kind": "scalar"}
            det.layout["streams"] = f"'{name}' = {label}: a provisional stream; every time step is flagged '{PROVISIONAL}'"


def stream_dim(streams, da):
    """The streams' dimension when the variable ``da`` has it, else None."""
    return streams["name"] if streams and streams["kind"] == "dim" and streams["name"] in da.dims else None


def stream_spec(streams, stream_dim):
    """The picklable stream part of a reader: how to combine (dimension) or flag (coordinate, scalar) streams."""
    if not streams:
        return None
    if streams["kind"] == "dim":
        if stream_dim is None:
            return None
        return {"kind": "dim", "order": list(streams["order"]), "final": list(streams["final"])}
    return {"kind": streams["kind"], "name": streams["name"]}


def combine_streams(arr, order, final):
    """``(t, E, ...)`` -> ``(t, ...)``: per time step the first stream in ``order`` holding any data."""
    nt, ne = arr.shape[:2]
    if np.issubdtype(arr.dtype, np.floating):
        has = np.isfinite(arr.reshape(nt, ne, -1)).any(axis=2)
    else:
        has = np.ones((nt, ne), dtype=bool)
    pick = np.full(nt, order[0], dtype=int)
    for e in reversed(order):
        pick = np.where(has[:, e], e, pick)
    out = arr[np.arange(nt), pick]
    return out, ~np.asarray(final, dtype=bool)[pick]


def provisional_steps(det):
    """Bool per time step: known from the coordinates to come from a provisional stream (an expver
    coordinate along time, or a scalar one); streams along a dimension are resolved per chunk."""
    n = 0 if det.times is None else det.times.size
    st = det.streams
    if not st or st["kind"] == "dim":
        return np.zeros(n, dtype=bool)
    if st["kind"] == "scalar":
        return np.ones(n, dtype=bool)
    return np.array([not is_final_stream(x) for x in st["labels_along_time"]], dtype=bool)


def merge_notes(parts):
    """Per-time-step notes of several readers joined: unique codes in order, ';'-separated."""
    parts = [np.asarray(p, dtype=object) for p in parts if p is not None]
    if not parts:
        return None
    out = np.full(parts[0].shape, "", dtype=object)
    for i in range(out.size):
        codes = []
        for p in parts:
            for code in str(p[i]).split(";"):
                if code and code not in codes:
                    codes.append(code)
        out[i] = ";".join(codes)
    return out
