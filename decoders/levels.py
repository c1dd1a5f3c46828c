"""The level-statistics pass: one streaming read of a capture that measures every channel.

Front ends place their thresholds from these figures and ``describe`` prints them. For each
channel:

- ``n``, ``minimum``, ``maximum``, ``mean``, ``std`` (population, ddof 0): exact, over the finite
  samples; blocks are combined with the pairwise update of Chan, Golub & LeVeque (1979), which
  stays accurate on long captures with a large offset;
- ``percentiles`` at :attr:`ChannelLevels.POINTS`: from a deterministic subsample, every k-th
  sample by its index in the capture, ``k = max(1, ceil(n_samples / 2**18))``;
- ``noise``: the median of ``|x[i] - x[i-1]|`` over the subsample positions, divided by
  ``0.6745 * sqrt(2)`` (for white Gaussian noise this is its standard deviation);
- ``clipped_fraction``: the share of samples that sit exactly at the channel's minimum or maximum,
  counting each end only when at least 0.1 % of the samples sit there (a flat top), else 0.0;
- ``non_finite`` and ``first_non_finite``: NaN and infinite samples are counted and skipped.

Samples are regrouped into fixed cells of :data:`CELL` samples by their index in the capture, so
every figure is bit-for-bit the same whatever block size the source is read with.

A decode needs the levels only to place its thresholds, and a full pass would cost as much as
reading the capture again. :func:`estimate_levels` therefore takes them, for a long capture whose
reader can read at any position, from :data:`WINDOWS` short windows spread evenly over it (the
same number of samples as the percentile subsample); :class:`FiniteWatch` then catches NaN and
infinite samples block by block during the decode instead. The windows of 8- and 16-bit samples
are counted by code rather than sorted (:func:`coded_percentiles`, :func:`coded_median`): the
same figures to the last bit, in a third of the time.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from .errors import SignalError
from .model import DEFAULT_BLOCK_SIZE, CaptureSource, ChannelLevels

__all__ = [
    "CELL",
    "SUBSAMPLE_TARGET",
    "FiniteWatch",
    "check_finite",
    "estimate_levels",
    "measure_levels",
    "subsample_step",
    "window_starts",
]

#: samples per internal cell (cells start at multiples of this capture index)
CELL = 1 << 16
#: the subsample for percentiles and noise holds at most about this many samples
SUBSAMPLE_TARGET = 1 << 18
#: an extreme value counts as clipping when at least this share of the samples sit at it
CLIP_SHARE = 1e-3
#: median absolute deviation of a standard normal (0.6745) times sqrt(2) for a difference of two
NOISE_DIVISOR = 0.6745 * math.sqrt(2.0)
#: captures longer than this many samples get spread-window levels (see :func:`estimate_levels`)
SPARSE_ABOVE = 1 << 19
#: windows of the spread estimate, and samples in each (2**18 in all; each window costs a seek,
#: so fewer longer ones)
WINDOWS = 256
WINDOW = 1024
#: integer sample formats (soundfile subtypes, numpy type names): no NaN or infinity possible
INTEGER_SUBTYPES = frozenset(
    {"PCM_S8", "PCM_U8", "PCM_16", "PCM_24", "PCM_32", "int8", "int16", "int32", "uint8", "uint16"}
)

Progress = Callable[[int, int], None]


def subsample_step(n_samples: int) -> int:
    """Every how many samples the percentile subsample takes one.

    >>> subsample_step(200_000), subsample_step(2**18 + 1), subsample_step(0)
    (1, 2, 1)
    """
    return max(1, math.ceil(n_samples / SUBSAMPLE_TARGET))


class _Accumulator:
    """Running figures of every channel; fed whole cells in capture order."""

    def __init__(self, n_channels: int, step: int) -> None:
        c = n_channels
        self.step = step
        self.n = np.zeros(c, dtype=np.int64)
        self.mean = np.zeros(c)
        self.m2 = np.zeros(c)
        self.lo = np.full(c, np.inf)
        self.hi = np.full(c, -np.inf)
        self.n_lo = np.zeros(c, dtype=np.int64)
        self.n_hi = np.zeros(c, dtype=np.int64)
        self.bad = np.zeros(c, dtype=np.int64)
        self.first_bad = np.full(c, -1, dtype=np.int64)
        self.sub: list[np.ndarray] = []
        self.diffs: list[np.ndarray] = []
        self.prev: np.ndarray | None = None

    def cell(self, start: int, data: np.ndarray) -> None:
        """Add samples ``data`` (n, c) whose first one is capture sample ``start``."""
        xt = np.ascontiguousarray(data.T)  # channels as rows: sums along rows are pairwise
        finite = np.isfinite(xt)
        all_finite = bool(finite.all())
        m = xt.shape[1]
        if all_finite:
            cnt = np.full(xt.shape[0], m, dtype=np.int64)
            mean_b = xt.sum(axis=1) / m
            dev = xt - mean_b[:, None]
            m2_b = (dev * dev).sum(axis=1)
            lo_b = xt.min(axis=1)
            hi_b = xt.max(axis=1)
        else:
            cnt = finite.sum(axis=1)
            nbad = m - cnt
            for j in np.flatnonzero((nbad > 0) & (self.first_bad < 0)):
                self.first_bad[j] = start + int(np.argmin(finite[j]))
            self.bad += nbad
            safe = np.maximum(cnt, 1)
            mean_b = np.where(finite, xt, 0.0).sum(axis=1) / safe
            dev = np.where(finite, xt - mean_b[:, None], 0.0)
            m2_b = (dev * dev).sum(axis=1)
            lo_b = np.where(finite, xt, np.inf).min(axis=1)
            hi_b = np.where(finite, xt, -np.inf).max(axis=1)
        if all_finite:
            n_lo_b = (xt == lo_b[:, None]).sum(axis=1)
            n_hi_b = (xt == hi_b[:, None]).sum(axis=1)
        else:
            n_lo_b = ((xt == lo_b[:, None]) & finite).sum(axis=1)
            n_hi_b = ((xt == hi_b[:, None]) & finite).sum(axis=1)
        self._combine(cnt, mean_b, m2_b)
        self._extremes(lo_b, n_lo_b, hi_b, n_hi_b)
        self._subsample(start, data)

    def _combine(self, n_b: np.ndarray, mean_b: np.ndarray, m2_b: np.ndarray) -> None:
        # Chan, Golub & LeVeque (1979), pairwise update of mean and sum of squared deviations
        n_a = self.n
        n = n_a + n_b
        has = n > 0
        safe = np.where(has, n, 1)
        delta = mean_b - self.mean
        frac = np.where(has, n_b / safe, 0.0)
        mean = self.mean + delta * frac
        m2 = self.m2 + m2_b + delta * delta * (n_a * frac)
        take = n_b > 0
        self.mean = np.where(take, mean, self.mean)
        self.m2 = np.where(take, m2, self.m2)
        self.n = n

    def _extremes(
        self, lo_b: np.ndarray, n_lo_b: np.ndarray, hi_b: np.ndarray, n_hi_b: np.ndarray
    ) -> None:
        same_lo = np.where(lo_b == self.lo, self.n_lo + n_lo_b, self.n_lo)
        self.n_lo = np.where(lo_b < self.lo, n_lo_b, same_lo)
        self.lo = np.minimum(self.lo, lo_b)
        same_hi = np.where(hi_b == self.hi, self.n_hi + n_hi_b, self.n_hi)
        self.n_hi = np.where(hi_b > self.hi, n_hi_b, same_hi)
        self.hi = np.maximum(self.hi, hi_b)

    def _subsample(self, start: int, data: np.ndarray) -> None:
        """Every ``step``-th sample by capture index, and its difference from the one before."""
        first = (-start) % self.step
        taken = data[first :: self.step]
        if len(taken):
            self.sub.append(taken.copy())
            before = np.empty(taken.shape)
            if first >= 1:
                before[:] = data[first - 1 :: self.step][: len(taken)]
            else:
                before[0] = self.prev if self.prev is not None else np.nan
                before[1:] = data[self.step - 1 :: self.step][: len(taken) - 1]
            with np.errstate(invalid="ignore"):
                self.diffs.append(np.abs(np.subtract(taken, before, out=before), out=before))
        self.prev = data[-1].copy()

    def result(self, names: tuple[str, ...]) -> tuple[ChannelLevels, ...]:
        points = ChannelLevels.POINTS
        c = len(names)
        sub = np.concatenate(self.sub) if self.sub else np.empty((0, c))
        diffs = np.concatenate(self.diffs) if self.diffs else np.empty((0, c))
        out = []
        for j, name in enumerate(names):
            n = int(self.n[j])
            v = sub[:, j]
            v = v[np.isfinite(v)]
            d = diffs[:, j]
            d = d[np.isfinite(d)]
            if n == 0:
                lo = hi = mean = std = math.nan
                clipped = 0.0
            else:
                lo, hi = float(self.lo[j]), float(self.hi[j])
                mean = float(self.mean[j])
                std = math.sqrt(max(float(self.m2[j]), 0.0) / n)
                if lo == hi:  # a constant channel: exact, without rounding residue
                    mean, std = lo, 0.0
                need = CLIP_SHARE * n
                at_lo = int(self.n_lo[j]) if self.n_lo[j] >= need else 0
                at_hi = int(self.n_hi[j]) if self.n_hi[j] >= need else 0
                clipped = (at_lo if lo == hi else at_lo + at_hi) / n
            if v.size:
                pct = tuple(float(p) for p in np.percentile(v, points))
            else:
                pct = (math.nan,) * len(points)
            noise = float(np.median(d)) / NOISE_DIVISOR if d.size else math.nan
            first_bad = int(self.first_bad[j])
            out.append(
                ChannelLevels(
                    name=name,
                    n=n,
                    minimum=lo,
                    maximum=hi,
                    mean=mean,
                    std=std,
                    percentiles=pct,
                    noise=noise,
                    clipped_fraction=clipped,
                    non_finite=int(self.bad[j]),
                    subsample=int(v.size),
                    first_non_finite=first_bad if first_bad >= 0 else None,
                )
            )
        return tuple(out)


def measure_levels(
    source: CaptureSource,
    block_size: int = DEFAULT_BLOCK_SIZE,
    progress: Progress | None = None,
) -> tuple[ChannelLevels, ...]:
    """Measure every channel of ``source`` in one streaming pass (see the module docstring).

    ``n`` is the number of finite samples the statistics were taken over; ``non_finite`` counts
    the others. ``progress(done, total)`` is called after each block with samples read so far.
    The result does not depend on ``block_size``.

    >>> import numpy as np, os, tempfile
    >>> from toothcomb.decoders.readers import open_capture
    >>> from toothcomb.decoders.readers.write import write_capture
    >>> path = os.path.join(tempfile.mkdtemp(), "square.h5")
    >>> square = np.where(np.arange(10_000) % 100 < 50, 0.5, 4.5)[:, None]
    >>> write_capture(path, square, 10_000.0, ["crank"])
    >>> with open_capture(path) as src:
    ...     (lv,) = measure_levels(src, block_size=3000)
    >>> lv.minimum, lv.maximum, lv.mean, lv.std, lv.percentile(50), lv.clipped_fraction
    (0.5, 4.5, 2.5, 2.0, 2.5, 1.0)
    """
    info = source.info
    c = info.n_channels
    acc = _Accumulator(c, subsample_step(info.n_samples))
    total = info.n_samples
    pending: list[np.ndarray] = []
    have = 0
    cell_start = 0
    for block in source.blocks(block_size):
        data = np.asarray(block.data, dtype=np.float64)
        if data.ndim != 2 or data.shape[1] != c:
            raise SignalError(
                f"{info.path}: a block of shape {data.shape} does not fit {c} channel(s); the "
                "reader is broken"
            )
        i = 0
        n = data.shape[0]
        while i < n:
            take = min(CELL - have, n - i)
            pending.append(data[i : i + take])
            have += take
            i += take
            if have == CELL:
                cell = pending[0] if len(pending) == 1 else np.concatenate(pending)
                acc.cell(cell_start, cell)
                cell_start += CELL
                pending, have = [], 0
        if progress is not None:
            progress(block.stop, total)
    if have:
        acc.cell(cell_start, pending[0] if len(pending) == 1 else np.concatenate(pending))
    return acc.result(info.channels)


def check_finite(levels: tuple[ChannelLevels, ...], sample_rate: float | None = None) -> None:
    """Raise :class:`SignalError` when a channel holds NaN or infinite samples.

    >>> from toothcomb.decoders.model import ChannelLevels
    >>> bad = ChannelLevels("ch1", 988, 0.0, 1.0, 0.5, 0.1, (0.5,) * 9, 0.01, 0.0,
    ...                     non_finite=12, first_non_finite=345)
    >>> try:
    ...     check_finite((bad,), sample_rate=48000)
    ... except SignalError as e:
    ...     print(e)
    channel 'ch1' has 12 NaN or infinite samples (first at sample 345, t = 0.0071875 s); repair the capture or record it again
    """  # noqa: E501
    bad = [lv for lv in levels if lv.non_finite > 0]
    if not bad:
        return
    lv = bad[0]
    where = ""
    if lv.first_non_finite is not None:
        where = f" (first at sample {lv.first_non_finite}"
        if sample_rate:
            where += f", t = {lv.first_non_finite / sample_rate:.9g} s"
        where += ")"
    more = ""
    if len(bad) > 1:
        others = ", ".join(repr(b.name) for b in bad[1:])
        more = f", and so do {others}"
    raise SignalError(
        f"channel {lv.name!r} has {lv.non_finite} NaN or infinite samples{where}{more}; repair "
        "the capture or record it again"
    )


def window_starts(n_samples: int, windows: int = WINDOWS, length: int = WINDOW) -> np.ndarray:
    """First sample of each window of the spread estimate: evenly spread from the start of the
    capture to its end.

    >>> window_starts(10_000, windows=5, length=100).tolist()
    [0, 2475, 4950, 7425, 9900]
    """
    last = max(n_samples - length, 0)
    return np.unique(np.round(np.linspace(0, last, windows)).astype(np.int64))


#: value of one code of the samples read from 8- and 16-bit PCM files (any reader)
CODE = 2.0**-15
#: widest span of codes the counts of :func:`_coded` cover (16-bit samples, and a float 1.0)
MAX_CODES = 1 << 16


def _coded(v: np.ndarray) -> tuple[np.ndarray, int] | None:
    """``v`` as integer codes (``v == codes * CODE`` exactly) and the smallest, when every value
    is such a code and they span at most :data:`MAX_CODES` codes; else None."""
    c = v * (1.0 / CODE)  # exact: a power of two
    lo, hi = c.min(), c.max()
    if not (hi - lo <= MAX_CODES and -(2.0**31) <= lo and hi < 2.0**31):
        return None
    codes = c.astype(np.int32)
    if not np.array_equal(codes, c):
        return None
    return codes, int(lo)


def _order_stats(counts: np.ndarray, ranks: np.ndarray) -> np.ndarray:
    """The values of ranks ``ranks`` (0 = smallest) of the sample whose code ``k`` (from the
    smallest) appears ``counts[k]`` times, as offsets from the smallest code."""
    return np.searchsorted(np.cumsum(counts), ranks, side="right")


def coded_percentiles(counts: np.ndarray, lo: int, points: tuple[float, ...]) -> list[float]:
    """``numpy.percentile(v, points)`` (its default, linear method) of samples ``v`` given as
    counts of their codes (``counts[k]``: how many are ``(lo + k) * CODE``), to the last bit:
    the same ranks, the same interpolation, without sorting the samples.

    >>> v = np.array([3, -2, 7, 7, 0]) * CODE
    >>> counts = np.bincount((v / CODE).astype(int) + 2)
    >>> coded_percentiles(counts, -2, (0.1, 50, 99.9)) == np.percentile(v, (0.1, 50, 99.9)).tolist()
    True
    """
    # source: numpy.percentile, method "linear" (Hyndman & Fan 1996, definition 7): virtual
    # index (n - 1) q, its floor and the next rank, a + (b - a) t (b - (b - a)(1 - t) for
    # t >= 0.5), the top rank where the index reaches it
    n = int(counts.sum())
    q = np.asarray(points, dtype=np.float64) / 100
    virtual = (n - 1) * q
    below = np.floor(virtual)
    top = virtual >= n - 1
    first = np.where(top, n - 1, below).astype(np.intp)
    second = np.where(top, n - 1, first + 1)
    t = virtual - below
    a = (_order_stats(counts, first) + lo) * CODE
    b = (_order_stats(counts, second) + lo) * CODE
    span = b - a
    out = np.where(t >= 0.5, b - span * (1 - t), a + span * t)
    return [float(x) for x in out]


def coded_median(counts: np.ndarray) -> float:
    """``numpy.median`` of samples given as counts of the codes 0, 1, 2, ... (values
    ``k * CODE``), to the last bit: the middle one, or the mean of the two middle ones."""
    n = int(counts.sum())
    half = n // 2
    if n % 2:
        return float(_order_stats(counts, np.array([half]))[0] * CODE)
    a, b = _order_stats(counts, np.array([half - 1, half])) * CODE
    return float((a + b) / 2)


def estimate_levels(
    source: CaptureSource,
    block_size: int = DEFAULT_BLOCK_SIZE,
    progress: Progress | None = None,
    sparse_above: int | None = None,
) -> tuple[ChannelLevels, ...]:
    """Level statistics for a decode, without reading a long capture twice.

    A capture of at most ``sparse_above`` samples (default :data:`SPARSE_ABOVE`), or one whose
    source cannot read at any position (no ``read_windows(starts, length)`` method), is measured
    exactly (:func:`measure_levels`).
    Longer ones are estimated from :data:`WINDOWS` windows of :data:`WINDOW` samples spread evenly
    over the capture: every figure, minimum and maximum included, is that of the samples in the
    windows (``n`` and ``subsample`` count them), and the noise comes from the differences of
    neighbouring samples inside each window. The windows do not depend on the block size. When
    a window holds NaN or infinite samples, or cannot be read, the exact pass is made instead,
    so that its figures (and :func:`check_finite`'s sentence) name the first bad sample.

    >>> import numpy as np
    >>> class Source:                                  # a capture that can be read anywhere
    ...     def __init__(self, x):
    ...         self.x = x
    ...         self.info = type("Info", (), {"n_samples": len(x), "n_channels": 1,
    ...                                       "channels": ("crank",), "path": "memory",
    ...                                       "subtype": "float64"})
    ...     def read_windows(self, starts, length):
    ...         for s in starts:
    ...             yield self.x[s : s + length]
    >>> square = np.where(np.arange(1_000_000) % 100 < 50, 0.5, 4.5)[:, None]
    >>> (lv,) = estimate_levels(Source(square), sparse_above=100_000)
    >>> lv.n, lv.minimum, lv.maximum, lv.mean, lv.percentile(50)
    (262144, 0.5, 4.5, 2.5, 2.5)
    """
    info = source.info
    read = getattr(source, "read_windows", None)
    limit = SPARSE_ABOVE if sparse_above is None else sparse_above
    if read is None or info.n_samples <= limit:
        return measure_levels(source, block_size, progress)
    c = info.n_channels
    try:
        windows = read(window_starts(info.n_samples), WINDOW)
        parts = [np.asarray(w, dtype=np.float64) for w in windows]
    except Exception:  # the full pass reports what is wrong with the file, in its own words
        return measure_levels(source, block_size, progress)
    if not parts or any(p.ndim != 2 or p.shape[1] != c or p.shape[0] < 2 for p in parts):
        return measure_levels(source, block_size, progress)
    data = np.concatenate(parts)
    if not np.isfinite(data).all():
        return measure_levels(source, block_size, progress)
    lengths = {len(p) for p in parts}
    n = data.shape[0]
    # integer samples (never a NaN, nor a -0.0 that a count would make +0.0)
    pcm = info.subtype in INTEGER_SUBTYPES
    out = []
    for j, name in enumerate(info.channels):
        v = data[:, j]
        coded = _coded(v) if pcm else None  # 8- and 16-bit: codes counted instead of sorted
        # differences of neighbouring samples inside each window (none across a join), and
        # their median, worked out on a scratch copy of the channel's samples
        w = v if coded is None else coded[0]
        if len(lengths) == 1:
            d = np.diff(w.reshape(len(parts), -1), axis=1)
        else:
            inside = np.ones(n - 1, dtype=bool)
            inside[np.cumsum([len(p) for p in parts[:-1]], dtype=np.intp) - 1] = False
            d = np.compress(inside, np.diff(w))
        if coded is None:
            noise = float(np.median(np.abs(d, out=d), overwrite_input=True)) / NOISE_DIVISOR
            lo, hi = float(v.min()), float(v.max())
            percentiles = tuple(float(p) for p in np.percentile(v, ChannelLevels.POINTS))
            at_lo = int(np.count_nonzero(v == lo))
            at_hi = int(np.count_nonzero(v == hi))
        else:
            codes, low = coded
            noise = coded_median(np.bincount(np.abs(d, out=d).ravel())) / NOISE_DIVISOR
            counts = np.bincount(codes - low)
            lo, hi = low * CODE, (low + len(counts) - 1) * CODE
            percentiles = tuple(coded_percentiles(counts, low, ChannelLevels.POINTS))
            at_lo, at_hi = int(counts[0]), int(counts[-1])
        if lo == hi:
            mean, std = lo, 0.0
        else:
            mean, std = float(v.mean()), float(v.std())
        need = CLIP_SHARE * n
        at_lo = at_lo if at_lo >= need else 0
        at_hi = at_hi if at_hi >= need else 0
        out.append(
            ChannelLevels(
                name=name,
                n=n,
                minimum=lo,
                maximum=hi,
                mean=mean,
                std=std,
                percentiles=percentiles,
                noise=noise,
                clipped_fraction=(at_lo if lo == hi else at_lo + at_hi) / n,
                non_finite=0,
                subsample=n,
            )
        )
    if progress is not None:
        progress(info.n_samples, info.n_samples)
    return tuple(out)


class FiniteWatch:
    """Catches NaN and infinite samples while a capture streams through a decode.

    Levels estimated from windows (:func:`estimate_levels`) can miss a bad sample; this looks at
    every block (one sum of all its samples: NaN and infinity survive a sum) and, on the first
    bad block, makes the exact levels pass so that the :class:`SignalError` names the first bad
    sample and the count, as :func:`check_finite` does. Integer sample formats cannot hold such values and
    are not looked at.

    >>> import numpy as np
    >>> from toothcomb.decoders.model import CaptureInfo
    >>> class Source:
    ...     info = CaptureInfo("memory", 1000.0, 3, ("ch0",), "hdf5", "float64")
    ...     def blocks(self, block_size):
    ...         from toothcomb.decoders.model import Block
    ...         yield Block(0, np.array([[0.0], [np.nan], [1.0]]))
    >>> watch = FiniteWatch(Source(), 4096)
    >>> watch.check(np.zeros((5, 1)))
    >>> try:
    ...     watch.check(np.array([[0.0], [np.nan]]))
    ... except SignalError as e:
    ...     print(e)
    channel 'ch0' has 1 NaN or infinite samples (first at sample 1, t = 0.001 s); repair the capture or record it again
    """  # noqa: E501

    def __init__(self, source: CaptureSource, block_size: int, active: bool = True) -> None:
        self._source = source
        self._block_size = block_size
        #: False for integer sample formats (and when the levels were measured exactly)
        self.active = active and source.info.subtype not in INTEGER_SUBTYPES

    def check(self, data: np.ndarray) -> None:
        """Raise :class:`SignalError` when ``data`` (samples, channels) holds a bad sample."""
        if not self.active or data.size == 0:
            return
        with np.errstate(over="ignore", invalid="ignore"):
            # one sum over every sample, in memory order: a sum per channel down the rows of a
            # frame-major block (as most readers give them) takes some 35 times as long
            if np.isfinite(np.add.reduce(data, axis=None)):
                return
        if np.isfinite(data).all():  # the sum overflowed on large finite values
            return
        info = self._source.info
        check_finite(measure_levels(self._source, self._block_size), info.sample_rate)
        raise SignalError(  # the full pass found none: the block changed under us
            f"{info.path}: NaN or infinite samples appeared while reading; read it again"
        )
