"""What a channel carries: nothing, noise, a Hall (two-level) signal or a VR (analog) signal.

Decided from the channel's level statistics and a look at its first seconds (the *probe*):

- **flat**: the robust peak-to-peak is below a few quantisation steps or 1e-9 of the channel's
  units;
- **noise**: the robust peak-to-peak is within what Gaussian noise of the measured noise level
  gives (white noise of rms sigma spans about 6.2 sigma between its 0.1th and 99.9th
  percentiles) *and* the spectrum has no line standing out of it (a tooth train, even one
  sampled too coarsely for its sample-to-sample differences to tell it from noise, puts a strong
  line at the tooth frequency);
- **hall** or **vr**: by how *sharp* the signal's steps are. A Hall output switches within
  microseconds, so across 10 us (or two samples, whichever is longer) nearly its whole step is
  already done; a VR waveform is smooth, and the same span covers only a small part of its swing.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..frontends.base import PERIODOGRAM_SAMPLES, Periodogram, despike, periodogram
from ..frontends.hall import HallFrontEnd
from ..model import ChannelLevels, Edges
from ..wheels.missing_tooth import looks_like_clipped_vr

#: share of a flank's step covered within the sharpness span above which a signal is Hall-like
# common practice, no source: measured margins are wide (Hall >= 0.7, VR <= 0.4 on simulated
# and independently generated captures at 44.1 kHz..1 MS/s)
SHARP_HALL = 0.55
#: sharpness span (s)
SHARP_SPAN_S = 10e-6
#: swings through the middle level per step of the two-level reading above which the reading
#: misses most of them (and how many swings that takes at least)
# common practice, no source: the Hall channels of the test and independently made captures give
# 0.9-1.05 (each flank crosses the middle once), a clamped VR crank whose teeth a two-level
# reading did not follow gave 58
SWINGS_PER_STEP = 3.0
MIN_SWINGS = 20
#: samples of the probe the swings are counted over
SWING_SAMPLES = 1 << 17
# source: for white Gaussian noise the 0.1th and 99.9th percentiles lie at -/+3.09 sigma
# (standard normal quantile), a span of 6.18 sigma; below about 10 sigma a channel is noise.
NOISE_SPAN_SIGMAS = 10.0


#: largest periodogram value over its median below which a spectrum has no line
# source: periodogram values of white Gaussian noise are exponentially distributed (S. M. Kay,
# "Modern Spectral Estimation", Prentice Hall 1988, ch. 4), so over n = 2**17 bins the largest
# is about ln(n) = 11.8 times the mean, i.e. 17 times the median (mean * ln 2); 100 leaves a
# wide margin
LINE_RATIO = 100.0


def strongest_line(
    x: np.ndarray,
    sample_rate: float,
    n_max: int = PERIODOGRAM_SAMPLES,
    spectrum: Periodogram | None = None,
) -> tuple[float, float]:
    """(frequency in Hz, height over the median) of the strongest line in the spectrum of ``x``
    (``spectrum``: its periodogram, when the caller has it already).

    >>> t = np.arange(48000) / 48000.0
    >>> f, h = strongest_line(np.sin(2 * np.pi * 1000.0 * t), 48000.0)
    >>> round(f), h > 1e6
    (1000, True)
    """
    if spectrum is None:
        spectrum = periodogram(x, n_max)
    if spectrum.n < 64:
        return 0.0, 0.0
    p = spectrum.power[1:]
    med = float(np.median(p))
    k = int(np.argmax(p))
    height = float(p[k]) / med if med > 0 else (np.inf if p[k] > 0 else 0.0)
    return (k + 1) * sample_rate / spectrum.n, height


def has_lines(
    x: np.ndarray, n_max: int = PERIODOGRAM_SAMPLES, spectrum: Periodogram | None = None
) -> bool:
    """True when the spectrum of ``x`` has a line standing far out of its noise floor.

    >>> rng = np.random.default_rng(0)
    >>> n = rng.normal(size=50000)
    >>> has_lines(n), has_lines(n + 0.5 * np.sin(np.arange(50000) * 2 * np.pi / 7))
    (False, True)
    """
    return strongest_line(x, 1.0, n_max, spectrum)[1] > LINE_RATIO


@dataclass(frozen=True)
class ChannelLook:
    """The verdict on one channel."""

    kind: str  # "flat", "noise", "hall", "vr"
    confidence: float
    reason: str
    #: edges per second the Hall detector found in the probe (0 for flat/noise)
    edge_rate_hz: float = 0.0
    sharpness: float = float("nan")
    #: settings for the chosen front end, from its calibration on the probe
    frontend_options: dict[str, Any] = field(default_factory=dict)
    #: frequency of the strongest line in the channel's spectrum (Hz; the tooth frequency of
    #: a crank signal), 0 when there is none
    line_hz: float = 0.0


def _sharpness(probe: np.ndarray, edges: Edges, sample_rate: float) -> float:
    """Median share of each flank's step covered within the sharpness span: the largest
    change over ``2h`` samples (``h`` = half the span) near the flank, over its step height.

    >>> x = np.r_[np.zeros(50), np.ones(50)]
    >>> fs = 200_000.0
    >>> _sharpness(x, Edges(np.array([50 / fs]), np.array([1]), np.array([1.0])), fs)
    1.0
    """
    h = max(1, round(SHARP_SPAN_S * sample_rate / 2))
    if len(edges) == 0 or len(probe) <= 2 * h:
        return float("nan")
    d = np.abs(probe[2 * h :] - probe[: -2 * h])  # d[i] spans probe[i] .. probe[i + 2h]
    pos = np.rint(edges.times * sample_rate).astype(int) - h
    lo = np.clip(pos - 3 * h - 2, 0, len(d) - 1)
    hi = np.clip(pos + 3 * h + 3, 1, len(d))
    # the largest of d[lo:hi] for every flank in one call: reduceat over the pairs (lo, hi)
    # (what lies between hi and the next lo is reduced too, and dropped); an empty stretch
    # counts 0
    ends = np.append(d, 0.0)  # hi may be len(d)
    top = np.maximum.reduceat(ends, np.stack((lo, hi), axis=1).ravel())[::2]
    vals = np.where(hi > lo, top, 0.0)
    return float(np.median(vals / edges.strength))


def _misses_swings(
    probe: np.ndarray, levels: ChannelLevels, edges: Edges, sample_rate: float
) -> bool:
    """True when ``probe`` swings through the middle of its levels (the mean +- a tenth of the
    span, crossed as a Schmitt trigger would) far more often than ``edges``, a two-level
    reading of it, has steps: the reading follows only some of the swings (a clamped VR
    signal's big ones), not a two-level signal. Counted over the first
    :data:`SWING_SAMPLES` samples, with spikes of one or two samples removed.

    >>> from toothcomb.decoders.model import ChannelLevels
    >>> x = np.sin(np.arange(20000) / 10.0)
    >>> lv = ChannelLevels("ch0", 20000, -1, 1, 0, 0.7, (-1, -1, -1, -.7, 0, .7, 1, 1, 1), 1e-3, 0)
    >>> few = Edges(np.array([0.01, 0.02]), np.array([1, -1]), np.array([2.0, 2.0]))
    >>> _misses_swings(x, lv, few, 1000.0)                  # 636 swings against 2 steps
    True
    >>> square = np.where(np.arange(20000) // 5000 % 2, 1.0, -1.0)
    >>> square[100::400] = 3.0                              # spikes, 25 from the low level
    >>> steps = Edges(np.array([5.0, 10.0, 15.0]), np.array([1, -1, 1]), np.full(3, 2.0))
    >>> _misses_swings(square, lv, steps, 1000.0)
    False
    """
    n = min(len(probe), SWING_SAMPLES)
    x = despike(probe[:n], 5)  # an ignition spike is not a swing
    band = 0.1 * levels.span
    side = np.zeros(n, dtype=np.int8)
    side[x > levels.mean + band] = 1
    side[x < levels.mean - band] = -1
    side = side[side != 0]
    swings = int(np.count_nonzero(side[1:] != side[:-1]))
    steps = int(np.count_nonzero(edges.times < n / sample_rate))
    return swings >= MIN_SWINGS and swings > SWINGS_PER_STEP * steps


def look_at_channel(
    probe: np.ndarray, sample_rate: float, levels: ChannelLevels, hint: str | None = None
) -> ChannelLook:
    """Classify one channel from its probe; ``hint`` ("hall"/"vr") overrides the guess."""
    from ..frontends.vr import VrFrontEnd

    probe = np.asarray(probe, dtype=float)
    # the probe's periodogram, taken once when a judgement needs it
    spectra: list[Periodogram] = []

    def spectrum() -> Periodogram:
        if not spectra:
            spectra.append(periodogram(probe))
        return spectra[0]

    span = levels.span
    step = 2.0 ** -15 if np.isfinite(levels.maximum) and abs(levels.maximum) <= 1.0 else 0.0
    if not np.isfinite(span) or span <= max(1e-9, 4 * step):
        return ChannelLook("flat", 1.0, f"it is flat (peak-to-peak {span:.3g})")
    small = levels.noise > 0 and span < NOISE_SPAN_SIGMAS * levels.noise
    if small and not has_lines(probe, spectrum=spectrum()):
        return ChannelLook(
            "noise",
            0.9,
            f"it carries only noise (peak-to-peak {span:.3g} is {span / levels.noise:.1f} times "
            f"its noise level {levels.noise:.3g})",
        )
    duration = len(probe) / sample_rate if sample_rate > 0 else 0.0
    opts = HallFrontEnd.calibrate(probe, sample_rate, levels)
    fe = HallFrontEnd(sample_rate, levels, **opts)
    edges = Edges.concat([fe.process(probe, 0), fe.finish()])
    rate = len(edges) / duration if duration > 0 else 0.0
    # judge sharpness on the steps that carry the signal's swing, not on noise
    strong = edges.select(edges.strength >= 0.4 * span)
    sharp = _sharpness(probe, strong, sample_rate)
    if hint is None:
        if len(strong) < 2 or not math.isfinite(sharp):
            # a signal with a clear spectral line but no step as tall as its swing is analog
            kind, conf = "vr", 0.8 if has_lines(probe, spectrum=spectrum()) else 0.5
            why = "it swings without sharp steps: a VR (analog) sensor"
        elif sharp >= SHARP_HALL and looks_like_clipped_vr(edges):
            kind, conf = "vr", 0.7
            why = (
                "its steps are sharp, but it swings across the wheel gap as a VR voltage "
                "does: a clipped VR sensor"
            )
        elif sharp >= SHARP_HALL and _misses_swings(probe, levels, edges, sample_rate):
            kind, conf = "vr", 0.7
            why = (
                "its steps are sharp, but it swings through its middle level far more often "
                "than a two-level reading finds steps: a clamped VR sensor"
            )
        elif sharp >= SHARP_HALL:
            kind = "hall"
            conf = min(1.0, 0.5 + (sharp - SHARP_HALL))
            why = (
                f"its steps are sharp ({min(sharp, 1.0):.0%} of a step within "
                f"{SHARP_SPAN_S * 1e6:.0f} us): a Hall or digital sensor"
            )
        else:
            kind = "vr"
            conf = min(1.0, 0.5 + (SHARP_HALL - sharp))
            why = (
                f"it swings smoothly (only {sharp:.0%} of a swing within "
                f"{SHARP_SPAN_S * 1e6:.0f} us): a VR sensor"
            )
    else:
        kind, conf, why = hint, 1.0, "sensor kind given by the user"
    fopts = (
        opts if kind == "hall" else VrFrontEnd.calibrate(probe, sample_rate, levels, spectrum())
    )
    line_hz, height = strongest_line(probe, sample_rate, spectrum=spectrum())
    return ChannelLook(
        kind, conf, why, rate, sharp, fopts, line_hz if height > LINE_RATIO else 0.0
    )
