"""Reading compressed netCDF4/HDF5 variables chunk by chunk, decoded here rather than by HDF5.

Inflating zlib-compressed chunks is most of the time of a run on compressed files. HDF5 inflates
with the system's zlib; the ISA-L library (through the ``isal`` package) inflates the same streams
in about 60 % of the time, and the byte shuffle is undone here with numpy. So for a variable whose
chunks went through deflate (and optionally shuffle) only, :func:`read` fetches the stored chunks
with h5py's direct chunk read (the bytes as stored, no decoding), decodes them and copies the
selected part into the output: the same array, value for value, as ``netCDF4.Variable[index]``.

Anything else -- other filters (checksums, szip, blosc...), contiguous or big-endian storage, a chunk
that was never written, an index this module does not know -- gives None and the caller reads the
usual way. Per process, a few h5py files stay open (like the netCDF4 handles in engine/reduce.py).
"""

from __future__ import annotations

import collections
import itertools
import sys
import threading
import zlib

import numpy as np

try:                                  # a core dependency; plain zlib when it is missing
    from isal import isal_zlib as _inflate_lib
except ImportError:                   # pragma: no cover - isal is installed with circtrack
    _inflate_lib = None

FILTER_DEFLATE, FILTER_SHUFFLE = 1, 2
_OPEN = collections.OrderedDict()     # (path, thread id) -> (h5py.File, {variable: _Layout or None})
_LOCK = threading.Lock()
KEEP_OPEN = 4


def available():
    """True when the fast inflater is installed (without it HDF5's own path is as fast)."""
    return _inflate_lib is not None


class _Layout:
    """What decoding one variable's chunks takes: chunk shape, dtype and the filters in write order."""

    def __init__(self, dset):
        self.shape = dset.shape
        self.chunks = dset.chunks
        self.dtype = dset.dtype
        self.filters = _filters(dset)


def _filters(dset):
    """Filter codes of the dataset's pipeline in the order they were applied when writing."""
    dcpl = dset.id.get_create_plist()
    return [dcpl.get_filter(i)[0] for i in range(dcpl.get_nfilters())]


def _eligible(dset):
    if dset.chunks is None or dset.dtype.kind != "f":
        return False
    little = dset.dtype.byteorder == "<" or (dset.dtype.byteorder == "=" and sys.byteorder == "little")
    filters = _filters(dset)
    return little and FILTER_DEFLATE in filters and set(filters) <= {FILTER_DEFLATE, FILTER_SHUFFLE}


def _file(path):
    """This thread's open h5py file of ``path`` and its variables' layouts (a few files stay open)."""
    import h5py

    key = (path, threading.get_ident())
    with _LOCK:
        entry = _OPEN.pop(key, None)
        if entry is None:
            entry = (h5py.File(path, "r"), {})
            while len(_OPEN) >= KEEP_OPEN:
                _OPEN.popitem(last=False)[1][0].close()
        _OPEN[key] = entry
    return entry


def close_all():
    """Close the h5py files this process opened (when a run ends, before forking workers, or when a
    file is dropped after an error); layouts are forgotten with them."""
    with _LOCK:
        while _OPEN:
            _OPEN.popitem()[1][0].close()


def layout(path, name):
    """The variable's :class:`_Layout`, or None when its chunks are not deflate(+shuffle) floats."""
    try:
        f, layouts = _file(path)
    except (OSError, ValueError):          # not an HDF5 file after all
        return None
    if name not in layouts:
        try:
            dset = f[name]
            layouts[name] = _Layout(dset) if _eligible(dset) else None
        except (OSError, KeyError, ValueError, TypeError):
            layouts[name] = None
    return layouts[name]


def read(path, name, index):
    """``variable[index]`` decoded here, or None (see the module docstring).

    ``index``: one entry per dimension, an int, a slice with step 1, or a list of ints (an axis in
    that order), as netCDF4 takes it.
    """
    if _inflate_lib is None:
        return None
    lay = layout(path, name)
    if lay is None:
        return None
    return _read(_file(path)[0][name], lay, index)


def read_dataset(dset, index, layouts):
    """The same as :func:`read` for an h5py dataset the caller holds open (an object in object
    storage, read through its byte ranges: inputs/ranges.py); ``layouts``: a dict the caller keeps
    per open file, for the variables' layouts."""
    if _inflate_lib is None:
        return None
    if dset.name not in layouts:
        try:
            layouts[dset.name] = _Layout(dset) if _eligible(dset) else None
        except (OSError, KeyError, ValueError, TypeError):
            layouts[dset.name] = None
    lay = layouts[dset.name]
    return None if lay is None else _read(dset, lay, index)


def _read(dset, lay, index):
    axes = _axes(index, lay.shape)
    if axes is None:
        return None
    out = np.empty([len(src) for src, _ in axes], dtype=lay.dtype)
    # chunks met along each axis: (chunk number, positions in the output, positions in the chunk)
    per_axis = [_pieces(src, c) for (src, _), c in zip(axes, lay.chunks)]
    try:
        for combo in itertools.product(*per_axis):
            offset = tuple(k * c for (k, _, _), c in zip(combo, lay.chunks))
            chunk = _decode(dset, offset, lay)
            out[tuple(o for _, o, _ in combo)] = chunk[tuple(i for _, _, i in combo)]
    except (OSError, KeyError, ValueError, RuntimeError, zlib.error, getattr(_inflate_lib, "error", zlib.error)):
        return None          # e.g. a chunk never written (fill values): HDF5 knows what to do
    return out[tuple(slice(None) if keep else 0 for _, keep in axes)]


def _axes(index, shape):
    """Per dimension: the source indices read, and whether the axis stays in the output."""
    axes = []
    for i, n in zip(index, shape):
        if isinstance(i, (int, np.integer)):
            if not -n <= i < n:
                return None
            axes.append((np.array([i % n]), False))
        elif isinstance(i, slice):
            start, stop, step = i.indices(n)
            if step != 1:
                return None
            axes.append((np.arange(start, stop), True))
        elif isinstance(i, list) and all(isinstance(k, (int, np.integer)) and -n <= k < n for k in i):
            axes.append((np.asarray(i, dtype=int) % n, True))
        else:
            return None
    return axes if len(axes) == len(shape) else None


def _pieces(src, c):
    """The chunks along one axis that ``src`` (source indices, in output order) touches: per chunk
    its number, the output positions and the positions inside the chunk (slices where contiguous)."""
    out = []
    for k in dict.fromkeys((src // c).tolist()):
        pos = np.flatnonzero(src // c == k)
        local = src[pos] - k * c
        out.append((k, _as_slice(pos), _as_slice(local)))
    return out


def _as_slice(ix):
    if ix.size and np.array_equal(ix, np.arange(ix[0], ix[0] + ix.size)):
        return slice(int(ix[0]), int(ix[0]) + ix.size)
    return ix


def _decode(dset, offset, lay):
    """The chunk at ``offset`` as an array of the chunk's shape (edge chunks are stored whole)."""
    mask, data = dset.id.read_direct_chunk(offset)
    for pos in reversed(range(len(lay.filters))):
        if mask & (1 << pos):             # this filter was skipped for this chunk
            continue
        if lay.filters[pos] == FILTER_DEFLATE:
            data = _inflate_lib.decompress(data)
        else:
            data = _unshuffle(data, lay.dtype.itemsize)
    arr = np.frombuffer(data, dtype=lay.dtype)
    if arr.size != int(np.prod(lay.chunks)):
        raise ValueError("chunk size does not match the layout")
    return arr.reshape(lay.chunks)


def _unshuffle(data, size):
    """Undo HDF5's byte shuffle: byte ``j`` of element ``i`` was stored at ``j * n + i``."""
    raw = np.frombuffer(data, dtype=np.uint8)
    n = raw.size // size
    out = np.empty((n, size), dtype=np.uint8)
    for j in range(size):
        out[:, j] = raw[j * n:(j + 1) * n]
    tail = raw[n * size:]                 # bytes left over when the chunk is not whole elements
    return out.tobytes() + tail.tobytes() if tail.size else out.reshape(-1)


# --------------------------------------------------------------------------- chunks the caller fetched
# For objects in object storage (inputs/remote.py): the caller fetches the stored chunks itself, in
# a few large range requests, and hands them over as buffers; decoded here without HDF5 reading them
# again through its file driver (values identical to :func:`read_dataset`).
def dataset_layout(dset, layouts):
    """The :class:`_Layout` of an h5py dataset the caller holds open (cached in ``layouts``, a dict
    kept per open file), or None when its chunks are not deflate(+shuffle) floats or the fast
    inflater is missing."""
    if _inflate_lib is None:
        return None
    if dset.name not in layouts:
        try:
            layouts[dset.name] = _Layout(dset) if _eligible(dset) else None
        except (OSError, KeyError, ValueError, TypeError):
            layouts[dset.name] = None
    return layouts[dset.name]


def read_stored(lay, index, stored):
    """``variable[index]`` from chunks as stored: ``stored(offset)`` gives ``(filter_mask, buffer)``
    of the chunk at ``offset`` (the chunk's first element, a tuple), or None when the chunk has no
    stored bytes (never written). None when a chunk is missing or cannot be decoded, or the index is
    one :func:`read` does not take: the caller then reads the usual way."""
    if _inflate_lib is None:
        return None
    axes = _axes(index, lay.shape)
    if axes is None:
        return None
    out = np.empty([len(src) for src, _ in axes], dtype=lay.dtype)
    per_axis = [_pieces(src, c) for (src, _), c in zip(axes, lay.chunks)]
    try:
        for combo in itertools.product(*per_axis):
            got = stored(tuple(k * c for (k, _, _), c in zip(combo, lay.chunks)))
            if got is None:
                return None
            chunk = decode_stored(got[0], got[1], lay)
            out[tuple(o for _, o, _ in combo)] = chunk[tuple(i for _, _, i in combo)]
    except (ValueError, zlib.error, getattr(_inflate_lib, "error", zlib.error)):
        return None
    return out[tuple(slice(None) if keep else 0 for _, keep in axes)]


def decode_stored(mask, data, lay):
    """A chunk from its stored bytes (any buffer; ``mask``: HDF5's filter mask of the chunk) -> an
    array of the chunk's shape, as :func:`_decode` does. The array never refers to ``data`` (the
    caller may reuse that buffer)."""
    done = False
    for pos in reversed(range(len(lay.filters))):
        if mask & (1 << pos):             # this filter was skipped for this chunk
            continue
        if lay.filters[pos] == FILTER_DEFLATE:
            data = _inflate_lib.decompress(data)
        else:
            data = _unshuffle(data, lay.dtype.itemsize)
        done = True
    if not done:
        data = bytes(data)
    arr = np.frombuffer(data, dtype=lay.dtype)
    if arr.size != int(np.prod(lay.chunks)):
        raise ValueError("chunk size does not match the layout")
    return arr.reshape(lay.chunks)
