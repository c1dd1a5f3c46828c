"""What happens between the sensor and the file: noise, spikes, converters and filters.

Everything here is block-friendly: noise is drawn on a fixed grid of sample indices (pages of
``NOISE_PAGE`` samples, each from its own seeded stream), the AC coupling carries its filter
state, and the decimating FIR is applied to overlapping windows, so a capture generated block by
block equals one generated in one go.

>>> quantise_pcm(np.array([0.5, 1.5, -2.0, 1e-6]), 16).tolist()   # clipped at full scale
[0.5, 0.999969482421875, -1.0, 0.0]
>>> float(quantise_scope(np.array([0.02]), -5.0, 5.0, 8)[0])   # 8-bit steps of 10/256 V
0.0390625
"""

from __future__ import annotations

import math
from collections import OrderedDict

import numpy as np
from scipy import signal

#: samples per noise page (noise for any index range is cut from fixed pages)
NOISE_PAGE = 1 << 16
#: offset that keeps page numbers of negative indices (filter warm-up) non-negative
_PAGE_BIAS = 1 << 40


class NoisePages:
    """Standard normal noise indexed by global sample number, independent of block boundaries."""

    def __init__(self, seed: int, channel: int, stream: int) -> None:
        self._key = (int(seed), int(channel), int(stream))
        self._cache: OrderedDict[int, np.ndarray] = OrderedDict()

    def _page(self, p: int) -> np.ndarray:
        got = self._cache.get(p)
        if got is None:
            ss = np.random.SeedSequence([*self._key, p + _PAGE_BIAS])
            got = np.random.default_rng(ss).standard_normal(NOISE_PAGE)
            self._cache[p] = got
            while len(self._cache) > 4:
                self._cache.popitem(last=False)
        return got

    def normal(self, i0: int, i1: int) -> np.ndarray:
        """Noise samples for global indices i0 .. i1-1."""
        out = np.empty(max(0, i1 - i0))
        i = i0
        while i < i1:
            p = i // NOISE_PAGE
            k = i - p * NOISE_PAGE
            m = min(NOISE_PAGE - k, i1 - i)
            out[i - i0 : i - i0 + m] = self._page(p)[k : k + m]
            i += m
        return out


def exp_pulses(t: np.ndarray, times: np.ndarray, amplitude: float, tau: float) -> np.ndarray:
    """Sum of ``amplitude * exp(-(t - t_k)/tau)`` for every pulse time t_k <= t (sorted)."""
    t = np.asarray(t, dtype=float)
    out = np.zeros_like(t)
    n = times.size
    if n == 0:
        return out
    i = np.searchsorted(times, t, side="right") - 1
    for m in range(n):
        j = i - m
        ok = j >= 0
        if not np.any(ok):
            break
        e = np.exp(np.where(ok, (times[np.clip(j, 0, n - 1)] - t) / tau, -np.inf))
        if float(np.max(e)) < 1e-18:
            break
        out += amplitude * e
    return out


def quantise_scope(v: np.ndarray, lo: float, hi: float, bits: int) -> np.ndarray:
    """A b-bit converter over [lo, hi): codes 0 .. 2**bits - 1, step (hi - lo) / 2**bits,
    value ``lo + code * step`` (rounded to the nearest code, clipped at both ends)."""
    n = 1 << bits
    step = (hi - lo) / n
    code = np.clip(np.rint((v - lo) / step), 0, n - 1)
    return lo + code * step


def quantise_pcm(v: np.ndarray, bits: int) -> np.ndarray:
    """Clip at full scale (+-1.0) and quantise to signed ``bits``-bit PCM (code / 2**(bits-1))."""
    q = float(1 << (bits - 1))
    return np.clip(np.rint(v * q), -q, q - 1) / q


class AcCoupling:
    """First-order high-pass (series capacitor) with corner ``fc`` at sample rate ``fs``.

    Step-invariant discretisation of ``s / (s + 1/tau)``, ``tau = 1/(2*pi*fc)``:
    ``H(z) = (1 - z**-1) / (1 - p*z**-1)``, ``p = exp(-1/(fs*tau))``; a step of height A gives
    exactly ``A*exp(-t/tau)`` at the sample instants. The state is carried between blocks.
    """

    def __init__(self, fc: float, fs: float, n_channels: int) -> None:
        self.tau = 1.0 / (2.0 * math.pi * fc)
        p = math.exp(-1.0 / (fs * self.tau))
        self.b = np.array([1.0, -1.0])
        self.a = np.array([1.0, -p])
        self.zi: np.ndarray | None = None
        self.n_channels = n_channels

    def settle_samples(self, fs: float, residue: float = 1e-6) -> int:
        """Samples for a start-up transient to shrink to ``residue`` of its size."""
        return math.ceil(self.tau * math.log(1.0 / residue) * fs)

    def process(self, x: np.ndarray) -> np.ndarray:
        """Filter ``x`` of shape (n_channels, n) along its last axis, carrying the state."""
        if self.zi is None:
            # as if the input had stayed at its first value for ever (transposed direct form:
            # y[0] = x[0] + z, so z = -x[0] starts the output at 0 with no step)
            self.zi = -np.array(x[:, :1], dtype=float)
        y, self.zi = signal.lfilter(self.b, self.a, x, axis=-1, zi=self.zi)
        return y


def decimation_filter(factor: int) -> np.ndarray:
    """The anti-alias FIR that ``scipy.signal.resample_poly(x, 1, factor)`` uses by default:
    ``firwin(20*factor + 1, 1/factor, window=('kaiser', 5.0))``; linear phase, delay
    ``10*factor`` samples."""
    return signal.firwin(20 * factor + 1, 1.0 / factor, window=("kaiser", 5.0))


class Decimator:
    """Decimate by ``factor`` with a delay-compensated linear-phase FIR, block by block.

    Output sample ``n`` is ``sum_k h[k] * x[n*factor + D - k]`` (``D = 10*factor``), i.e. the
    filtered signal at input instant ``n*factor``: no delay. Feed consecutive input from index
    ``n0*factor - D`` onward; :meth:`output` returns what the input so far determines.
    """

    def __init__(self, factor: int) -> None:
        self.factor = factor
        self.h = decimation_filter(factor) if factor > 1 else np.array([1.0])
        self.delay = (self.h.size - 1) // 2

    def apply(self, x: np.ndarray, n_out: int) -> np.ndarray:
        """``x`` (channels, m) holds input from index ``n0*factor - D`` to at least
        ``(n0 + n_out - 1)*factor + D``; returns (channels, n_out)."""
        if self.factor == 1:
            return x[:, :n_out]
        y = signal.upfirdn(self.h, x, up=1, down=self.factor, axis=-1)
        s = 2 * self.delay // self.factor
        return y[:, s : s + n_out]
