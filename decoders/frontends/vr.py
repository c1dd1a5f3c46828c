"""Variable-reluctance (VR) sensor front end.

A VR sensor's voltage is proportional to the rate of change of the magnetic flux through its
coil (Faraday's law), so its amplitude grows roughly in proportion to speed, and at the centre of
a tooth, where the flux peaks, the voltage crosses zero. toothcomb times VR events on those zero
crossings, interpolated between samples with a cubic through the four samples around the
crossing.

Noise near zero must not count as a crossing, so a crossing is only accepted when the half-wave
that follows it is *significant*: its peak exceeds an arming threshold. The threshold follows the
signal's amplitude (a fraction of a running envelope of recent significant peaks, decaying when
the signal shrinks), with a floor set from the channel's noise. This is a Schmitt trigger whose
hysteresis adapts to speed, applied to the crossing that precedes each armed half-wave.

Both crossing directions are reported: which one is the tooth centre (the flux maximum) depends
on how the leads are wired and is worked out later from the gap signature of the wheel.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..model import ChannelLevels, Edges
from .base import cubic_crossing, despike, has_spikes


class VrFrontEnd:
    """Zero crossings of a VR signal with an amplitude-following arming threshold.

    >>> fs = 50000.0
    >>> t = np.arange(5000) / fs
    >>> x = np.sin(2 * np.pi * 100 * t + 0.3)             # 100 Hz, starts positive
    >>> lv = ChannelLevels("ch0", 5000, -1, 1, 0, 0.7, (-1, -1, -1, -.7, 0, .7, 1, 1, 1), 1e-3, 0)
    >>> fe = VrFrontEnd(fs, lv)
    >>> e = Edges.concat([fe.process(x, 0), fe.finish()])
    >>> int(e.direction[0]), round(float(e.times[0]) * 1e6, 2)   # falling at (pi - 0.3) / (200 pi)
    (-1, 4522.54)
    """

    name = "vr"

    def __init__(
        self,
        sample_rate: float,
        levels: ChannelLevels,
        *,
        offset: float | None = None,
        floor: float | None = None,
        fraction: float = 0.3,
        envelope: float | None = None,
        decay: float = 0.8,
        despike: int = 1,
    ) -> None:
        self.sample_rate = float(sample_rate)
        #: the signal's zero (a DC-coupled instrument may add an offset)
        self.offset = float(levels.mean if offset is None else offset)
        # common practice, no source: an arming level several noise sigmas above zero keeps
        # noise from re-triggering (calibrate() measures the noise far better than this)
        self.floor = float(floor) if floor is not None else max(5.0 * levels.noise, 1e-12)
        #: arming threshold as a fraction of the envelope
        self.fraction = float(fraction)
        half_span = 0.5 * (levels.percentile(99.9) - levels.percentile(0.1))
        self.envelope = float(envelope) if envelope is not None else max(half_span, self.floor)
        #: envelope factor per insignificant half-wave
        self.decay = float(decay)
        #: running-median length that removes spikes before detection (1: none)
        self.despike = int(despike) | 1
        self._half = self.despike // 2
        self._tail = np.empty(0)
        self._tail_start = 0
        self._next_k = 0  # first global crossing index not yet handled
        self._scanned = 0  # first global sample index not yet folded into a half-wave peak
        self._open_start: float | None = None  # crossing (samples) that began the open half-wave
        self._open_sign = 0
        self._open_peak = 0.0
        self._state = 0  # sign of the last significant half-wave
        self._last_peak = {1: 0.0, -1: 0.0}
        #: slow average of significant peaks: the threshold never drops below a fraction of it,
        #: so a quiet stretch (the gap, a dropout) cannot arm on noise
        self._slow = self.envelope
        self._width = 0.0  # typical duration of a significant half-wave (samples)

    @classmethod
    def calibrate(
        cls, probe: np.ndarray, sample_rate: float, levels: ChannelLevels
    ) -> dict[str, Any]:
        """Starting envelope, noise floor and spike removal from the first part of the channel.

        The noise floor comes from the spectrum, not from sample differences (which at a few
        samples per tooth measure the signal's own slope): the median periodogram value over
        the upper part of the band, where a tooth train puts only narrow lines, gives the white
        noise level; the floor is also kept above a few quantisation steps.
        """
        probe = np.asarray(probe, dtype=float)
        if len(probe) == 0:
            return {}
        y = probe - levels.mean
        # start from the amplitude at the start: a capture that begins slow (cranking) and
        # speeds up must not have its first teeth judged against the later, larger swings
        head = y[: max(2000, int(0.05 * sample_rate))]
        envelope = float(np.max(np.abs(head)))
        floor = max(4.0 * spectral_noise(y), 3.0 * quantisation_step(probe), 1e-12)
        first = cls(sample_rate, levels, envelope=envelope, floor=floor)
        edges = Edges.concat([first.process(probe, 0), first.finish()])
        opts: dict[str, Any] = {"envelope": envelope, "floor": floor}
        spike = 0.3 * float(np.median(edges.strength)) if len(edges) else 0.0
        if len(edges) >= 4 and has_spikes(y, spike):
            # a running median removes ignition spikes; it must be short against a half-wave
            half_wave = float(np.percentile(np.diff(edges.times), 10)) * sample_rate
            opts["despike"] = 5 if half_wave >= 12 else 3 if half_wave >= 6 else 1
        return opts

    def process(self, samples: np.ndarray, start: int) -> Edges:
        y = np.asarray(samples, dtype=float) - self.offset
        if len(self._tail) == 0:
            self._tail_start = start
            self._scanned = max(self._scanned, start)
            self._next_k = max(self._next_k, start)
        buf = np.concatenate((self._tail, y)) if len(self._tail) else y
        out = self._scan(buf, final=False)
        keep = min(4 + 2 * self._half, len(buf))
        self._tail = buf[len(buf) - keep :].copy()
        self._tail_start += len(buf) - keep
        return out

    @property
    def settled_s(self) -> float:
        """No edge earlier than this time (s) will come out of later calls."""
        pending = self._next_k if self._open_start is None else min(self._open_start, self._next_k)
        return pending / self.sample_rate

    def finish(self) -> Edges:
        times: list[float] = []
        dirs: list[int] = []
        strength: list[float] = []
        if len(self._tail):
            e = self._scan(self._tail, final=True)
            times, dirs, strength = list(e.times), list(e.direction), list(e.strength)
        # the last half-wave ends with the capture
        self._close(self._open_start, None, self._open_sign, self._open_peak, times, dirs, strength)
        self._open_start = None
        self._tail = np.empty(0)
        return self._edges(times, dirs, strength)

    # -- internals -------------------------------------------------------------------------

    def _edges(self, times: list[float], dirs: list[int], strength: list[float]) -> Edges:
        return Edges(
            np.asarray(times, dtype=float) / self.sample_rate,
            np.asarray(dirs, dtype=np.int8),
            np.asarray(strength, dtype=float),
        )

    def _close(
        self,
        start: float | None,
        end: float | None,
        sign: int,
        peak: float,
        times: list[float],
        dirs: list[int],
        strength: list[float],
    ) -> None:
        """A half-wave of ``sign`` from crossing ``start`` to ``end`` (samples) has ended."""
        if sign == 0:
            return
        arm = max(self.floor, self.fraction * self.envelope, 0.12 * self._slow)
        if peak < arm:
            self.envelope = max(self.envelope * self.decay, self.floor)
            return
        width = (end - start) if (start is not None and end is not None) else None
        if (
            width is not None
            and self._width > 0
            and (
                width < 0.12 * self._width
                or (width < 0.25 * self._width and peak > 2.0 * self.envelope)
            )
        ):
            # far shorter (or shorter and taller) than the teeth around it: an ignition spike
            # that crossed zero, not a tooth
            return
        if sign != self._state and start is not None:
            times.append(start)
            dirs.append(sign)
            strength.append(peak + self._last_peak[-sign])
        self._state = sign
        self._last_peak[sign] = peak
        # a spike that got through must not lift the threshold over the next real teeth
        self.envelope = 0.5 * (self.envelope + min(peak, 4.0 * self.envelope))
        self._slow += 0.05 * (min(peak, 4.0 * self._slow) - self._slow)
        if width is not None:
            self._width = width if self._width == 0 else self._width + 0.1 * (width - self._width)

    def _scan(self, raw: np.ndarray, final: bool) -> Edges:
        g = self._tail_start
        n = len(raw)
        if n < 2:
            return Edges.empty()
        half = self._half
        buf = despike(raw, self.despike)
        positive = buf > 0.0
        kk = np.flatnonzero(positive[:-1] != positive[1:])
        limit = n - 2 if final else n - 3 - half
        kk = kk[(kk + g >= self._next_k) & (kk <= limit)]
        # samples that can be folded into half-wave peaks now: up to the last one that no
        # pending crossing could still split
        a = self._scanned - g
        b = n if final else n - 1 - half  # exclusive
        # every crossing up to the limit has been looked at, with or without a find
        self._next_k = max(self._next_k, g + limit + 1)
        if len(kk):
            # the time comes from the samples as recorded (the running median only found the
            # crossing); where they do not cross there (a spike on it), from the cleaned ones
            same = (raw[kk] > 0.0) != (raw[kk + 1] > 0.0)
            frac = np.where(same, cubic_crossing(raw, kk, 0.0), cubic_crossing(buf, kk, 0.0))
            pos = (kk + g) + frac
        else:
            pos = np.empty(0)
        absx = np.abs(buf[a:b]) if b > a else np.empty(0)
        bnd = np.clip(kk - a + 1, 0, len(absx))
        starts = np.concatenate(([0], bnd))
        padded = np.insert(absx, starts, 0.0)
        seg = np.maximum.reduceat(padded, starts + np.arange(len(starts)))
        self._scanned = g + b
        times: list[float] = []
        dirs: list[int] = []
        strength: list[float] = []
        if self._open_sign == 0:
            self._open_sign = 1 if positive[0] else -1
        self._open_peak = max(self._open_peak, float(seg[0]))
        for j, k in enumerate(kk):
            self._close(
                self._open_start,
                float(pos[j]),
                self._open_sign,
                self._open_peak,
                times,
                dirs,
                strength,
            )
            self._open_start = float(pos[j])
            self._open_sign = 1 if positive[k + 1] else -1
            self._open_peak = float(seg[j + 1])
        return self._edges(times, dirs, strength)


def spectral_noise(y: np.ndarray, n_max: int = 1 << 18) -> float:
    """Standard deviation of the white noise under a signal, from its spectrum.

    For white noise of variance s^2 the periodogram values |X_k|^2 of an N-point transform are
    exponentially distributed with mean N s^2, so their median is N s^2 ln 2. The median is
    taken over 0.25..0.45 of the sample rate, where a tooth train leaves only narrow lines.
    source: distribution of periodogram ordinates of white Gaussian noise (S. M. Kay, "Modern
    Spectral Estimation", Prentice Hall 1988, ch. 4)

    >>> rng = np.random.default_rng(1)
    >>> x = 0.2 * rng.normal(size=100_000) + np.sin(np.arange(100_000) * 2 * np.pi / 9.0)
    >>> round(spectral_noise(x), 2)
    0.2
    """
    y = np.asarray(y, dtype=float)[:n_max]
    n = len(y)
    if n < 64:
        return 0.0
    p = np.abs(np.fft.rfft(y - y.mean())) ** 2
    band = p[int(0.25 * n) : int(0.45 * n)]
    if len(band) == 0:
        return 0.0
    return float(np.sqrt(np.median(band) / (n * np.log(2.0))))


def quantisation_step(x: np.ndarray, n_max: int = 1 << 18) -> float:
    """Smallest step between distinct sample values (a converter's LSB; tiny for float data).

    >>> quantisation_step(np.round(np.sin(np.arange(1000) / 7.0) * 127) / 128)
    0.0078125
    """
    v = np.unique(np.asarray(x, dtype=float)[:n_max])
    v = v[np.isfinite(v)]
    if len(v) < 2:
        return 0.0
    return float(np.min(np.diff(v)))
