"""What sensor front ends share: the streaming contract and sub-sample interpolation.

A front end turns the samples of one channel into :class:`~toothcomb.decoders.model.Edges`
with sub-sample timing. It is fed block by block (``process(samples, start)``) and keeps its own
state across calls, like ``scipy.signal.lfilter`` with ``zi``, so the edges do not depend on
where the blocks are cut; ``finish()`` flushes what is still pending at the end of the capture.

No front end filters the signal: edge times come straight from interpolating the samples, so no
filter delay can bias an angle.
"""

from __future__ import annotations

from typing import Any, Protocol

import numpy as np
from scipy.ndimage import median_filter

from ..model import ChannelLevels, Edges


class FrontEnd(Protocol):
    """The contract of a ``toothcomb.frontends`` plugin."""

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


class SampleFeed:
    """What a front end does with the samples it is given: floats as they are, or the integer
    codes of a PCM file with their scale (the same edges, to the last bit, without turning every
    sample into a float). Subclasses implement ``_process(samples, start, unit)``."""

    def _process(self, samples: np.ndarray, start: int, unit: float) -> Edges:
        raise NotImplementedError

    def process(self, samples: np.ndarray, start: int) -> Edges:
        return self._process(np.asarray(samples, dtype=float), start, 1.0)

    def process_codes(self, codes: np.ndarray, start: int, scale: float) -> Edges:
        """As :meth:`process`, for integer samples whose values are ``codes * scale``, ``scale``
        a power of two (the codes of a PCM file): every threshold is divided by ``scale``
        instead, which is exact."""
        codes = np.asarray(codes)
        if codes.dtype.kind not in "iu":
            raise TypeError(f"process_codes takes integer samples, not {codes.dtype}")
        return self._process(codes, start, float(scale))


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
    out = median_filter(x, size=size, mode="nearest")
    out[:half] = x[:half]
    out[len(x) - half :] = x[len(x) - half :]
    return out


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
    return bool(np.any(np.abs(x - despike(x, 5)) > height))
