"""What every capture reader shares: input checks, the source base class, re-blocking, and the
check that a column of time stamps ticks at a fixed interval.

A reader's source subclasses :class:`SourceBase` and implements :meth:`SourceBase._pieces`, a
generator of consecutive sample arrays of any length; :meth:`SourceBase.blocks` cuts them into
blocks of exactly ``block_size`` samples (the last one shorter), so the values a caller sees never
depend on the block size.
"""

from __future__ import annotations

import math
import os
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import CaptureError, UsageError
from ..model import DEFAULT_BLOCK_SIZE, Block, CaptureInfo


def check_file(path: str | os.PathLike[str]) -> Path:
    """Return ``path`` as a :class:`~pathlib.Path` if it is a readable, non-empty file.

    Raises :class:`CaptureError` for a missing file, a directory or an empty file.

    >>> try:
    ...     check_file("/no/x.wav")
    ... except CaptureError as e:
    ...     print(e)
    capture file '/no/x.wav' does not exist; check the path
    """
    p = Path(path)
    shown = os.fspath(path)
    try:
        st = p.stat()
    except FileNotFoundError:
        raise CaptureError(f"capture file {shown!r} does not exist; check the path") from None
    except OSError as exc:
        raise CaptureError(f"capture file {shown!r} cannot be read ({exc.strerror})") from None
    if p.is_dir():
        raise CaptureError(f"{shown!r} is a folder, not a capture file; name a file inside it")
    if not p.is_file():
        raise CaptureError(f"{shown!r} is not a regular file; copy the capture to a file first")
    if st.st_size == 0:
        raise CaptureError(f"capture file {shown!r} is empty (0 bytes); record or copy it again")
    if not os.access(p, os.R_OK):
        raise CaptureError(f"capture file {shown!r} is not readable; check its permissions")
    return p


#: most channels a capture may have; a header announcing more is refused before any block is
#: allocated (a block holds block_size x channels float64 values: 256 channels of 65536 samples
#: are 128 MiB)
# common practice, no source: scopes have 2-8 inputs, sound-card interfaces a few dozen, logic
# analyzers up to a few hundred
MAX_CHANNELS = 256


def check_channel_count(shown: str, n: int, where: str = "the file") -> int:
    """``n`` when it is a channel count toothcomb reads (1..:data:`MAX_CHANNELS`), else
    :class:`CaptureError` naming ``where`` the count came from.

    >>> try:
    ...     check_channel_count("wide.csv", 20000, "the header")
    ... except CaptureError as e:
    ...     print(e)
    wide.csv: the header announces 20000 channels; toothcomb reads at most 256, so export only the crank and cam channels
    """  # noqa: E501
    if n < 1:
        raise CaptureError(f"{shown}: {where} announces {n} channels; a capture needs at least one")
    if n > MAX_CHANNELS:
        raise CaptureError(
            f"{shown}: {where} announces {n} channels; toothcomb reads at most {MAX_CHANNELS}, "
            "so export only the crank and cam channels"
        )
    return n


def split_dataset_path(path: str) -> tuple[str, str | None]:
    """Split ``file.h5:/group/dataset`` into the file and the path inside it.

    The split is on the last ``:`` and only when the part before it is an existing file, so a
    plain path that contains ``:`` (or a Windows drive letter) is left whole.

    >>> split_dataset_path("C:\\\\data\\\\run.csv")
    ('C:\\\\data\\\\run.csv', None)
    """
    if os.path.isfile(path) or ":" not in path:
        return path, None
    head, _, tail = path.rpartition(":")
    if head and os.path.isfile(head):
        return head, tail
    return path, None


def check_block_size(block_size: object) -> int:
    """``block_size`` as a positive int, else :class:`UsageError`.

    >>> check_block_size(4096)
    4096
    """
    if isinstance(block_size, bool) or not isinstance(block_size, (int, np.integer)):
        raise UsageError(f"block size {block_size!r} is not an integer; give a whole number >= 1")
    if block_size < 1:
        raise UsageError(f"block size {block_size} is too small; give a whole number >= 1")
    return int(block_size)


def read_at(fd: int, size: int, offset: int) -> bytes:
    """Up to ``size`` bytes of file descriptor ``fd`` from byte ``offset`` (fewer only at the
    end of the file), by position: ``os.pread`` moves no file offset that a forked process
    shares. Where there is no ``pread`` (Windows; no worker is forked there) the descriptor is
    positioned and read.

    >>> import os, tempfile
    >>> fd, path = tempfile.mkstemp()
    >>> _ = os.write(fd, b"0123456789")
    >>> read_at(fd, 4, 3), read_at(fd, 4, 8), read_at(fd, 4, 20)
    (b'3456', b'89', b'')
    >>> os.close(fd)
    """
    pread = getattr(os, "pread", None)
    if pread is not None:
        return pread(fd, size, offset)
    os.lseek(fd, offset, os.SEEK_SET)
    parts = []
    while size > 0:
        got = os.read(fd, size)
        if not got:
            break
        parts.append(got)
        size -= len(got)
    return b"".join(parts)


def check_block_start(start: int, block_size: int, n_samples: int) -> None:
    """A pass that starts at sample ``start`` must start at a block boundary inside the capture
    (or at its end), else :class:`ValueError`.

    >>> check_block_start(8192, 4096, 10_000)
    >>> check_block_start(4000, 4096, 10_000)
    Traceback (most recent call last):
    ValueError: start 4000 is not a block boundary inside the capture
    """
    if not 0 <= start <= n_samples or (start % block_size and start != n_samples):
        raise ValueError(f"start {start} is not a block boundary inside the capture")


#: sample rates toothcomb takes, Hz: from one sample in 1000 s to 100 GS/s, the fastest
#: real-time oscilloscopes; a rate outside is a broken header, not a recording
# common practice, no source
MIN_SAMPLE_RATE = 1e-3
MAX_SAMPLE_RATE = 1e11


def check_sample_rate(value: object, what: str = "sample rate") -> float | None:
    """``value`` as a positive finite float (None stays None), else :class:`UsageError`.

    >>> check_sample_rate("48000")
    48000.0
    """
    if value is None:
        return None
    try:
        rate = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise UsageError(f"{what} {value!r} is not a number; give it in Hz, e.g. 48000") from None
    if not math.isfinite(rate) or rate <= 0:
        raise UsageError(f"{what} {value!r} must be a positive number of Hz, e.g. 48000")
    if not MIN_SAMPLE_RATE <= rate <= MAX_SAMPLE_RATE:
        raise UsageError(
            f"{what} {value!r} Hz is outside {MIN_SAMPLE_RATE:g} to {MAX_SAMPLE_RATE:g} Hz; give "
            "the rate the capture was taken at, e.g. 48000"
        )
    return rate


def check_file_rate(shown: str, rate: float, where: str = "the file") -> float:
    """``rate`` when it is a sample rate a recorder could have used, else :class:`CaptureError`
    (a header or metadata line that gives 1e300 Hz would otherwise overflow the front ends).

    >>> try:
    ...     check_file_rate("scope.csv", 1e300)
    ... except CaptureError as e:
    ...     print(e)
    scope.csv: the file gives a sample rate of 1e+300 Hz, outside 0.001 to 1e+11 Hz; fix it or pass --sample-rate
    """  # noqa: E501
    if not (math.isfinite(rate) and MIN_SAMPLE_RATE <= rate <= MAX_SAMPLE_RATE):
        raise CaptureError(
            f"{shown}: {where} gives a sample rate of {rate:g} Hz, outside {MIN_SAMPLE_RATE:g} "
            f"to {MAX_SAMPLE_RATE:g} Hz; fix it or pass --sample-rate"
        )
    return rate


def reject_options(reader: str, options: Mapping[str, Any]) -> None:
    """Raise :class:`UsageError` if ``options`` holds anything (a reader's leftovers)."""
    if options:
        names = ", ".join(sorted(options))
        raise UsageError(f"the {reader} reader does not take the option(s) {names}")


def rebuffer(pieces: Iterable[np.ndarray], block_size: int, start: int = 0) -> Iterator[Block]:
    """Cut consecutive 2-D sample arrays of any lengths into blocks of ``block_size`` rows.

    >>> import numpy as np
    >>> [b.data.shape[0] for b in rebuffer([np.zeros((5, 1)), np.zeros((4, 1))], 3)]
    [3, 3, 3]
    """
    pending: list[np.ndarray] = []
    have = 0
    pos = start
    for piece in pieces:
        i = 0
        n = piece.shape[0]
        while i < n:
            if not pending and n - i >= block_size:
                # as it comes: a reader may hand over channel-major (column-contiguous) data
                yield Block(pos, np.asarray(piece[i : i + block_size], dtype=np.float64))
                i += block_size
                pos += block_size
                continue
            take = min(block_size - have, n - i)
            pending.append(piece[i : i + take])
            have += take
            i += take
            if have == block_size:
                yield Block(pos, np.concatenate(pending).astype(np.float64, copy=False))
                pos += block_size
                pending, have = [], 0
    if have:
        yield Block(pos, np.concatenate(pending).astype(np.float64, copy=False))


class SourceBase:
    """Base of the built-in capture sources: context manager, idempotent close, block checks.

    Subclasses set :attr:`info` and implement :meth:`_pieces` (and :meth:`_close` when they hold
    a file open).
    """

    info: CaptureInfo

    def __init__(self, info: CaptureInfo) -> None:
        self.info = info
        self._closed = False

    @property
    def closed(self) -> bool:
        """True once :meth:`close` was called."""
        return self._closed

    def blocks(self, block_size: int = DEFAULT_BLOCK_SIZE) -> Iterator[Block]:
        """Yield ``Block(start, data)`` from the first sample to the last; data is float64 of
        shape (n, n_channels), n = ``block_size`` except for the last block. Each call starts
        over at sample 0."""
        size = check_block_size(block_size)
        self._check_open()
        return self._blocks(size)

    def _blocks(self, block_size: int) -> Iterator[Block]:
        got = 0
        pieces = self._pieces(block_size)
        try:
            for block in rebuffer(pieces, block_size):
                got = block.stop
                yield block
        except OSError as exc:
            # the file went away, lost its permissions or hit a disk error while being read
            raise CaptureError(
                f"{self.info.path}: reading stopped after {got} of {self.info.n_samples} samples "
                f"({exc.strerror or exc}); check the file and read it again"
            ) from None
        finally:
            close = getattr(pieces, "close", None)
            if close is not None:
                close()
        if got != self.info.n_samples:
            raise CaptureError(
                f"{self.info.path}: read {got} samples but the file announced "
                f"{self.info.n_samples}; it may have changed since it was opened"
            )

    def _pieces(self, block_size: int) -> Iterator[np.ndarray]:
        """Consecutive 2-D float arrays covering the whole capture (lengths are free)."""
        raise NotImplementedError

    def _check_open(self) -> None:
        if self._closed:
            raise CaptureError(f"{self.info.path} was closed; open it again with open_capture()")

    def _block_starts(self, block_size: int, start: int) -> range:
        """The first sample of each block a pass from ``start`` gives (``start`` a block
        boundary, or the end), once the size, the start and the source are checked: what a
        reader that reads by position goes through in ``blocks_from``."""
        size = check_block_size(block_size)
        self._check_open()
        check_block_start(start, size, self.info.n_samples)
        return range(start, self.info.n_samples, size)

    def close(self) -> None:
        """Release the file. Calling it again does nothing."""
        if not self._closed:
            self._closed = True
            self._close()

    def _close(self) -> None:
        """Release what the subclass holds open."""

    def __enter__(self) -> SourceBase:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        i = self.info
        state = "closed" if self._closed else "open"
        return (
            f"<{type(self).__name__} {i.path!r} {i.format} {i.sample_rate:g} Hz "
            f"{i.n_samples} samples x {i.n_channels} channels, {state}>"
        )


@dataclass(frozen=True)
class ClockFit:
    """The fixed sample interval a column of time stamps was found to follow."""

    #: samples per second (1 / interval)
    sample_rate: float
    #: the first time stamp
    t0: float
    #: number of time stamps
    n: int
    #: the coarsest resolution the stamps were printed with, seconds (0 when exact)
    resolution: float
    #: how far off ``sample_rate`` may be, Hz, from the print resolution over the whole span
    uncertainty: float = 0.0


@dataclass(frozen=True)
class ClockStep:
    """A step between two time stamps that breaks the fixed interval."""

    #: 0-based index of the stamp that ends the step
    index: int
    #: its time stamp
    time: float
    #: the step that ends at it
    step: float
    #: the interval the other stamps follow
    interval: float


class IrregularClock(Exception):
    """Raised by :meth:`RegularClock.finish`; the reader turns it into its own message."""

    def __init__(self, step: ClockStep) -> None:
        super().__init__(step)
        self.step = step


class NotIncreasing(Exception):
    """Raised by :meth:`RegularClock.finish` when the stamps do not increase overall."""


class RegularClock:
    """Streaming check that time stamps follow ``t0 + i * dt`` with one fixed ``dt``.

    Feed the stamps in order, in pieces. The reference interval is the median step of the first
    piece (robust to a gap or a repeated stamp in it); every step must lie within ``tolerance``
    (1 %) of it, plus the resolution the stamps were printed with (so rounded stamps are not
    taken for a jittery clock). The first step that does not raises :class:`IrregularClock`.
    :meth:`finish` then fits a straight line through all stamps for the rate. Memory stays
    constant whatever the number of stamps.

    >>> import numpy as np
    >>> clock = RegularClock(resolution=1e-6)
    >>> clock.feed(np.round(np.arange(1000) / 48000, 6))
    >>> fit = clock.finish()
    >>> fit.sample_rate, fit.n
    (48000.0, 1000)
    """

    def __init__(self, resolution: float = 0.0, tolerance: float = 0.01) -> None:
        self.resolution = float(resolution)
        self.tolerance = float(tolerance)
        self._n = 0
        self._first = math.nan
        self._last = math.nan
        self._abs_max = 0.0
        self._ref: float | None = None
        # sums for the least-squares line of (t - first) against the index
        self._s_t = 0.0
        self._s_it = 0.0

    def feed(self, t: np.ndarray) -> None:
        """Add the next time stamps (1-D)."""
        t = np.asarray(t, dtype=np.float64).ravel()
        if t.size == 0:
            return
        if not np.all(np.isfinite(t)):
            bad = int(np.flatnonzero(~np.isfinite(t))[0])
            raise IrregularClock(ClockStep(self._n + bad, float(t[bad]), math.nan, math.nan))
        if self._n == 0:
            self._first = float(t[0])
            steps = np.diff(t)
            ends = t[1:]
        else:
            steps = np.diff(t, prepend=self._last)
            ends = t
        offset = self._n + t.size - steps.size
        self._abs_max = max(self._abs_max, float(np.max(np.abs(t))))
        if steps.size:
            if self._ref is None:
                self._ref = float(np.median(steps))
                if not self._ref > 0:
                    raise NotIncreasing(f"median step {self._ref!r}")
            ref = self._ref
            slack = self._slack(ref)
            off = np.flatnonzero(np.abs(steps - ref) > slack)
            if off.size:
                k = int(off[0])
                raise IrregularClock(ClockStep(offset + k, float(ends[k]), float(steps[k]), ref))
        tt = t - self._first
        idx = np.arange(self._n, self._n + t.size, dtype=np.float64)
        self._s_t += float(np.sum(tt))
        self._s_it += float(np.dot(idx, tt))
        self._n += t.size
        self._last = float(t[-1])

    def _slack(self, dt: float) -> float:
        eps = np.finfo(np.float64).eps
        return self.tolerance * abs(dt) + self.resolution + 8 * eps * max(self._abs_max, abs(dt))

    @property
    def n(self) -> int:
        """Stamps fed so far."""
        return self._n

    def finish(self) -> ClockFit:
        """Fit the interval through all stamps; :class:`NotIncreasing` when it cannot."""
        n = self._n
        if n < 2:
            raise NotIncreasing("fewer than two time stamps")
        mean_i = (n - 1) / 2.0
        var_i = (n * n - 1) / 12.0
        cov = self._s_it / n - mean_i * (self._s_t / n)
        dt = cov / var_i
        if not dt > 0:
            raise NotIncreasing(f"fitted interval {dt!r}")
        rate = 1.0 / dt
        # a rate that is a whole number of Hz within the uncertainty of the fit is that number
        span = self._last - self._first
        eps = np.finfo(np.float64).eps
        uncertainty = rate * (self.resolution + 8 * eps * self._abs_max) / span
        return ClockFit(tidy_rate(rate, uncertainty), self._first, n, self.resolution, uncertainty)


def tidy_rate(rate: float, uncertainty: float = 0.0) -> float:
    """``rate`` with the fewest significant digits that stay within ``uncertainty`` of it.

    The move is at most 1 ppm of the rate (negligible for any timing toothcomb measures) and at
    least 1e-9 of it, so float noise such as ``1 / 20e-6 = 50000.00000000001`` goes away while a
    real odd rate stays as it is.

    >>> tidy_rate(1 / 20e-6), tidy_rate(1 / 2.0000000000000004), tidy_rate(44100.4)
    (50000.0, 0.5, 44100.4)
    >>> tidy_rate(48000.77, uncertainty=2.3)
    48000.8
    """
    if not (math.isfinite(rate) and rate > 0):
        return rate
    allowed = max(min(uncertainty, 1e-6 * rate), 1e-9 * rate)
    for digits in range(1, 18):
        cand = float(f"{rate:.{digits}g}")
        if abs(cand - rate) <= allowed:
            return cand
    return rate


def number_resolution(text: str) -> float:
    """The step of the last printed digit of a number, in its own units.

    >>> number_resolution("0.000020833"), number_resolution("2.08e-05"), number_resolution("12")
    (1e-09, 1e-07, 1.0)
    """
    s = text.strip().strip('"').lower().replace(",", ".")
    mant, _, exp = s.partition("e")
    try:
        e = int(exp) if exp else 0
    except ValueError:
        return 0.0
    _, dot, dec = mant.partition(".")
    digits = len(dec) if dot else 0
    return float(f"1e{e - digits}")
