"""What a channel carries: nothing, noise, a Hall (two-level) signal or a VR (analog) signal.

Decided from the channel's level statistics and a look at its first seconds (the *probe*):

- **flat**: the robust peak-to-peak is below a few quantisation steps or 1e-9 of the channel's
  units;
- **noise**: the robust peak-to-peak is within what Gaussian noise of the measured noise level
  gives (white noise of rms sigma spans about 6.2 sigma between its 0.1th and 99.9th
  percentiles);
- **hall** or **vr**: by how *sharp* the signal's steps are. A Hall output switches within
  microseconds, so across 10 us (or two samples, whichever is longer) nearly its whole step is
  already done; a VR waveform is smooth, and the same span covers only a small part of its swing.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..frontends.hall import HallFrontEnd
from ..model import ChannelLevels, Edges

#: share of a flank's step covered within the sharpness span above which a signal is Hall-like
# common practice, no source: measured margins are wide (Hall >= 0.7, VR <= 0.4 on simulated
# and independently generated captures at 44.1 kHz..1 MS/s)
SHARP_HALL = 0.55
#: sharpness span (s)
SHARP_SPAN_S = 10e-6
# source: for white Gaussian noise the 0.1th and 99.9th percentiles lie at -/+3.09 sigma
# (standard normal quantile), a span of 6.18 sigma; below about 10 sigma a channel is noise.
NOISE_SPAN_SIGMAS = 10.0


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


def _sharpness(probe: np.ndarray, edges: Edges, sample_rate: float) -> float:
    h = max(1, round(SHARP_SPAN_S * sample_rate / 2))
    if len(edges) == 0 or len(probe) <= 2 * h:
        return float("nan")
    d = np.abs(probe[2 * h :] - probe[: -2 * h])  # d[i] spans probe[i] .. probe[i + 2h]
    pos = np.rint(edges.times * sample_rate).astype(int) - h
    lo = np.clip(pos - 3 * h - 2, 0, len(d) - 1)
    hi = np.clip(pos + 3 * h + 3, 1, len(d))
    vals = np.array([d[a:b].max() if b > a else 0.0 for a, b in zip(lo, hi, strict=True)])
    return float(np.median(vals / edges.strength))


def look_at_channel(
    probe: np.ndarray, sample_rate: float, levels: ChannelLevels, hint: str | None = None
) -> ChannelLook:
    """Classify one channel from its probe; ``hint`` ("hall"/"vr") overrides the guess."""
    from ..frontends.vr import VrFrontEnd

    probe = np.asarray(probe, dtype=float)
    span = levels.span
    step = 2.0 ** -15 if np.isfinite(levels.maximum) and abs(levels.maximum) <= 1.0 else 0.0
    if not np.isfinite(span) or span <= max(1e-9, 4 * step):
        return ChannelLook("flat", 1.0, f"it is flat (peak-to-peak {span:.3g})")
    if levels.noise > 0 and span < NOISE_SPAN_SIGMAS * levels.noise:
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
    sharp = _sharpness(probe, edges, sample_rate)
    if hint is None:
        if len(edges) < 2 or not math.isfinite(sharp):
            kind, conf = "vr", 0.5
            why = "no sharp steps: treated as a VR (analog) signal"
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
    if kind == "hall":
        fopts = opts
    else:
        fopts = VrFrontEnd.calibrate(probe, sample_rate, levels)
    return ChannelLook(kind, conf, why, rate, sharp, fopts)
