"""HDF5 samples read by position (:mod:`toothcomb.decoders.readers.h5chunks`) against the HDF5
library's own reads of the same datasets."""

from __future__ import annotations

import os
import zlib
from pathlib import Path

import h5py
import numpy as np
import pytest
from toothcomb.decoders.errors import CaptureError
from toothcomb.decoders.readers import hdf5 as hdf5_mod
from toothcomb.decoders.readers import open_capture
from toothcomb.decoders.readers.h5chunks import StoredSamples, unshuffle
from toothcomb.decoders.readers.write import write_capture

RNG = np.random.default_rng(2026)

#: storage layouts h5py writes: (name, create_dataset keywords)
LAYOUTS = [
    ("contiguous", {}),
    ("chunked", {"chunks": (777,)}),
    ("deflate", {"chunks": (1000,), "compression": "gzip", "compression_opts": 1}),
    ("shuffle", {"chunks": (640,), "shuffle": True}),
    ("shuffle+deflate", {"chunks": (4096,), "compression": "gzip", "shuffle": True}),
]
DTYPES = ["<i2", ">i2", "u1", "<i4", "<f4", ">f4", "<f8"]


def _values(dtype: str, n: int) -> np.ndarray:
    dt = np.dtype(dtype)
    if dt.kind == "f":
        return RNG.normal(size=n).astype(dt)
    info = np.iinfo(dt)
    return RNG.integers(info.min, info.max, size=n, endpoint=True).astype(dt)


def _write(path: Path, data: np.ndarray, **kw: object) -> None:
    with h5py.File(path, "w") as f:
        f.attrs["fs"] = 1000.0
        f.create_dataset("x", data=data, **kw)


@pytest.mark.parametrize("name,kw", LAYOUTS, ids=[n for n, _ in LAYOUTS])
@pytest.mark.parametrize("dtype", DTYPES)
def test_samples_read_by_position_are_those_h5py_reads(tmp_path, name, kw, dtype):
    # source: the HDF5 library (through h5py) reads the same dataset: every stretch, within a
    # chunk, across chunks, the last partial chunk and the whole, must agree bit for bit
    n = 10_007
    path = tmp_path / "x.h5"
    _write(path, _values(dtype, n), **kw)
    with h5py.File(path, "r") as f:
        ds = f["x"]
        stored = StoredSamples.of(ds)
        assert stored is not None and stored.n == n
        fd = os.open(path, os.O_RDONLY)
        try:
            for a, b in [(0, n), (0, 1), (5, 700), (770, 1800), (n - 3, n), (n, n)]:
                out = np.full(b - a, np.nan)
                stored.read_into(fd, a, b, out)
                assert np.array_equal(out, ds[a:b].astype(np.float64)), (a, b)
            # into a strided column of a (samples, channels) block, as the source reads them
            block = np.zeros((3, 2000)).T
            stored.read_into(fd, 4000, 6000, block[:, 1])
            assert np.array_equal(block[:, 1], ds[4000:6000].astype(np.float64))
            assert not block[:, 0].any() and not block[:, 2].any()
            with pytest.raises(ValueError, match="not inside"):
                stored.read_into(fd, 10, n + 1, np.empty(n - 9))
        finally:
            os.close(fd)


def test_unshuffle_puts_the_byte_planes_back():
    # source: HDF5 shuffle filter (H5Zshuffle.c): byte k of element i is stored at
    # k * count + i; the bytes after the last whole element are stored as they are
    x = np.arange(1, 3 * 4 + 3, dtype=np.uint8)  # 3 elements of 4 bytes, 2 trailing bytes
    shuffled = np.concatenate([x[:12].reshape(3, 4).T.ravel(), x[12:]])
    assert unshuffle(shuffled.tobytes(), 4).tolist() == x.tolist()
    assert unshuffle(b"", 8).tolist() == []
    assert unshuffle(bytes([7, 8, 9]), 1).tolist() == [7, 8, 9]


def test_layouts_read_elsewhere_give_none(tmp_path):
    x = RNG.normal(size=5000)
    cases = {
        "fletcher32": {"chunks": (500,), "fletcher32": True},
        "lzf": {"chunks": (500,), "compression": "lzf"},
        "scaleoffset": {"chunks": (500,), "scaleoffset": 3},
    }
    for name, kw in cases.items():
        path = tmp_path / f"{name}.h5"
        _write(path, x, **kw)
        with h5py.File(path, "r") as f:
            assert StoredSamples.of(f["x"]) is None, name
    with h5py.File(tmp_path / "odd.h5", "w") as f:
        f.create_dataset("two_d", data=np.zeros((10, 2)))
        # chunks that were never written: the library gives their fill value, not the file
        part = f.create_dataset("part", shape=(5000,), chunks=(500,), dtype="<f8")
        part[:1200] = 1.0
        f.create_dataset("empty", shape=(0,), dtype="<f8")
        f.create_dataset("text", data=np.array([b"ab", b"cd"]))
        f.create_dataset("outside", shape=(100,), dtype="<f8",
                         external=[(str(tmp_path / "raw.bin"), 0, 800)])
    with h5py.File(tmp_path / "odd.h5", "r") as f:
        for name in ("two_d", "part", "empty", "text", "outside"):
            assert StoredSamples.of(f[name]) is None, name


def test_chunks_beyond_the_size_limit_are_left_to_the_library(tmp_path, monkeypatch):
    from toothcomb.decoders.readers import h5chunks

    path = tmp_path / "big.h5"
    _write(path, RNG.normal(size=5000).astype("<f4"), chunks=(1000,), compression="gzip")
    with h5py.File(path, "r") as f:
        assert StoredSamples.of(f["x"]) is not None
        monkeypatch.setattr(h5chunks, "MAX_CHUNK_BYTES", 3999)  # a chunk is 4000 bytes
        assert StoredSamples.of(f["x"]) is None


def test_short_reads_inflate_each_chunk_once(tmp_path, monkeypatch):
    """Blocks shorter than a chunk (a worker's, say) take it from the one kept."""
    from toothcomb.decoders.readers import h5chunks

    x = RNG.normal(size=20_000)
    path = tmp_path / "x.h5"
    _write(path, x, chunks=(5000,), compression="gzip", shuffle=True)
    inflated: list[int] = []
    real = zlib.decompress
    monkeypatch.setattr(h5chunks.zlib, "decompress",
                        lambda data, *a: inflated.append(len(data)) or real(data, *a))
    with h5py.File(path, "r") as f:
        stored = StoredSamples.of(f["x"])
    assert stored is not None
    fd = os.open(path, os.O_RDONLY)
    try:
        out = np.empty(20_000)
        for a in range(0, 20_000, 700):
            b = min(20_000, a + 700)
            stored.read_into(fd, a, b, out[a:b])
    finally:
        os.close(fd)
    assert np.array_equal(out, x)
    assert len(inflated) == 4


def test_a_chunk_stored_without_one_of_its_filters(tmp_path):
    """A chunk's filter mask tells which filters were skipped when it was written (bit i:
    filter i of the pipeline): it is read without them."""
    # source: HDF5 reference manual, H5Dwrite_chunk: the filter mask of a chunk written
    # directly; h5py reads it back through the library
    x = RNG.normal(size=3000).astype("<f4")
    path = tmp_path / "mask.h5"
    with h5py.File(path, "w") as f:
        ds = f.create_dataset("x", shape=(3000,), dtype="<f4", chunks=(1000,),
                              compression="gzip", shuffle=True)
        for i in range(3):
            part = x[i * 1000 : (i + 1) * 1000]
            planes = part.view(np.uint8).reshape(1000, 4).T.tobytes()
            if i == 1:  # deflate (filter 1) skipped: the shuffled bytes as they are
                ds.id.write_direct_chunk((i * 1000,), planes, filter_mask=0b10)
            else:
                ds.id.write_direct_chunk((i * 1000,), zlib.compress(planes), filter_mask=0)
    with h5py.File(path, "r") as f:
        stored = StoredSamples.of(f["x"])
        assert stored is not None and stored.masks.tolist() == [0, 2, 0]
        expected = f["x"][:].astype(np.float64)
    assert np.array_equal(expected, x.astype(np.float64))
    fd = os.open(path, os.O_RDONLY)
    try:
        out = np.empty(3000)
        stored.read_into(fd, 0, 3000, out)
    finally:
        os.close(fd)
    assert np.array_equal(out, expected)


def _blocks(path: Path, size: int) -> np.ndarray:
    with open_capture(str(path)) as src:
        return np.concatenate([b.data for b in src.blocks(size)])


@pytest.mark.parametrize("userblock", [0, 1024])
def test_a_capture_reads_the_same_with_or_without_the_library(tmp_path, monkeypatch, userblock):
    x = RNG.normal(size=(70_001, 3))
    path = tmp_path / "c.h5"
    write_capture(path, x, 48_000.0, ["crank", "cam", "other"])
    if userblock:  # the same datasets behind a user block: the offsets the library gives hold
        moved = tmp_path / "ub.h5"
        with h5py.File(path, "r") as f, h5py.File(moved, "w", userblock_size=userblock) as g:
            for k, v in f.attrs.items():
                g.attrs[k] = v
            for name in f:
                f.copy(f[name], g, name=name)
        path = moved
    with open_capture(str(path)) as src:
        assert src._stored is not None  # read by position
        by_position = np.concatenate([b.data for b in src.blocks(4096)])
        some = np.concatenate([b.data for b in src.blocks_from(4096, start=8192, channels={1})])
    monkeypatch.setattr(hdf5_mod.StoredSamples, "of", classmethod(lambda cls, ds: None))
    with open_capture(str(path)) as src:
        assert src._stored is None and not hasattr(src, "blocks_from")
        by_library = np.concatenate([b.data for b in src.blocks(4096)])
    assert np.array_equal(by_position, by_library)
    assert np.array_equal(by_position, x)
    # only the channels asked for are read; the others' columns hold zeros
    assert np.array_equal(some[:, 1], x[8192:, 1])
    assert not some[:, 0].any() and not some[:, 2].any()


def test_a_damaged_chunk_is_one_sentence(tmp_path):
    path = tmp_path / "bad.h5"
    write_capture(path, RNG.normal(size=(200_000, 2)), 48_000.0, ["crank", "cam"])
    with h5py.File(path, "r") as f:
        stored = StoredSamples.of(f["crank"])
    assert stored is not None and len(stored.offsets) > 2
    raw = bytearray(path.read_bytes())
    at = int(stored.offsets[-2])
    raw[at : at + 64] = b"\x00" * 64
    path.write_bytes(bytes(raw))
    with pytest.raises(CaptureError) as err:
        _blocks(path, 4096)
    text = str(err.value)
    assert text.startswith(f"{path}: samples ") and "looks damaged" in text
    assert "\n" not in text


def test_without_pread_the_descriptor_is_positioned_instead(tmp_path, monkeypatch):
    """Where the system has no ``os.pread`` (Windows), the same samples are read."""
    x = RNG.normal(size=(30_000, 2))
    path = tmp_path / "c.h5"
    write_capture(path, x, 48_000.0, ["crank", "cam"])
    csv = tmp_path / "c.csv"
    write_capture(csv, x[:5000], 48_000.0, ["crank", "cam"])
    with_pread = _blocks(path, 4096), _blocks(csv, 1000)
    monkeypatch.delattr(os, "pread")
    assert np.array_equal(_blocks(path, 4096), with_pread[0])
    assert np.array_equal(_blocks(csv, 1000), with_pread[1])
    assert np.array_equal(with_pread[0], x)


@pytest.mark.parametrize("kw", [{}, {"chunks": (1000,), "compression": "gzip"}],
                         ids=["contiguous", "chunked"])
def test_a_layout_that_does_not_read_as_the_library_reads_is_not_used(tmp_path, monkeypatch, kw):
    """At open, each channel's first and last samples are read both ways: a layout that gives
    other values (here every offset 8 bytes off) leaves the file to h5py."""
    x = RNG.normal(size=5000)
    path = tmp_path / "x.h5"
    _write(path, x, **kw)
    real = StoredSamples.of.__func__

    def shifted(cls, ds):
        s = real(cls, ds)
        return cls(s.n, s.dtype, s.chunk, s.filters, s.offsets + 8, s.sizes, s.masks)

    with open_capture(str(path)) as src:
        assert src._stored is not None
    monkeypatch.setattr(hdf5_mod.StoredSamples, "of", classmethod(shifted))
    with open_capture(str(path)) as src:
        assert src._stored is None
        assert np.array_equal(np.concatenate([b.data for b in src.blocks(999)])[:, 0], x)


def test_reads_by_position_call_no_hdf5_library(tmp_path, monkeypatch):
    """What a forked worker does with the source (its blocks, and the exact levels pass that
    names a bad sample) must not call into h5py: its handles are not to be used across a fork."""
    from toothcomb.decoders.levels import measure_levels

    x = RNG.normal(size=(50_000, 2))
    path = tmp_path / "c.h5"
    write_capture(path, x, 48_000.0, ["crank", "cam"])
    with open_capture(str(path)) as src:
        assert src._stored is not None

        def refuse(*_a: object) -> None:
            raise AssertionError("h5py was called")

        for name in ("__getitem__", "chunks", "shape", "dtype", "id", "attrs", "file"):
            monkeypatch.setattr(h5py.Dataset, name, property(refuse) if name != "__getitem__"
                                else refuse)
        monkeypatch.setattr(h5py.File, "__getitem__", refuse)
        whole = np.concatenate([b.data for b in src.blocks(4096)])
        later = np.concatenate([b.data for b in src.blocks_from(4096, start=8192, channels={0})])
        levels = measure_levels(src, 4096)
    assert np.array_equal(whole, x) and np.array_equal(later[:, 0], x[8192:, 0])
    assert levels[0].n == 50_000 and levels[1].maximum == x[:, 1].max()
