"""What sensor front ends share: the streaming contract and sub-sample interpolation.

A front end turns the samples of one channel into :class:`~toothcomb.decoders.model.Edges`
with sub-sample timing. It is fed block by block (``process(samples, start)``) and keeps its own
state across calls, like ``scipy.signal.lfilter`` with ``zi``, so the edges do not depend on
where the blocks are cut; ``finish()`` flushes what is still pending at the end of the capture.

No front end filters the signal: edge times come straight from interpolating the samples, so no
filter delay can bias an angle.
"""

from __future__ import annotations

from typing import Any, NamedTuple, Protocol

import numpy as np

from ..model import ChannelLevels, Edges


class FrontEnd(Protocol):
    """The contract of a ``toothcomb.frontends`` plugin. A front end may also have a method
    ``before_fork(samples_left)``, which the decode calls just before the front end is handed
    to a worker process for the samples still to come (the VR front end imports there what the
    worker would otherwise import itself)."""

    name: str

    def __init__(self, sample_rate: float, levels: ChannelLevels, **options: Any) -> None: ...

    @classmethod
    def calibrate(
        cls, probe: np.ndarray, sample_rate: float, levels: ChannelLevels
    ) -> dict[str, Any]:
        """Settings for ``__init__`` worked out from the first part of the channel."""
        ...

    def process(self, samples: np.ndarray, start: int) -> Edges:
        """Edges completed by this block; ``start`` is the index of ``samples[0]``."""
        ...

    def finish(self) -> Edges:
        """Edges still pending at the end of the capture."""
        ...


#: offsets of the four samples a cubic crossing is fitted through, from the sample before it
NEIGHBOURS = np.arange(-1, 3)


#: bytes of samples a front end gathers before it searches them (see :class:`SampleFeed`): each
#: search costs a few dozen numpy calls whatever its length, so it runs on long stretches; the
#: bound keeps memory flat (2 MiB: 2**20 16-bit codes or 2**18 float64 samples per channel)
GATHER_BYTES = 1 << 21


#: what a call that completes no edge returns (one shared instance: it holds no samples)
NO_EDGES = Edges.empty()


class SampleFeed:
    """What a front end does with the samples it is given: floats as they are, or the integer
    codes of a PCM file with their scale (the same edges, to the last bit, without turning every
    sample into a float). Subclasses implement ``_process(samples, start, unit)`` and
    ``_finish()``.

    Blocks shorter than :attr:`gather` bytes are copied into one buffer and searched together
    once it is full (or at :meth:`finish`): the edges are the same whatever the blocks (each
    front end proves that), and a capture fed in small blocks costs no more per sample than one
    fed in long ones. ``gather = 0`` searches every block as it comes.
    """

    #: bytes of samples gathered before a search (class default :data:`GATHER_BYTES`)
    gather: int = GATHER_BYTES
    _gbuf: np.ndarray | None = None
    _gathered = 0
    _gathered_start = 0
    _gathered_unit = 1.0
    _joined = False
    _fed: tuple[str, float] | None = None  # kind of samples ("f" or "i") and their unit

    def _process(
        self, samples: np.ndarray, start: int, unit: float, joined: bool = False
    ) -> Edges:
        """Search ``samples`` (the first at index ``start``); with ``joined`` they already
        begin with the samples :meth:`_carry` gave (and ``start`` is that of the ones after)."""
        raise NotImplementedError

    def _finish(self) -> Edges:
        raise NotImplementedError

    def _carry(self) -> np.ndarray:
        """The samples kept from the last search, which the next one starts with."""
        return np.empty(0)

    def process(self, samples: np.ndarray, start: int) -> Edges:
        return self._feed(np.asarray(samples, dtype=float), start, 1.0)

    def process_codes(self, codes: np.ndarray, start: int, scale: float) -> Edges:
        """As :meth:`process`, for integer samples whose values are ``codes * scale``, ``scale``
        a power of two (the codes of a PCM file): every threshold is divided by ``scale``
        instead, which is exact."""
        codes = np.asarray(codes)
        if codes.dtype.kind not in "iu":
            raise TypeError(f"process_codes takes integer samples, not {codes.dtype}")
        return self._feed(codes, start, float(scale))

    def finish(self) -> Edges:
        """Edges still pending at the end of the capture."""
        held = self._flush()
        last = self._finish()
        return last if len(held) == 0 else Edges.concat([held, last])

    def release(self) -> Edges:
        """The edges that can be timed from the samples fed so far, now, rather than once the
        gathered samples or the work waiting for a batch fill up (what the rest of the capture
        then gives is unchanged: the work is timed in batches of any size). ``settled_s``, where
        a front end has it, tells how far the edges given are complete."""
        held = self._flush()
        more = self._release()
        return more if len(held) == 0 else Edges.concat([held, more])

    def _release(self) -> Edges:
        """Time the work waiting for a batch (none by default)."""
        return NO_EDGES

    def _feed(self, x: np.ndarray, start: int, unit: float) -> Edges:
        fed = ("i" if x.dtype.kind in "iu" else "f", unit)
        if self._fed is None:
            self._fed = fed
        elif fed != self._fed:
            raise ValueError("a front end is fed floats or codes of one scale, not both")
        room = self.gather // x.dtype.itemsize
        held = self._gbuf
        if self._gathered and (held.dtype != x.dtype or self._gathered + len(x) > room):
            out = self._flush()
            return Edges.concat([out, self._feed(x, start, unit)])
        if self._gathered == 0:
            if len(x) >= room or x.ndim != 1:
                return self._process(x, start, unit)
            # the samples the search keeps go first: the search then needs no copy of its own
            carry = self._carry()
            self._joined = carry.dtype == x.dtype or len(carry) == 0
            if not self._joined:
                carry = carry[:0]
            if held is None or held.dtype != x.dtype or len(held) < len(carry) + len(x):
                held = self._gbuf = np.empty(len(carry) + len(x), dtype=x.dtype)
            held[: len(carry)] = carry
            self._gathered = len(carry)
            self._gathered_start, self._gathered_unit = start, unit
        if self._gathered + len(x) > len(held):
            # grown as needed (a short capture never takes the whole room)
            grown = np.empty(min(room, max(2 * len(held), self._gathered + len(x))), x.dtype)
            grown[: self._gathered] = held[: self._gathered]
            held = self._gbuf = grown
        held[self._gathered : self._gathered + len(x)] = x
        self._gathered += len(x)
        if self._gathered < room:
            return NO_EDGES
        return self._flush()

    def _flush(self) -> Edges:
        """Search the samples gathered so far."""
        if self._gbuf is None or self._gathered == 0:
            return NO_EDGES
        n, self._gathered = self._gathered, 0
        # the buffer is filled again afterwards: _process keeps copies, never views
        return self._process(
            self._gbuf[:n], self._gathered_start, self._gathered_unit, joined=self._joined
        )


def cubic_crossing(y: np.ndarray, k: np.ndarray, level: float | np.ndarray) -> np.ndarray:
    """Fraction of a sample, after ``k``, where the samples cross ``level`` (0 <= f <= 1).

    Fits the cubic through ``y[k-1], y[k], y[k+1], y[k+2]`` (Lagrange form) and finds its root in
    [0, 1] by Newton iterations started from the linear estimate. Where a neighbour is missing
    (``k - 1 < 0`` or ``k + 2 >= len(y)``) or the cubic misbehaves, the linear estimate is kept.
    The crossing lies at ``k + fraction``; the fraction is returned on its own so that adding
    a block's offset cannot round differently from block to block. ``y`` may hold integers
    (a converter's codes): only the samples used are turned into floats.

    >>> t = np.arange(8.0)
    >>> y = np.sin(2 * np.pi * (t - 2.3) / 16)   # rising zero crossing at 2.3
    >>> round(float(cubic_crossing(y, np.array([2]), 0.0)[0]), 3)
    0.3
    """
    y = np.asarray(y)
    k = np.asarray(k, dtype=np.intp)
    near = np.clip(k[None, :] + NEIGHBOURS[:, None], 0, max(len(y) - 1, 0))
    lev = float(level) if np.ndim(level) == 0 else np.broadcast_to(level, k.shape)
    return cubic_fraction(y[near] - lev, (k - 1 >= 0) & (k + 2 < len(y)))


def cubic_fraction(near: np.ndarray, ok: np.ndarray) -> np.ndarray:
    """The crossing fraction of :func:`cubic_crossing` from the four samples around each
    crossing, less the level: ``near`` has rows y[k-1], y[k], y[k+1], y[k+2]; where ``ok`` is
    False the first or last of them is not a real neighbour and the linear estimate is kept.

    >>> y = np.sin(2 * np.pi * (np.arange(1.0, 5.0) - 2.3) / 16)[:, None]
    >>> round(float(cubic_fraction(y, np.array([True]))[0]), 3)
    0.3
    """
    y0, y1, y2, y3 = near
    denom = y2 - y1
    with np.errstate(divide="ignore", invalid="ignore"):
        lin = np.where(denom != 0, -y1 / denom, 0.5)
    lin = np.minimum(np.maximum(lin, 0.0), 1.0)
    if not np.any(ok):
        return lin
    # Cubic through (-1, y0), (0, y1), (1, y2), (2, y3): p(s) = a + b s + c s^2 + d s^3
    a = y1
    b = -y0 / 3 - y1 / 2 + y2 - y3 / 6
    c = y0 / 2 - y1 + y2 / 2
    d = -y0 / 6 + y1 / 2 - y2 / 2 + y3 / 6
    s = lin.copy()
    c2 = 2 * c
    with np.errstate(divide="ignore", invalid="ignore"):
        for _ in range(6):
            p = a + s * (b + s * (c + s * d))
            dp = b + s * (c2 + s * 3 * d)
            step = np.where(dp != 0, p / dp, 0.0)
            if not np.count_nonzero(step):
                break  # converged: further steps change nothing
            s = s - step
    good = ok & np.isfinite(s) & (s >= 0.0) & (s <= 1.0)
    return np.where(good, s, lin)


def linear_crossing(y: np.ndarray, k: np.ndarray, level: np.ndarray) -> np.ndarray:
    """Fraction of a sample after ``k`` where ``y`` crosses ``level`` (linear interpolation).

    >>> linear_crossing(np.array([0.0, 1.0, 3.0]), np.array([1]), np.array([2.0]))
    array([0.5])
    """
    y1 = np.asarray(y[k], dtype=float)  # integer codes: no wrap-around in the difference
    y2 = np.asarray(y[k + 1], dtype=float)
    denom = y2 - y1
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(denom != 0, (level - y1) / denom, 0.5)
    return np.clip(frac, 0.0, 1.0)


def despike(x: np.ndarray, size: int) -> np.ndarray:
    """Centred running median of ``size`` samples (odd; 1 returns ``x`` unchanged).

    Removes impulses up to ``size // 2`` samples long (ignition spikes) while leaving any
    monotone stretch of ``size`` samples exactly as it was: the median of a monotone run is its
    middle sample. A flank or a zero crossing is monotone around its own time, so its
    interpolated time does not move, and the filter is centred, so it delays nothing. The first
    and last ``size // 2`` samples are copied, not filtered; callers do not decide anything on
    them.

    >>> despike(np.array([0.0, 0, 9, 0, 0, 1, 2, 3, 4, 5]), 3).tolist()
    [0.0, 0.0, 0.0, 0.0, 0.0, 1.0, 2.0, 3.0, 4.0, 5.0]
    """
    if size <= 1 or len(x) < size:
        return x
    half = size // 2
    if size in (3, 5) and not (x.dtype.kind == "f" and np.isnan(x).any()):
        out = np.empty_like(x)
        _median_network(x, size, out[half : len(x) - half])
    else:  # imported here: scipy.ndimage costs 0.2 s to import, and few decodes come here
        from scipy.ndimage import median_filter

        out = median_filter(x, size=size, mode="nearest")
    out[:half] = x[:half]
    out[len(x) - half :] = x[len(x) - half :]
    return out


def _median_network(x: np.ndarray, size: int, out: np.ndarray | None = None) -> np.ndarray:
    """Median of every ``size`` consecutive samples (3 or 5), by a network of minima and
    maxima over shifted views: the value ``scipy.ndimage.median_filter`` gives (a median is one
    of the samples; NaN excepted, which has no order), several times faster. Written into
    ``out`` when given (``len(x) - size + 1`` samples).

    source: N. Devillard, "Fast median search: an ANSI C implementation" (1998), opt_med3 and
    opt_med5

    >>> _median_network(np.array([3, 1, 2, 9, 0, 5]), 3).tolist()
    [2, 2, 2, 5]
    """
    n = len(x) - size + 1
    v = [x[i : i + n] for i in range(size)]
    if out is None:
        out = np.empty(n, dtype=x.dtype)
    lo, hi = np.minimum, np.maximum
    # few scratch arrays, written in place: fresh memory costs more than the comparisons
    if size == 3:
        a, b, c = v
        t = lo(a, b)
        hi(a, b, out=out)
        lo(out, c, out=out)
        return hi(t, out, out=out)
    p0, p1, p2, p3, p4 = v
    # PIX_SORT(p0, p1); PIX_SORT(p3, p4); PIX_SORT(p0, p3); PIX_SORT(p1, p4);
    # PIX_SORT(p1, p2); PIX_SORT(p2, p3); PIX_SORT(p1, p2): the median is p2
    s0, s1 = lo(p0, p1), hi(p0, p1)
    s3 = lo(p3, p4)
    hi(p3, p4, out=out)  # p4
    hi(s0, s3, out=s3)  # p3 = max(p0, p3)
    lo(s1, out, out=s1)  # p1 = min(p1, p4)
    lo(s1, p2, out=s0)  # p1 = min(p1, p2)
    hi(s1, p2, out=s1)  # p2 = max(p1, p2)
    lo(s1, s3, out=s1)  # p2 = min(p2, p3)
    return hi(s0, s1, out=out)  # the median: max(p1, p2)


#: samples :func:`has_spikes` looks at a time
SPIKE_PIECE = 1 << 16


def has_spikes(x: np.ndarray, height: float) -> bool:
    """True when ``x`` holds impulses of at least ``height`` lasting one or two samples: samples
    that stand out from the running median of five around them.

    >>> x = np.zeros(100); x[40] = 3.0
    >>> has_spikes(x, 1.0), has_spikes(np.sin(np.arange(100) / 10), 1.0)
    (True, False)
    """
    x = np.asarray(x, dtype=float)
    if len(x) < 5 or not height > 0:
        return False
    if np.isnan(x).any():
        return bool(np.any(np.abs(x - despike(x, 5)) > height))
    # piece by piece (the first and last two samples are their own median), the first spike
    # ending the search. A sample more than ``height`` above the median of the five around it
    # is above at least three of its four neighbours by more, so above x[i - 1] or x[i + 1]
    # (likewise below): only samples next to a jump of more than ``height`` can stand out, and
    # only those few are compared with their median, unless jumps are many (then the running
    # median of the whole piece costs less)
    n = len(x)
    med = np.empty(min(SPIKE_PIECE, n - 4))
    for a in range(2, n - 2, SPIKE_PIECE):
        b = min(a + SPIKE_PIECE, n - 2)
        jump = np.abs(np.diff(x[a - 1 : b + 1])) > height  # jump[k]: samples a - 1 + k, a + k
        near = np.flatnonzero(jump[:-1] | jump[1:]) + a
        if len(near) == 0:
            continue
        if len(near) <= SPIKE_PIECE // 8:
            five = np.sort(x[near[:, None] + np.arange(-2, 3)], axis=1)[:, 2]
            if np.any(np.abs(x[near] - five) > height):
                return True
            continue
        m = _median_network(x[a - 2 : b + 2], 5, med[: b - a])
        np.subtract(x[a:b], m, out=m)
        if np.any(np.abs(m, out=m) > height):
            return True
    return False


#: samples a periodogram is taken over (the first ones)
PERIODOGRAM_SAMPLES = 1 << 18


class Periodogram(NamedTuple):
    """|X_k|^2 of the real FFT of a stretch of samples less their mean (bin 0 included), and
    how many samples were transformed."""

    power: np.ndarray
    n: int


def periodogram(x: np.ndarray, n_max: int = PERIODOGRAM_SAMPLES) -> Periodogram:
    """The periodogram of the first ``n_max`` samples of ``x``; several judgements of one
    probe (noise floor, spectral lines) share it.

    >>> p = periodogram(np.sin(2 * np.pi * np.arange(64) / 8))
    >>> p.n, int(np.argmax(p.power))
    (64, 8)
    """
    y = np.asarray(x, dtype=float)[:n_max]
    return Periodogram(np.abs(np.fft.rfft(y - y.mean())) ** 2, len(y))
