"""HDF5 captures, read slice by slice through h5py (only the samples asked for are read).

toothcomb's own layout (what :func:`toothcomb.decoders.readers.write.write_capture` writes):

- root attributes ``format = "toothcomb-capture"``, ``format_version = 1``, ``sample_rate`` (Hz,
  float), ``channel_names`` (array of str, the channel order) and optionally ``t0`` (seconds, the
  time of the first sample on the instrument's clock) and ``comments`` (array of str);
- one 1-D dataset per channel at the root, named by the channel name, with attribute ``units``
  (e.g. ``"V"``). Datasets are chunked and compressed; any numeric type is read as float64.

Any other file is read when it holds equal-length 1-D numeric datasets in the root or in one
group, with the rate in an attribute (any case) ``sample_rate``, ``samplerate``,
``sampling_rate``, ``fs``, ``rate`` (Hz) or ``dt``, ``sample_interval``, ``x_increment`` (seconds)
on a dataset, its group or a parent group; a ``channel_names`` attribute gives the channel order,
else the file's own order. A 1-D dataset named ``time``, ``t`` or ``time_s`` beside the channels
is taken as the time axis (the rate then comes from it when no attribute gives one).

``file.h5:/path`` picks what to read: a 1-D dataset (one channel), a 2-D dataset (channels along
the smaller axis) or a group. Integer samples are converted to float64 as they are, unscaled.
"""

from __future__ import annotations

import errno
import math
import os
import zlib
from collections.abc import Container, Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ..errors import CaptureError
from ..model import Block, CaptureInfo
from .base import (
    IrregularClock,
    NotIncreasing,
    RegularClock,
    SourceBase,
    check_channel_count,
    check_file,
    check_sample_rate,
    reject_options,
    split_dataset_path,
    tidy_rate,
)
from .h5chunks import StoredSamples

if TYPE_CHECKING:
    import h5py

EXTENSIONS: tuple[str, ...] = (".h5", ".hdf5", ".hdf", ".he5")

#: value of the root attribute ``format`` in toothcomb's own layout
FORMAT_NAME = "toothcomb-capture"
#: the layout version this module writes and reads
FORMAT_VERSION = 1

#: rate attributes (lower-case name -> factor to Hz)
RATE_ATTRS: dict[str, float] = {
    "sample_rate": 1.0,
    "samplerate": 1.0,
    "sampling_rate": 1.0,
    "fs": 1.0,
    "rate": 1.0,
}
#: interval attributes (lower-case name), seconds
INTERVAL_ATTRS: frozenset[str] = frozenset({"dt", "sample_interval", "x_increment"})
#: names of a time-axis dataset
TIME_NAMES: frozenset[str] = frozenset({"time", "t", "time_s"})

#: HDF5 format signature (at 0 or at a user-block size: 512, 1024, 2048, ...)
SIGNATURE = b"\x89HDF\r\n\x1a\n"
#: samples read at a time at least, rounded up to whole storage chunks
READ_SPAN = 1 << 16
#: samples at each end of a contiguous dataset read both ways at open (see Hdf5Source)
CHECKED_SAMPLES = 4096


def _h5py() -> Any:
    import h5py

    return h5py


def _text(value: Any) -> str:
    if isinstance(value, bytes | np.bytes_):
        return value.decode("utf-8", errors="replace")
    if isinstance(value, np.ndarray) and value.shape == ():
        return _text(value[()])
    return str(value)


def _texts(value: Any) -> list[str]:
    if isinstance(value, str | bytes | np.bytes_):
        return [_text(value)]
    return [_text(v) for v in np.asarray(value).ravel()]


def _scalar(value: Any) -> float:
    """An attribute as one float (a 1-element array counts); ValueError otherwise."""
    if isinstance(value, bytes | np.bytes_ | str):
        return float(_text(value))
    arr = np.asarray(value)
    if arr.size != 1 or not np.issubdtype(arr.dtype, np.number):
        raise ValueError(value)
    return float(arr.ravel()[0])


def _is_numeric(ds: h5py.Dataset) -> bool:
    dt = ds.dtype
    return (
        dt.fields is None
        and np.issubdtype(dt, np.number)
        and not np.issubdtype(dt, np.complexfloating)
    )


def _basename(name: str) -> str:
    return name.rstrip("/").rsplit("/", 1)[-1] or "/"


@dataclass
class _Column:
    """Where one channel's samples live."""

    dataset: h5py.Dataset
    #: None for a 1-D dataset; else (axis of the samples, index along the other axis)
    index: tuple[int, int] | None = None


@dataclass
class _Plan:
    columns: list[_Column]
    names: list[str]
    units: list[str]
    n: int
    rate: float | None = None
    rate_from: str = ""
    t0: float = 0.0
    notes: list[str] = field(default_factory=list)
    time: h5py.Dataset | None = None


def _rate_attr(obj: Any, shown: str) -> tuple[float, str] | None:
    for key, value in obj.attrs.items():
        k = key.lower()
        if k not in RATE_ATTRS and k not in INTERVAL_ATTRS:
            continue
        where = f"{obj.name}@{key}"
        try:
            x = _scalar(value)
        except (TypeError, ValueError):
            raise CaptureError(
                f"{shown}: attribute {where} is {value!r}, not a number; fix it or pass "
                "--sample-rate"
            ) from None
        rate = x * RATE_ATTRS[k] if k in RATE_ATTRS else (tidy_rate(1.0 / x) if x > 0 else math.nan)
        if not (math.isfinite(rate) and rate > 0):
            raise CaptureError(
                f"{shown}: attribute {where} = {x!r} gives no positive sample rate; fix it or "
                "pass --sample-rate"
            )
        return rate, where
    return None


def _parents(obj: Any) -> list[Any]:
    """``obj``'s group chain up to the root (closest first)."""
    out = []
    g = obj.parent
    while True:
        out.append(g)
        if g.name == "/":
            return out
        g = g.parent


def _find_rate(datasets: Sequence[Any], shown: str) -> tuple[float, str] | None:
    found = [r for r in (_rate_attr(ds, shown) for ds in datasets) if r is not None]
    if found:
        rates = {r for r, _ in found}
        if len(rates) > 1:
            listed = ", ".join(f"{w} = {r:g} Hz" for r, w in found)
            raise CaptureError(
                f"{shown}: the channels disagree on the sample rate ({listed}); read them one at "
                "a time with file.h5:/path"
            )
        return found[0]
    for g in _parents(datasets[0]):
        r = _rate_attr(g, shown)
        if r is not None:
            return r
    return None


def _find_t0(objs: Sequence[Any]) -> float | None:
    for obj in objs:
        for key, value in obj.attrs.items():
            if key.lower() == "t0":
                try:
                    return _scalar(value)
                except (TypeError, ValueError):
                    return None
    return None


def _units(ds: Any) -> str:
    for key, value in ds.attrs.items():
        if key.lower() in ("units", "unit"):
            return _text(value)
    return ""


def _channel_order(group: Any, names: list[str]) -> list[str]:
    for key, value in group.attrs.items():
        if key.lower() == "channel_names":
            order = [n for n in _texts(value) if n in names]
            return order + [n for n in names if n not in order]
    return names


def _group_members(group: Any) -> tuple[list[Any], Any | None]:
    """The group's 1-D numeric datasets (at least 2 samples) and its time axis, if any."""
    h5py = _h5py()
    data, time = [], None
    for name in group:
        obj = group.get(name)
        if not isinstance(obj, h5py.Dataset) or not _is_numeric(obj) or obj.ndim != 1:
            continue
        if obj.shape[0] < 2:
            continue
        if name.lower() in TIME_NAMES and time is None:
            time = obj
        else:
            data.append(obj)
    return data, time


def _what(channels: int, samples: int) -> str:
    return f"{channels} channel{'s' if channels != 1 else ''} of {samples} samples"


def _candidates(f: Any) -> list[tuple[str, str]]:
    """(path, what) of everything in the file that could be read as a capture."""
    h5py = _h5py()
    out: list[tuple[str, str]] = []

    def group(g: Any) -> None:
        data, _ = _group_members(g)
        lengths = {d.shape[0] for d in data}
        if len(lengths) == 1:
            out.append((g.name, _what(len(data), lengths.pop())))
        else:
            for d in data:
                out.append((d.name, _what(1, d.shape[0])))

    def visit(name: str, obj: Any) -> None:
        if isinstance(obj, h5py.Group):
            group(obj)
        elif isinstance(obj, h5py.Dataset) and obj.ndim == 2 and _is_numeric(obj):
            if min(obj.shape) >= 1 and max(obj.shape) >= 2:
                out.append((obj.name, _what(min(obj.shape), max(obj.shape))))

    group(f)
    f.visititems(visit)
    return out


def _listing(cands: list[tuple[str, str]], limit: int = 8) -> str:
    shown = ", ".join(f"{p} ({w})" for p, w in cands[:limit])
    if len(cands) > limit:
        shown += f" and {len(cands) - limit} more"
    return shown


def _plan_group(g: Any, shown: str) -> _Plan:
    data, time = _group_members(g)
    if not data:
        raise CaptureError(f"{shown}: group {g.name} holds no 1-D numeric dataset to read")
    lengths = {d.shape[0] for d in data}
    if len(lengths) > 1:
        listed = ", ".join(f"{d.name} ({d.shape[0]})" for d in data)
        raise CaptureError(
            f"{shown}: the datasets in {g.name} differ in length ({listed}); pick one as "
            f"file.h5:{data[0].name}"
        )
    n = lengths.pop()
    by_name = {_basename(d.name): d for d in data}
    order = _channel_order(g, list(by_name))
    cols = [_Column(by_name[k]) for k in order]
    plan = _Plan(cols, order, [_units(by_name[k]) for k in order], n)
    if time is not None and time.shape[0] != n:
        time = None
    plan.time = time
    return plan


def _plan_dataset(ds: Any, shown: str) -> _Plan:
    if not _is_numeric(ds):
        raise CaptureError(f"{shown}: dataset {ds.name} holds {ds.dtype}, not numbers")
    if ds.ndim == 1:
        return _Plan([_Column(ds)], [_basename(ds.name)], [_units(ds)], ds.shape[0])
    if ds.ndim != 2:
        raise CaptureError(
            f"{shown}: dataset {ds.name} has {ds.ndim} dimensions {ds.shape}; toothcomb reads "
            "1-D (one channel) or 2-D (samples x channels) datasets"
        )
    if min(ds.shape) == 0:
        raise CaptureError(f"{shown}: dataset {ds.name} of shape {ds.shape} holds no samples")
    axis = 0 if ds.shape[0] >= ds.shape[1] else 1
    n, k = ds.shape[axis], ds.shape[1 - axis]
    check_channel_count(shown, k, f"dataset {ds.name} of shape {ds.shape}")
    names = [f"ch{i}" for i in range(k)]
    for key, value in ds.attrs.items():
        if key.lower() == "channel_names":
            given = _texts(value)
            if len(given) == k and len(set(given)) == k:
                names = given
    unit = _units(ds)
    units = [unit] * k
    return _Plan([_Column(ds, (axis, i)) for i in range(k)], names, units, n)


def _plan_own(f: Any, shown: str) -> _Plan:
    attrs = f.attrs
    version = attrs.get("format_version")
    try:
        v = int(_scalar(version)) if version is not None else None
    except (TypeError, ValueError):
        v = None
    if v != FORMAT_VERSION:
        shown_version = _text(version) if version is not None else "(none)"
        raise CaptureError(
            f"{shown}: is a toothcomb capture of format_version {shown_version}; this toothcomb "
            f"reads version {FORMAT_VERSION}, so update toothcomb or rewrite the file"
        )
    names = _texts(attrs["channel_names"]) if "channel_names" in attrs else None
    h5py = _h5py()
    if names is None:
        names = [k for k in f if isinstance(f.get(k), h5py.Dataset) and f[k].ndim == 1]
    missing = [n for n in names if not isinstance(f.get(n), h5py.Dataset)]
    if missing or not names:
        raise CaptureError(
            f"{shown}: lists channel(s) {', '.join(missing) or '(none)'} without a dataset at "
            "the root; the file is incomplete"
        )
    dss = [f[n] for n in names]
    bad = [f"{d.name}: {d.ndim}-D {d.dtype}" for d in dss if d.ndim != 1 or not _is_numeric(d)]
    if bad:
        raise CaptureError(
            f"{shown}: channel dataset(s) are not 1-D numbers ({', '.join(bad)}); each channel of "
            "a toothcomb capture is a 1-D dataset of numbers"
        )
    lengths = {d.shape[0] for d in dss}
    if len(lengths) != 1:
        listed = ", ".join(f"{d.name}: {d.shape[0]}" for d in dss)
        raise CaptureError(
            f"{shown}: the channel datasets differ in length ({listed}); the file is damaged"
        )
    plan = _Plan([_Column(d) for d in dss], names, [_units(d) for d in dss], lengths.pop())
    if "sample_rate" not in attrs:
        raise CaptureError(f"{shown}: a toothcomb capture without the sample_rate attribute")
    plan.rate, plan.rate_from = _rate_attr_exact(attrs["sample_rate"], shown), "/@sample_rate"
    return plan


def _rate_attr_exact(value: Any, shown: str) -> float:
    try:
        rate = _scalar(value)
    except (TypeError, ValueError):
        rate = math.nan
    if not (math.isfinite(rate) and rate > 0):
        raise CaptureError(f"{shown}: sample_rate attribute {value!r} is not a positive number")
    return rate


def _time_axis(ds: Any, shown: str) -> tuple[float, float]:
    """(rate, t0) from a time-axis dataset, checked for a fixed step."""
    clock = RegularClock(resolution=0.0)
    n = ds.shape[0]
    try:
        for start in range(0, n, READ_SPAN * 4):
            clock.feed(ds[start : start + READ_SPAN * 4])
        fit = clock.finish()
    except IrregularClock as exc:
        st = exc.step
        raise CaptureError(
            f"{shown}: the time axis {ds.name} is irregular at index {st.index} "
            f"(t = {st.time:.9g} s): a step of {st.step:.6g} s where the others are "
            f"{st.interval:.6g} s; resample to a fixed interval or pass --sample-rate"
        ) from None
    except NotIncreasing:
        raise CaptureError(
            f"{shown}: the time axis {ds.name} does not increase; pass --sample-rate"
        ) from None
    return fit.sample_rate, fit.t0


def _stored_fraction(ds: Any) -> tuple[int, int] | None:
    """(storage units written, units the dataset's shape needs) when some were never written,
    else None. Units are chunks for a chunked dataset, bytes for a contiguous one; a compact
    dataset is always whole, and other layouts (virtual, external) are not checked.

    Reading an unwritten part gives the fill value for every sample, so a header that declares
    far more samples than the file stores would otherwise be streamed as a long run of zeros.
    """
    h5py = _h5py()
    try:
        layout = ds.id.get_create_plist().get_layout()
        if layout == h5py.h5d.CHUNKED and ds.chunks is not None:
            need = 1
            for size, chunk in zip(ds.shape, ds.chunks, strict=True):
                need *= -(-size // chunk)
            have = int(ds.id.get_num_chunks())
        elif layout == h5py.h5d.CONTIGUOUS:
            need = int(ds.size) * ds.dtype.itemsize
            have = int(ds.id.get_storage_size())
        else:
            return None
    except (AttributeError, RuntimeError, ValueError):  # an old HDF5 library: not checked
        return None
    return (have, need) if have < need else None


def _check_stored(columns: list[_Column], shown: str) -> None:
    """Refuse datasets whose declared size the file does not hold (see :func:`_stored_fraction`),
    before any sample is read."""
    seen: set[int] = set()
    for col in columns:
        ds = col.dataset
        if id(ds) in seen:
            continue
        seen.add(id(ds))
        short = _stored_fraction(ds)
        if short is None:
            continue
        have, need = short
        unit = "storage chunks" if ds.chunks is not None else "bytes"
        shape = f" (shape {ds.shape})" if ds.ndim > 1 else ""
        raise CaptureError(
            f"{shown}: dataset {ds.name} declares {ds.size} samples{shape} but only {have} of "
            f"its {need} {unit} were ever written; the capture is incomplete (the recorder "
            "stopped early, or the header is wrong), so record or export it again"
        )


class Hdf5Source(SourceBase):
    """An open HDF5 capture (see :func:`toothcomb.decoders.readers.open_capture`)."""

    def __init__(self, file: Any, info: CaptureInfo, columns: list[_Column]) -> None:
        super().__init__(info)
        self._file = file
        self._columns = columns
        #: every channel's samples as byte ranges of the file, read by position
        #: (:mod:`.h5chunks`), with a descriptor of the file's own; None: read through h5py
        self._stored: list[StoredSamples] | None = None
        self._fd = -1
        # the first channel's storage chunk along the samples (0: not chunked), asked of h5py
        # here once: a worker reading by position must not call the HDF5 library
        ds = columns[0].dataset
        axis = columns[0].index[0] if columns[0].index else 0
        self._chunk = int(ds.chunks[axis]) if ds.chunks is not None else 0
        self._read_stored_layout()
        if self._stored is not None:
            self.blocks_from = self._blocks_from

    def _read_stored_layout(self) -> None:
        if any(c.index is not None for c in self._columns):
            return
        layouts = []
        for c in self._columns:
            s = StoredSamples.of(c.dataset)
            if s is None or s.n != self.info.n_samples:
                return
            layouts.append(s)
        try:
            fd = os.open(self._file.filename, os.O_RDONLY | getattr(os, "O_CLOEXEC", 0))
        except (OSError, TypeError, ValueError):
            return
        # the layout as the library reports it must give what h5py reads, at both ends (a
        # chunk, or as many samples of a contiguous dataset)
        n = self.info.n_samples
        for s, col in zip(layouts, self._columns, strict=True):
            span = min(n, s.chunk or CHECKED_SAMPLES)
            for a, b in ((0, span), (n - span, n)):
                mine = np.empty(b - a)
                try:
                    s.read_into(fd, a, b, mine)
                    agrees = np.array_equal(mine, col.dataset[a:b].astype(np.float64),
                                            equal_nan=True)
                except Exception:  # any failure: h5py reads the file, and says what is wrong
                    agrees = False
                if not agrees:
                    os.close(fd)
                    return
        self._stored, self._fd = layouts, fd

    def _span(self, block_size: int) -> int:
        span = max(block_size, READ_SPAN)
        if self._chunk:
            span = -(-span // self._chunk) * self._chunk
        return span

    def _read(self, start: int, stop: int, channels: Container[int] | None = None) -> np.ndarray:
        # channel-major: each channel's samples contiguous, as the front ends read them
        out = np.empty((len(self._columns), stop - start), dtype=np.float64).T
        if self._stored is not None:
            for j, s in enumerate(self._stored):
                if channels is None or j in channels:
                    s.read_into(self._fd, start, stop, out[:, j])
                else:
                    out[:, j] = 0.0
            return out
        done: dict[int, np.ndarray] = {}
        for j, col in enumerate(self._columns):
            ds = col.dataset
            if col.index is None:
                out[:, j] = ds[start:stop]
                continue
            axis, k = col.index
            key = id(ds)
            if key not in done:
                done[key] = ds[start:stop, :] if axis == 0 else ds[:, start:stop].T
            out[:, j] = done[key][:, k]
        return out

    def _pieces(self, block_size: int) -> Iterator[np.ndarray]:
        n = self.info.n_samples
        span = self._span(block_size)
        for start in range(0, n, span):
            yield self._read_checked(start, min(n, start + span))

    def _read_checked(
        self, start: int, stop: int, channels: Container[int] | None = None
    ) -> np.ndarray:
        try:
            return self._read(start, stop, channels)
        except (OSError, RuntimeError, ValueError, zlib.error) as exc:
            raise CaptureError(
                f"{self.info.path}: samples {start}..{stop} cannot be read ({exc}); the file "
                "looks damaged"
            ) from None

    def _blocks_from(
        self, block_size: int, start: int = 0, channels: Container[int] | None = None
    ) -> Iterator[Block]:
        """The samples as :meth:`blocks` gives them, from ``start`` on (a multiple of
        ``block_size``, or the end), read by position without the HDF5 library: a worker
        process can read them beside this one. ``channels``: read only these (the others'
        columns hold zeros)."""
        n = self.info.n_samples
        starts = self._block_starts(block_size, start)
        for at in starts:
            yield Block(at, self._read_checked(at, min(n, at + starts.step), channels))

    def read_windows(self, starts: Iterable[int], length: int) -> Iterator[np.ndarray]:
        """``length`` samples from each of ``starts`` (fewer at the end), as float64 (samples,
        channels): samples from anywhere in the file without reading all of it."""
        n = self.info.n_samples
        for s in starts:
            yield self._read(int(s), min(n, int(s) + int(length)))

    def _close(self) -> None:
        if self._fd >= 0:
            os.close(self._fd)
            self._fd = -1
        try:
            self._file.close()
        except Exception:  # closing a damaged file must not hide the error that led here
            pass


class Hdf5Reader:
    """Reader plugin for HDF5 files (entry point ``hdf5``).

    >>> import numpy as np, os, tempfile
    >>> from toothcomb.decoders.readers.write import write_capture
    >>> path = os.path.join(tempfile.mkdtemp(), "run.h5")
    >>> write_capture(path, np.zeros((1000, 2)), 20000.0, ["crank", "cam"])
    >>> with Hdf5Reader.open(path) as src:
    ...     print(src.info.sample_rate, src.info.n_samples, src.info.channels, src.info.units)
    20000.0 1000 ('crank', 'cam') ('V', 'V')
    """

    name = "hdf5"
    handles = "HDF5 files: toothcomb's own layout, equal-length datasets with a rate attribute"
    extensions = EXTENSIONS

    @staticmethod
    def detect(path: str | os.PathLike[str]) -> bool:
        """True when the file carries the HDF5 signature (at 0 or after a user block)."""
        try:
            with open(path, "rb") as f:
                size = os.fstat(f.fileno()).st_size
                offset = 0
                while offset + len(SIGNATURE) <= size:
                    f.seek(offset)
                    if f.read(len(SIGNATURE)) == SIGNATURE:
                        return True
                    offset = 512 if offset == 0 else offset * 2
        except OSError:
            return False
        return False

    @staticmethod
    def open(
        path: str | os.PathLike[str],
        *,
        sample_rate: float | None = None,
        dataset: str | None = None,
        **options: Any,
    ) -> Hdf5Source:
        """Open an HDF5 capture; ``dataset`` (or ``file.h5:/path``) picks what to read."""
        reject_options("hdf5", options)
        rate_given = check_sample_rate(sample_rate)
        given = os.fspath(path)
        file_part, inner = (given, dataset) if dataset is not None else split_dataset_path(given)
        p = check_file(file_part)
        shown = f"{file_part}:{inner}" if inner else file_part
        h5py = _h5py()
        try:
            f = h5py.File(p, "r")
        except OSError as exc:
            if exc.errno == errno.EACCES or "Permission denied" in str(exc):
                raise CaptureError(
                    f"{shown}: cannot be read (Permission denied); check its permissions"
                ) from None
            raise CaptureError(
                f"{shown}: cannot be opened as HDF5 ({exc}); the file may be truncated or not HDF5"
            ) from None
        except ValueError as exc:
            raise CaptureError(
                f"{shown}: cannot be opened as HDF5 ({exc}); the file may be truncated or not HDF5"
            ) from None
        try:
            source = _open(f, p, shown, inner, rate_given)
        except CaptureError:
            f.close()
            raise
        except (OSError, RuntimeError, KeyError, ValueError, TypeError) as exc:
            f.close()
            raise CaptureError(f"{shown}: cannot be read ({exc}); the file looks damaged") from None
        return source


def _open(f: Any, p: Path, shown: str, inner: str | None, rate_given: float | None) -> Hdf5Source:
    h5py = _h5py()
    own = False
    if inner:
        key = inner if inner.startswith("/") else "/" + inner
        obj = f.get(key)
        if obj is None:
            raise CaptureError(
                f"{shown}: there is no {key} in the file (it has {_listing(_candidates(f))})"
            )
        plan = _plan_group(obj, shown) if isinstance(obj, h5py.Group) else _plan_dataset(obj, shown)
        fmt = "hdf5"
    elif _text(f.attrs.get("format", "")) == FORMAT_NAME:
        plan = _plan_own(f, shown)
        own = True
        fmt = "hdf5"
    else:
        cands = _candidates(f)
        if not cands:
            raise CaptureError(
                f"{shown}: holds no 1-D or 2-D numeric dataset that could be a channel"
            )
        if len(cands) > 1:
            raise CaptureError(
                f"{shown}: holds several possible captures ({_listing(cands)}); pick one as "
                f"{p.name}:{cands[0][0]}"
            )
        obj = f[cands[0][0]]
        plan = _plan_group(obj, shown) if isinstance(obj, h5py.Group) else _plan_dataset(obj, shown)
        fmt = "hdf5"
    if plan.n < 1:
        raise CaptureError(f"{shown}: the channel datasets hold no samples")
    check_channel_count(shown, len(plan.columns), "the file")
    _check_stored(plan.columns, shown)
    datasets = [c.dataset for c in plan.columns]
    if not own:
        found = _find_rate(datasets, shown)
        if found is not None:
            plan.rate, plan.rate_from = found
    t0 = _find_t0(datasets[:1] + _parents(datasets[0]))
    if plan.rate is None and plan.time is not None and rate_given is None:
        plan.rate, t_first = _time_axis(plan.time, shown)
        plan.rate_from = plan.time.name
        t0 = t_first if t0 is None else t0
    if rate_given is not None:
        if plan.rate is not None and plan.rate != rate_given:
            plan.notes.append(
                f"sample rate {rate_given:g} Hz given overrides {plan.rate:g} Hz from "
                f"{plan.rate_from}"
            )
        plan.rate = rate_given
    if plan.rate is None:
        raise CaptureError(
            f"{shown}: gives no sample rate (no attribute sample_rate, fs, dt, ... on the "
            "datasets or their groups); pass --sample-rate"
        )
    subtypes = sorted({str(d.dtype) for d in datasets})
    info = CaptureInfo(
        path=shown,
        sample_rate=float(plan.rate),
        n_samples=int(plan.n),
        channels=tuple(plan.names),
        format=fmt,
        subtype="/".join(subtypes),
        t0=float(t0) if t0 is not None else 0.0,
        units=tuple(plan.units),
        full_scale=(math.nan,) * len(plan.names),
        notes=tuple(plan.notes),
    )
    return Hdf5Source(f, info, plan.columns)
