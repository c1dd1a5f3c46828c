"""The samples of a plain HDF5 dataset read straight from the file, without the HDF5 library.

A 1-D dataset stored in one contiguous piece without filters, or in chunks that are at most
shuffled and deflated, is a list of byte ranges in the file. :class:`StoredSamples` takes that
list from h5py once, when the capture is opened, and from then on reads the samples by
position (``os.pread``), with ``zlib`` and numpy alone. That makes two things possible that
h5py does not:

- a forked worker process can read its channel of the file: h5py's handles must not be used on
  both sides of a ``fork()``, a file descriptor read by position can;
- the cost of a read is the inflation of the chunks and nothing else.

Any other layout (other filters, checksums, external or virtual storage, chunks that were never
written, a library too old to list the chunks quickly) gives None, and the capture is read
through h5py as before. The file format's byte layout is not parsed here: where each chunk
lies comes from the HDF5 library itself (``H5Dchunk_iter``, HDF5 1.14 and later); the filters
are the HDF5 library's own definitions.

Source: the HDF5 User's Guide, "HDF5 Datasets" (filters): H5Z_FILTER_DEFLATE = 1 is zlib's
deflate stream, H5Z_FILTER_SHUFFLE = 2 stores byte k of every element together (k = 0 .. size
- 1), and a set bit i in a chunk's filter mask means filter i of the pipeline was skipped for
that chunk.
"""

from __future__ import annotations

import zlib
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .base import read_at

#: HDF5 filter identifiers (H5Zpublic.h)
DEFLATE = 1
SHUFFLE = 2
#: filter pipelines read here, in the order they were applied when the file was written
PIPELINES: frozenset[tuple[int, ...]] = frozenset({(), (DEFLATE,), (SHUFFLE,), (SHUFFLE, DEFLATE)})
#: largest chunk read here: a block may need all of one, and the last one read is kept (h5py's
#: own chunk cache holds 1 MiB)
MAX_CHUNK_BYTES = 1 << 24


@dataclass(eq=False)
class StoredSamples:
    """Where the samples of one 1-D dataset lie in its file, and how they are stored.

    ``offsets``/``sizes``: byte offset and stored length of chunk ``i`` (samples
    ``i * chunk .. (i + 1) * chunk``), or of the one contiguous piece (``chunk`` is then 0);
    ``masks``: each chunk's filter mask; ``filters``: the pipeline, as written. The last chunk
    read is kept: blocks shorter than a chunk inflate it once.

    >>> import h5py, numpy as np, os, tempfile
    >>> path = os.path.join(tempfile.mkdtemp(), "c.h5")
    >>> with h5py.File(path, "w") as f:
    ...     _ = f.create_dataset("x", data=np.arange(1000, dtype="<i2"), chunks=(64,),
    ...                          compression="gzip", shuffle=True)
    >>> with h5py.File(path, "r") as f:
    ...     stored = StoredSamples.of(f["x"])
    >>> fd = os.open(path, os.O_RDONLY)
    >>> out = np.zeros(10)
    >>> stored.read_into(fd, 995, 1000, out[:5])
    >>> os.close(fd)
    >>> out.tolist()
    [995.0, 996.0, 997.0, 998.0, 999.0, 0.0, 0.0, 0.0, 0.0, 0.0]
    """

    n: int
    dtype: np.dtype
    chunk: int
    filters: tuple[int, ...]
    offsets: np.ndarray
    sizes: np.ndarray
    masks: np.ndarray
    #: the last chunk read: (its number, its values)
    _last: tuple[int, np.ndarray] | None = field(default=None, init=False, repr=False,
                                                 compare=False)

    @classmethod
    def of(cls, ds: Any) -> StoredSamples | None:
        """The layout of h5py dataset ``ds``, or None when it is not one read here."""
        try:
            return cls._of(ds)
        except Exception:  # an unusual file or library: h5py reads it as it always has
            return None

    @classmethod
    def _of(cls, ds: Any) -> StoredSamples | None:
        if ds.ndim != 1 or ds.dtype.kind not in "iuf" or ds.external:
            return None
        dtype = np.dtype(ds.dtype)
        n = int(ds.shape[0])
        plist = ds.id.get_create_plist()
        filters = tuple(int(plist.get_filter(i)[0]) for i in range(plist.get_nfilters()))
        if filters not in PIPELINES or n == 0:
            return None
        if ds.chunks is None:
            offset = ds.id.get_offset()
            if filters or offset is None:
                return None
            return cls(n, dtype, 0, (), np.array([offset], np.int64),
                       np.array([n * dtype.itemsize], np.int64), np.zeros(1, np.int64))
        chunk = int(ds.chunks[0])
        if chunk * dtype.itemsize > MAX_CHUNK_BYTES:
            return None
        count = -(-n // chunk)
        # chunk k's row: its byte offset, stored size, filter mask; -1 until the library names it
        table = np.full((count, 3), -1, dtype=np.int64)

        def note(info: Any) -> None:
            k, rest = divmod(int(info.chunk_offset[0]), chunk)
            if rest or not 0 <= k < count:
                raise ValueError("a chunk off the grid")
            table[k] = (info.byte_offset, info.size, info.filter_mask)

        ds.id.chunk_iter(note)
        if (table[:, 0] < 0).any():  # chunks never written (their fill value is h5py's to give)
            return None
        return cls(n, dtype, chunk, filters, table[:, 0].copy(), table[:, 1].copy(),
                   table[:, 2].copy())

    def read_into(self, fd: int, start: int, stop: int, out: np.ndarray) -> None:
        """Samples ``start .. stop`` into ``out`` (``stop - start`` values, any float or
        strided view), read from ``fd`` (a descriptor of the dataset's file) by position."""
        if not 0 <= start <= stop <= self.n or len(out) != stop - start:
            raise ValueError(f"samples {start}..{stop} are not inside 0..{self.n}")
        c = self.chunk
        if c == 0:  # one contiguous piece: the stretch asked for, and no more
            item = self.dtype.itemsize
            raw = self._stored(fd, int(self.offsets[0]) + start * item, (stop - start) * item,
                               "its samples")
            out[:] = np.frombuffer(raw, dtype=self.dtype)
            return
        for i in range(start // c, -(-stop // c)):
            lo, hi = max(start, i * c), min(stop, (i + 1) * c)
            values = self._chunk(fd, i)
            out[lo - start : hi - start] = values[lo - i * c : hi - i * c]

    @staticmethod
    def _stored(fd: int, offset: int, size: int, what: str) -> bytes:
        raw = read_at(fd, size, offset)
        if len(raw) != size:
            raise OSError(f"the file ends inside {what}")
        return raw

    def _chunk(self, fd: int, i: int) -> np.ndarray:
        if self._last is not None and self._last[0] == i:
            return self._last[1]
        raw = self._stored(fd, int(self.offsets[i]), int(self.sizes[i]),
                           f"chunk {i} of its samples")
        mask = int(self.masks[i])
        item = self.dtype.itemsize
        data: bytes | np.ndarray = raw
        # undo the filters last to first, skipping those the chunk's mask says were not applied
        for k in range(len(self.filters) - 1, -1, -1):
            if mask >> k & 1:
                continue
            if self.filters[k] == DEFLATE:
                # a chunk inflates to its full size (a last, partial one too): an output buffer
                # of that size from the start spares zlib growing and copying one (0.35 ms
                # against 0.55 ms a 256 kB chunk)
                data = zlib.decompress(data, zlib.MAX_WBITS, self.chunk * item)
            else:
                data = unshuffle(data, item)
        values = np.frombuffer(data, dtype=self.dtype)
        want = min(self.chunk, self.n - i * self.chunk)
        if len(values) < want:
            raise OSError(f"chunk {i} of the samples holds {len(values)} values, not {want}")
        self._last = (i, values)
        return values


def unshuffle(data: bytes | np.ndarray, item: int) -> np.ndarray:
    """Undo HDF5's shuffle filter: the stored bytes hold byte 0 of every element, then byte 1,
    and so on; bytes after the last whole element are stored as they are.

    >>> unshuffle(bytes([1, 3, 5, 2, 4, 6, 9]), 2).tolist()
    [1, 2, 3, 4, 5, 6, 9]
    """
    b = np.frombuffer(data, np.uint8)
    count = len(b) // item
    out = np.empty(len(b), np.uint8)
    elements = out[: count * item].reshape(count, item)
    # a plane at a time: a strided write of contiguous bytes (a transposed copy of the whole
    # takes about 3 times as long)
    for k in range(item):
        elements[:, k] = b[k * count : (k + 1) * count]
    out[count * item :] = b[count * item :]
    return out
