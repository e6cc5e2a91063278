"""Reading netCDF4/HDF5 variables chunk by chunk, decoded (or copied) here rather than by HDF5.

Inflating zlib-compressed chunks is most of the time of a run on compressed files. HDF5 inflates
with the system's zlib; the ISA-L library (through the ``isal`` package) inflates the same streams
in about 60 % of the time, and the byte shuffle is undone here with numpy. So for a variable whose
chunks went through deflate (and optionally shuffle) only, :func:`read` fetches the stored chunks
with h5py's direct chunk read (the bytes as stored, no decoding), decodes them and copies the
selected part into the output: the same array, value for value, as ``netCDF4.Variable[index]``.

Values stored without any filter (uncompressed chunks, or contiguous storage in a file on disk)
are read by their byte offsets in the file (h5py's chunk index) with ``os.preadv`` straight into
the output array where the selected part of a chunk is a run of whole rows in both (the usual
case: full latitude-longitude fields), so the bytes are copied once, from the page cache to the
output; other selections go through one chunk-sized buffer. HDF5 copies them twice and costs
more per call.

Anything else -- other filters (checksums, szip, blosc...), big-endian storage, a chunk that was
never written, an index this module does not know -- gives None and the caller reads the usual
way. Per process, a few h5py files stay open (like the netCDF4 handles in engine/reduce.py), each
with a plain file descriptor for the unfiltered reads.
"""

from __future__ import annotations

import collections
import itertools
import os
import sys
import threading
import zlib

import numpy as np

from circtrack.inputs import slabs

try:                                  # a core dependency; plain zlib when it is missing
    from isal import isal_zlib as _inflate_lib
except ImportError:                   # pragma: no cover - isal is installed with circtrack
    _inflate_lib = None

FILTER_DEFLATE, FILTER_SHUFFLE = 1, 2
_OPEN = collections.OrderedDict()     # (path, thread id) -> _Open: h5py.File, layouts, a descriptor
_LOCK = threading.Lock()
KEEP_OPEN = 4
IOV_MAX = 512                         # buffers per preadv call (the system's limit is at least 1024)
MIN_RUN_BYTES = 4096                  # shorter runs: the whole chunk into a buffer (fewer system calls)


def available():
    """True when the fast inflater is installed (without it HDF5's own path is as fast)."""
    return _inflate_lib is not None


class _Layout:
    """What decoding one variable's chunks takes: chunk shape, dtype and the filters in write order.
    Contiguous storage is one chunk the shape of the variable (``contiguous``: its byte offset)."""

    def __init__(self, dset):
        self.shape = dset.shape
        self.chunks = dset.chunks or dset.shape
        self.dtype = dset.dtype
        self.filters = _filters(dset)
        self.contiguous = None if dset.chunks is not None else dset.id.get_offset()


def _filters(dset):
    """Filter codes of the dataset's pipeline in the order they were applied when writing."""
    dcpl = dset.id.get_create_plist()
    return [dcpl.get_filter(i)[0] for i in range(dcpl.get_nfilters())]


def _eligible(dset, stored=True):
    """Deflate(+shuffle) chunks of little-endian floats, or (``stored``: a file on disk, read by
    byte offsets) unfiltered chunks or contiguous storage with its offset known."""
    if dset.dtype.kind != "f" or 0 in dset.shape:
        return False
    little = dset.dtype.byteorder == "<" or (dset.dtype.byteorder == "=" and sys.byteorder == "little")
    if not little:
        return False
    filters = _filters(dset)
    if not filters:
        if not stored:
            return False
        if dset.chunks is None:
            return dset.id.get_offset() is not None        # compact storage or nothing written: HDF5
        return hasattr(dset.id, "get_chunk_info_by_coord")
    return dset.chunks is not None and FILTER_DEFLATE in filters \
        and set(filters) <= {FILTER_DEFLATE, FILTER_SHUFFLE}


class _Open:
    """An h5py file open in this thread, its variables' layouts, and a plain descriptor of the file
    (opened on the first unfiltered read) that ``os.preadv`` reads through."""

    def __init__(self, path, h5):
        self.path, self.h5, self.layouts, self._fd = path, h5, {}, None

    def fd(self):
        if self._fd is None:
            self._fd = os.open(self.path, os.O_RDONLY)
        return self._fd

    def close(self):
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
        self.h5.close()


def _file(path):
    """This thread's open h5py file of ``path`` and its variables' layouts (a few files stay open)."""
    import h5py

    key = (path, threading.get_ident())
    with _LOCK:
        entry = _OPEN.pop(key, None)
        if entry is None:
            entry = _Open(path, h5py.File(path, "r"))
            while len(_OPEN) >= KEEP_OPEN:
                _OPEN.popitem(last=False)[1].close()
        _OPEN[key] = entry
    return entry


def close_all():
    """Close the h5py files this process opened (when a run ends, before forking workers, or when a
    file is dropped after an error); layouts are forgotten with them."""
    with _LOCK:
        while _OPEN:
            _OPEN.popitem()[1].close()


def layout(path, name):
    """The variable's :class:`_Layout`, or None when its values are neither deflate(+shuffle)
    floats nor unfiltered floats (see the module docstring)."""
    try:
        layouts = _file(path).layouts
    except (OSError, ValueError):          # not an HDF5 file after all
        return None
    if name not in layouts:
        try:
            dset = _file(path).h5[name]
            layouts[name] = _Layout(dset) if _eligible(dset) else None
        except (OSError, KeyError, ValueError, TypeError, AttributeError):
            layouts[name] = None
    return layouts[name]


def read(path, name, index):
    """``variable[index]`` decoded here, or None (see the module docstring).

    ``index``: one entry per dimension, an int, a slice with step 1, or a list of ints (an axis in
    that order), as netCDF4 takes it.
    """
    lay = layout(path, name)
    if lay is None:
        return None
    entry = _file(path)
    if not lay.filters:
        return _read_stored(entry.h5[name], lay, index, entry.fd())
    if _inflate_lib is None:
        return None
    return _read(entry.h5[name], lay, index)


def _read(dset, lay, index):
    """``dset[index]`` of deflate(+shuffle) chunks: the stored bytes from h5py's direct chunk read,
    decoded by :func:`read_stored`; None where HDF5 must do it (e.g. a chunk never written)."""
    try:
        return read_stored(lay, index, dset.id.read_direct_chunk)
    except (OSError, KeyError, RuntimeError):
        return None


def _chunks_met(axes, lay):
    """Per chunk the index touches: its offset (element coordinates), the positions in the output
    and the positions inside the chunk (slices where contiguous)."""
    # chunks met along each axis: (chunk number, positions in the output, positions in the chunk)
    per_axis = [_pieces(src, c) for (src, _), c in zip(axes, lay.chunks)]
    for combo in itertools.product(*per_axis):
        yield (tuple(k * c for (k, _, _), c in zip(combo, lay.chunks)),
               tuple(o for _, o, _ in combo), tuple(i for _, _, i in combo))


def _squeezed(out, axes):
    return out[tuple(slice(None) if keep else 0 for _, keep in axes)]


def _read_stored(dset, lay, index, fd):
    """``dset[index]`` of unfiltered values, read by byte offsets with ``os.preadv`` (module doc)."""
    axes = _axes(index, lay.shape)
    if not axes:
        return None
    out = slabs.empty([len(src) for src, _ in axes], lay.dtype)     # large: a reused map
    nbytes = int(np.prod(lay.chunks)) * lay.dtype.itemsize
    buf = None
    try:
        for offset, o_idx, c_idx in _chunks_met(axes, lay):
            if lay.contiguous is not None:
                start = int(lay.contiguous)
            else:
                info = dset.id.get_chunk_info_by_coord(offset)
                if info.byte_offset is None or info.size != nbytes:
                    return None      # never written (fill values), or not stored as plain values
                start = int(info.byte_offset)
            runs = _runs(out, o_idx, c_idx, lay)
            if runs is None:         # a scattered selection: the whole chunk, then the part wanted
                if buf is None:
                    buf = np.empty(lay.chunks, dtype=lay.dtype)
                _preadv(fd, [buf.reshape(-1).view(np.uint8)], start)
                out[o_idx] = buf[c_idx]
            else:
                for pos, views in runs:
                    _preadv(fd, views, start + pos)
    except (OSError, ValueError, RuntimeError, KeyError):
        return None
    return _squeezed(out, axes)


def _runs(out, o_idx, c_idx, lay):
    """The part ``c_idx`` of a chunk that goes to ``out[o_idx]`` as reads straight into ``out``:
    ``[(byte position in the chunk, [writable byte views of out])]``, each entry one stretch of the
    file; None when the part is not made of whole rows in both (then a buffer is used).

    The trailing axes that the part covers whole in the chunk and in ``out`` make each run
    contiguous in both; one more axis may be a range in both; the axes before it are stepped
    through one position at a time."""
    if not all(isinstance(i, slice) for i in c_idx + o_idx):
        return None
    shape, n = lay.chunks, len(lay.chunks)
    m = n                                  # axes m.. are whole in the chunk and in out
    while m > 0 and c_idx[m - 1] == slice(0, shape[m - 1]) and out.shape[m - 1] == shape[m - 1] \
            and o_idx[m - 1] == slice(0, shape[m - 1]):
        m -= 1
    run_axis = max(m - 1, 0)               # this axis is a range (the run's length along it)
    c_strides = np.cumprod((shape[1:] + (1,))[::-1])[::-1] * lay.dtype.itemsize
    row = int(np.prod(shape[run_axis + 1:], dtype=np.int64)) * lay.dtype.itemsize
    lead = [range(c_idx[d].start, c_idx[d].stop) for d in range(run_axis)]
    o_lead = [o_idx[d].start for d in range(run_axis)]
    length = (c_idx[run_axis].stop - c_idx[run_axis].start) * row
    if length < MIN_RUN_BYTES:
        return None
    groups, cur_end = [], None
    for ks in itertools.product(*lead):
        pos = sum(int(k) * int(st) for k, st in zip(ks, c_strides)) + c_idx[run_axis].start * int(c_strides[run_axis])
        o_pos = tuple(o + (k - c.start) for o, k, c in zip(o_lead, ks, c_idx))
        view = out[o_pos + (o_idx[run_axis],)]
        if not view.flags.c_contiguous or view.nbytes != length:
            return None
        view = view.reshape(-1).view(np.uint8)        # contiguous: a view, never a copy
        if cur_end == pos and len(groups[-1][1]) < IOV_MAX:
            groups[-1][1].append(view)
        else:
            groups.append((pos, [view]))
        cur_end = pos + view.nbytes
    return groups


def _preadv(fd, views, pos):
    """Fill ``views`` from the file at byte ``pos`` on; a short read (a truncated file) is an error."""
    want = sum(v.nbytes for v in views)
    got = os.preadv(fd, views, pos)
    while got < want:                      # the kernel may return less than asked without an error
        done, rest, skip = 0, [], got
        for v in views:
            if skip >= v.nbytes:
                skip -= v.nbytes
                continue
            rest.append(v[skip:])
            skip = 0
        n = os.preadv(fd, rest, pos + got)
        if n <= 0:
            raise OSError("the file ends before the chunk")
        got += n


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
# again through its file driver (values identical to HDF5's read of the same chunks).
def dataset_layout(dset, layouts):
    """The :class:`_Layout` of an h5py dataset the caller holds open (cached in ``layouts``, a dict
    kept per open file), or None when its chunks are not deflate(+shuffle) floats or the fast
    inflater is missing."""
    if _inflate_lib is None:
        return None
    if dset.name not in layouts:
        try:
            layouts[dset.name] = _Layout(dset) if _eligible(dset, stored=False) else None
        except (OSError, KeyError, ValueError, TypeError):
            layouts[dset.name] = None
    return layouts[dset.name]


def read_stored(lay, index, stored, order=None):
    """``variable[index]`` from chunks as stored: ``stored(offset)`` gives ``(filter_mask, buffer)``
    of the chunk at ``offset`` (the chunk's first element, a tuple), or None when the chunk has no
    stored bytes (never written). None when a chunk is missing or cannot be decoded, or the index is
    one :func:`read` does not take: the caller then reads the usual way. ``order(offset)``: a key
    the chunks are decoded in the order of (e.g. that in which their bytes arrive); by default
    in index order. Each chunk lands in its own part of the output: the order changes no value."""
    if _inflate_lib is None:
        return None
    axes = _axes(index, lay.shape)
    if axes is None:
        return None
    out = slabs.empty([len(src) for src, _ in axes], lay.dtype)     # large: a reused map
    met = _chunks_met(axes, lay)
    if order is not None:
        met = sorted(met, key=lambda m: order(m[0]))
    try:
        for offset, o_idx, c_idx in met:
            got = stored(offset)
            if got is None:
                return None
            out[o_idx] = decode_stored(got[0], got[1], lay)[c_idx]
    except (ValueError, zlib.error, getattr(_inflate_lib, "error", zlib.error)):
        return None
    return _squeezed(out, axes)


def decode_stored(mask, data, lay):
    """A chunk from its stored bytes (any buffer; ``mask``: HDF5's filter mask of the chunk) -> an
    array of the chunk's shape. The array never refers to ``data`` (the
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
