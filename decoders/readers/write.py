"""Write captures: sound files, delimited text and toothcomb's own HDF5 layout.

Every output is written atomically: into a temporary file in the target's folder, then moved
onto the target with :func:`os.replace`. If anything fails, the temporary file is removed and the
target is left as it was (or absent). Inputs are never modified.

Formats (chosen from the suffix unless ``format=`` is given):

======== ================= ======================================================================
format   suffixes          what is written
======== ================= ======================================================================
wav      .wav              RIFF WAVE via soundfile; subtype default PCM_16; samples within +-1.0
flac     .flac             FLAC via soundfile; subtype default PCM_24; samples within +-1.0
aiff     .aif, .aiff       AIFF via soundfile; subtype default PCM_16; samples within +-1.0
csv      .csv              ``#`` comment lines, header ``time_s,<names>``, time %.9f, values %.6g
txt      .txt              the same text as csv
hdf5     .h5, .hdf5        toothcomb's own layout (see :mod:`~toothcomb.decoders.readers.hdf5`)
======== ================= ======================================================================
"""

from __future__ import annotations

import math
import os
import secrets
from collections.abc import Sequence
from pathlib import Path
from types import TracebackType
from typing import Any

import numpy as np
import soundfile as sf

from ..errors import UsageError
from .hdf5 import FORMAT_NAME, FORMAT_VERSION

#: suffix -> format name
SUFFIXES: dict[str, str] = {
    ".wav": "wav",
    ".flac": "flac",
    ".aif": "aiff",
    ".aiff": "aiff",
    ".csv": "csv",
    ".txt": "txt",
    ".h5": "hdf5",
    ".hdf5": "hdf5",
}
#: audio format -> (soundfile format, default subtype)
AUDIO: dict[str, tuple[str, str]] = {
    "wav": ("WAV", "PCM_16"),  # 16-bit is what every sound card tool opens
    "flac": ("FLAC", "PCM_24"),  # lossless; 24 bits cost little after compression
    "aiff": ("AIFF", "PCM_16"),
}
#: HDF5 sample types allowed as ``subtype``
HDF5_TYPES: tuple[str, ...] = ("float64", "float32")
#: samples per HDF5 storage chunk
HDF5_CHUNK = 1 << 16


def _format_of(path: Path, fmt: str | None) -> str:
    if fmt is not None:
        f = fmt.lower().lstrip(".")
        f = {"h5": "hdf5", "aif": "aiff"}.get(f, f)
        if f not in set(SUFFIXES.values()):
            raise UsageError(
                f"output format {fmt!r} is not one toothcomb writes; choose one of "
                f"{', '.join(sorted(set(SUFFIXES.values())))}"
            )
        return f
    suffix = path.suffix.lower()
    if suffix not in SUFFIXES:
        raise UsageError(
            f"cannot tell the output format from the suffix {suffix or '(none)'!r} of {path}; "
            f"use one of {', '.join(SUFFIXES)} or pass format="
        )
    return SUFFIXES[suffix]


def _channels(channels: Sequence[str] | str, fmt: str) -> tuple[str, ...]:
    if isinstance(channels, str):
        channels = [channels]
    names = tuple(str(c) for c in channels)
    if not names:
        raise UsageError("a capture needs at least one channel name")
    if len(set(names)) != len(names):
        raise UsageError(f"channel names must differ; got {list(names)}")
    for n in names:
        if not n or n != n.strip():
            raise UsageError(f"channel name {n!r} is empty or has leading/trailing spaces")
        if fmt in ("csv", "txt") and any(c in n for c in ',"\n\r#'):
            raise UsageError(f'channel name {n!r} cannot go into a CSV header (it has , " or #)')
        if fmt == "hdf5" and ("/" in n or n == "."):
            raise UsageError(f"channel name {n!r} cannot name an HDF5 dataset ('/' or '.')")
        if fmt == "hdf5" and n in ("time", "t", "time_s"):
            raise UsageError(f"channel name {n!r} would be read back as a time axis; rename it")
    return names


def _units(units: str | Sequence[str], n: int) -> tuple[str, ...]:
    if isinstance(units, str):
        return (units,) * n
    out = tuple(str(u) for u in units)
    if len(out) != n:
        raise UsageError(f"{len(out)} units given for {n} channels; give one per channel")
    return out


def _rate(sample_rate: object, fmt: str) -> float:
    try:
        rate = float(sample_rate)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise UsageError(f"sample rate {sample_rate!r} is not a number of Hz") from None
    if not (math.isfinite(rate) and rate > 0):
        raise UsageError(f"sample rate {sample_rate!r} must be a positive number of Hz")
    if fmt in AUDIO and rate != round(rate):
        raise UsageError(
            f"sample rate {rate:g} Hz is not a whole number, which {fmt} files need; write "
            "csv or hdf5 instead"
        )
    return rate


def _temp_path(target: Path) -> Path:
    return target.with_name(f".{target.name}.{secrets.token_hex(4)}.part")


class CaptureWriter:
    """Writes a capture block by block into a temporary file; :meth:`close` moves it into place.

    Use as a context manager: an exception inside the ``with`` block discards the output.

    >>> import numpy as np, os, tempfile
    >>> path = os.path.join(tempfile.mkdtemp(), "run.csv")
    >>> with open_writer(path, 1000.0, ["crank"]) as w:
    ...     w.write(np.array([[0.5], [0.25]]))
    ...     w.write(np.array([[0.125]]))
    >>> print(open(path).read().splitlines()[-3:])
    ['0.000000000,0.5', '0.001000000,0.25', '0.002000000,0.125']
    """

    def __init__(
        self,
        path: str | os.PathLike[str],
        sample_rate: float,
        channels: Sequence[str],
        *,
        format: str | None = None,
        subtype: str | None = None,
        units: str | Sequence[str] = "V",
        comments: Sequence[str] = (),
    ) -> None:
        self.path = Path(path)
        self.format = _format_of(self.path, format)
        self.channels = _channels(channels, self.format)
        self.units = _units(units, len(self.channels))
        self.sample_rate = _rate(sample_rate, self.format)
        self.comments = tuple(str(c) for c in comments)
        self.subtype = self._subtype(subtype)
        #: samples written so far
        self.n_written = 0
        self._done = False
        folder = self.path.parent
        if not folder.is_dir():
            raise UsageError(f"cannot write {self.path}: folder {folder} does not exist")
        if self.path.is_dir():
            raise UsageError(f"cannot write {self.path}: it is a folder")
        self._tmp = _temp_path(self.path)
        try:
            fd = os.open(self._tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
            os.close(fd)
            self._open()
        except BaseException:
            self._discard()
            raise

    # --- per format -------------------------------------------------------------------------
    def _subtype(self, subtype: str | None) -> str:
        if self.format in AUDIO:
            sf_format, default = AUDIO[self.format]
            st = (subtype or default).upper()
            if not sf.check_format(sf_format, st):
                raise UsageError(
                    f"subtype {subtype!r} does not fit {self.format}; choose one of "
                    f"{', '.join(sf.available_subtypes(sf_format))}"
                )
            return st
        if self.format == "hdf5":
            st = (subtype or "float64").lower()
            if st not in HDF5_TYPES:
                raise UsageError(
                    f"subtype {subtype!r} does not fit hdf5; choose {' or '.join(HDF5_TYPES)}"
                )
            return st
        if subtype is not None:
            raise UsageError(f"{self.format} output takes no subtype (got {subtype!r})")
        return "text"

    def _open(self) -> None:
        n = len(self.channels)
        if self.format in AUDIO:
            self._sf = sf.SoundFile(
                self._tmp,
                "w",
                samplerate=int(self.sample_rate),
                channels=n,
                subtype=self.subtype,
                format=AUDIO[self.format][0],
            )
            if self.comments:
                try:
                    self._sf.comment = " | ".join(self.comments)
                except (RuntimeError, sf.SoundFileError):  # the format has no comment field
                    pass
        elif self.format == "hdf5":
            import h5py

            self._h5 = h5py.File(self._tmp, "w")
            a = self._h5.attrs
            a["format"] = FORMAT_NAME
            a["format_version"] = FORMAT_VERSION
            a["sample_rate"] = float(self.sample_rate)
            a["channel_names"] = np.array(self.channels, dtype=h5py.string_dtype())
            if self.comments:
                a["comments"] = np.array(self.comments, dtype=h5py.string_dtype())
            self._ds = []
            for name, unit in zip(self.channels, self.units, strict=True):
                ds = self._h5.create_dataset(
                    name,
                    shape=(0,),
                    maxshape=(None,),
                    dtype=self.subtype,
                    chunks=(HDF5_CHUNK,),
                    compression="gzip",
                    compression_opts=1,  # level 1: as small as 4 on sampled noise, faster
                    shuffle=True,
                )
                ds.attrs["units"] = unit
                self._ds.append(ds)
        else:
            self._txt = open(self._tmp, "w", encoding="utf-8", newline="\n")
            for c in self.comments:
                for line in c.splitlines() or [""]:
                    self._txt.write(f"# {line}\n")
            self._txt.write(f"# sample rate: {self.sample_rate!r} Hz\n")
            self._txt.write(f"# units: {','.join(self.units)}\n")
            self._txt.write("time_s," + ",".join(self.channels) + "\n")
            self._fmt = ",".join(["%.9f"] + ["%.6g"] * n) + "\n"

    def _check(self, data: np.ndarray) -> None:
        if self.format not in AUDIO or data.size == 0:
            return
        with np.errstate(invalid="ignore"):
            # channel by channel: a maximum down the rows of a frame-major block takes some 35
            # times as long (NaN comes through either way)
            peak = [float(np.abs(data[:, j]).max()) for j in range(data.shape[1])]
        for name, p in zip(self.channels, peak, strict=True):
            if not np.isfinite(p):
                raise UsageError(
                    f"channel {name!r} holds NaN or infinite samples, which {self.format} "
                    "cannot store; write csv or hdf5 instead"
                )
            if p > 1.0:
                raise UsageError(
                    f"channel {name!r} peaks at {p:.6g}, outside the +-1.0 a {self.format} "
                    "file can hold; scale it down or write csv or hdf5"
                )

    def write(self, block: np.ndarray) -> None:
        """Append samples, shape (n, n_channels) (a 1-D array for a single channel).

        A bad block (wrong shape, audio outside +-1.0) raises and discards the whole output."""
        if self._done:
            raise UsageError(f"the writer of {self.path} is already closed")
        try:
            data = self._as_2d(block)
            self._check(data)
            self._write(data)
        except BaseException:
            self.abort()
            raise
        self.n_written += data.shape[0]

    def _as_2d(self, block: Any) -> np.ndarray:
        try:
            data = np.asarray(block, dtype=np.float64)
        except (TypeError, ValueError):
            raise UsageError(f"samples for {self.path} are not numbers") from None
        n = len(self.channels)
        if data.ndim == 1 and n == 1:
            data = data[:, None]
        if data.ndim != 2 or data.shape[1] != n:
            raise UsageError(
                f"samples of shape {data.shape} do not fit {n} channel(s); give an array of "
                f"shape (n, {n})"
            )
        return data

    def _write(self, data: np.ndarray) -> None:
        if data.shape[0] == 0:
            return
        if self.format in AUDIO:
            self._sf.write(data)
        elif self.format == "hdf5":
            start = self.n_written
            stop = start + data.shape[0]
            for j, ds in enumerate(self._ds):
                ds.resize((stop,))
                ds[start:stop] = data[:, j]
        else:
            t = (self.n_written + np.arange(data.shape[0])) / self.sample_rate
            rows = np.column_stack([t, data])
            self._txt.write(self._fmt * rows.shape[0] % tuple(rows.ravel()))

    # --- finishing ----------------------------------------------------------------------------
    def _release(self) -> None:
        for attr in ("_sf", "_h5", "_txt"):
            handle = getattr(self, attr, None)
            if handle is not None:
                setattr(self, attr, None)
                handle.close()

    def _discard(self) -> None:
        try:
            self._release()
        except Exception:  # the output is thrown away anyway
            pass
        tmp = getattr(self, "_tmp", None)
        if tmp is not None:
            try:
                os.unlink(tmp)
            except FileNotFoundError:
                pass

    def abort(self) -> None:
        """Throw the output away; the target stays as it was. Calling it again does nothing."""
        if not self._done:
            self._done = True
            self._discard()

    def close(self) -> None:
        """Finish the file and move it onto the target. Calling it again does nothing."""
        if self._done:
            return
        try:
            if self.n_written == 0:
                raise UsageError(f"no samples were written for {self.path}; nothing to save")
            self._release()
            os.replace(self._tmp, self.path)
        except BaseException:
            self._done = True
            self._discard()
            raise
        self._done = True

    def __enter__(self) -> CaptureWriter:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        if exc_type is None:
            self.close()
        else:
            self.abort()


def open_writer(
    path: str | os.PathLike[str],
    sample_rate: float,
    channels: Sequence[str],
    *,
    format: str | None = None,
    subtype: str | None = None,
    units: str | Sequence[str] = "V",
    comments: Sequence[str] = (),
) -> CaptureWriter:
    """Start writing a capture block by block (see :class:`CaptureWriter`).

    ``format`` is taken from the suffix when None (wav, flac, aiff, csv, txt, h5/hdf5);
    ``subtype`` is the audio sample format (PCM_16, PCM_24, FLOAT, ...) or the HDF5 sample type
    (float64, float32); ``units`` is one unit for every channel or one per channel.
    """
    return CaptureWriter(
        path,
        sample_rate,
        channels,
        format=format,
        subtype=subtype,
        units=units,
        comments=comments,
    )


def write_capture(
    path: str | os.PathLike[str],
    data: np.ndarray,
    sample_rate: float,
    channels: Sequence[str],
    *,
    format: str | None = None,
    subtype: str | None = None,
    units: str | Sequence[str] = "V",
    comments: Sequence[str] = (),
) -> None:
    """Write a whole capture, ``data`` of shape (n, n_channels), atomically.

    Raises :class:`~toothcomb.decoders.errors.UsageError` (a ``ValueError``) for bad arguments,
    e.g. audio samples outside +-1.0 (naming the channel and its peak); the target is then left
    untouched.

    >>> import numpy as np, os, tempfile
    >>> path = os.path.join(tempfile.mkdtemp(), "run.wav")
    >>> try:
    ...     write_capture(path, np.full((100, 1), 2.0), 48000, ["crank"])
    ... except ValueError as e:
    ...     print(e)
    channel 'crank' peaks at 2, outside the +-1.0 a wav file can hold; scale it down or write csv or hdf5
    >>> os.path.exists(path), os.listdir(os.path.dirname(path))
    (False, [])
    """  # noqa: E501
    with open_writer(
        path,
        sample_rate,
        channels,
        format=format,
        subtype=subtype,
        units=units,
        comments=comments,
    ) as w:
        w.write(data)
