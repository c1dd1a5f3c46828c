"""Describe a capture without decoding it: channels, rate, duration, levels, what each channel
looks like."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from .model import CaptureInfo, ChannelLevels


@dataclass(frozen=True)
class ChannelGuess:
    """What a channel looks like, from its levels and a short look at its edges."""

    #: channel name
    name: str
    #: "hall" (two-level square wave), "vr" (analog, zero-crossing), "flat", "noise", "unknown"
    kind: str
    #: "crank", "cam" or "" when it cannot tell
    role: str
    #: 0..1
    confidence: float
    #: one sentence: why
    reason: str
    #: edges per second seen in the look (0 when none)
    edge_rate_hz: float = 0.0


@dataclass(frozen=True)
class CaptureDescription:
    info: CaptureInfo
    levels: tuple[ChannelLevels, ...]
    guesses: tuple[ChannelGuess, ...]

    def to_json(self) -> dict:
        return {
            "capture": {
                "path": self.info.path,
                "format": self.info.format,
                "subtype": self.info.subtype,
                "sample_rate": self.info.sample_rate,
                "duration_s": self.info.duration_s,
                "n_samples": self.info.n_samples,
                "channels": list(self.info.channels),
                "notes": list(self.info.notes),
            },
            "channels": [
                {
                    "name": lv.name,
                    "min": lv.minimum,
                    "max": lv.maximum,
                    "mean": lv.mean,
                    "std": lv.std,
                    "noise": lv.noise,
                    "clipped_fraction": lv.clipped_fraction,
                    "non_finite": lv.non_finite,
                    "guess": {
                        "kind": g.kind,
                        "role": g.role,
                        "confidence": g.confidence,
                        "reason": g.reason,
                        "edge_rate_hz": g.edge_rate_hz,
                    },
                }
                for lv, g in zip(self.levels, self.guesses, strict=True)
            ],
        }


def describe_capture(
    path: str,
    *,
    sample_rate: float | None = None,
    block_size: int | None = None,
    progress: Callable[[str, int, int], None] | None = None,
) -> CaptureDescription:
    """Read a capture once for its levels, look at its first seconds, and describe it.

    The guess of each channel's role comes from its first seconds only: the channel whose edges
    show a missing-tooth gap is the crank, other channels with edges are cams.
    """
    from .analysis.identify import look_at_channel
    from .frontends.hall import HallFrontEnd
    from .frontends.vr import VrFrontEnd
    from .levels import measure_levels
    from .model import DEFAULT_BLOCK_SIZE, Edges
    from .pipeline import PROBE_MAX_SAMPLES, PROBE_SECONDS, crank_direction, read_probe
    from .readers import open_capture
    from .wheels.missing_tooth import identify

    bs = block_size or DEFAULT_BLOCK_SIZE
    with open_capture(path, sample_rate=sample_rate) as src:
        info = src.info
        fs = info.sample_rate
        lv_progress = (lambda d, t: progress("levels", d, t)) if progress else None
        levels = measure_levels(src, bs, progress=lv_progress)
        n_probe = int(min(info.n_samples, PROBE_MAX_SAMPLES, max(1, PROBE_SECONDS * fs)))
        probe = read_probe(src, n_probe, bs)
    guesses = []
    wheels: dict[int, tuple[float, str]] = {}
    looks = []
    for c in range(info.n_channels):
        if levels[c].non_finite:
            looks.append(None)
            continue
        look = look_at_channel(probe[:, c], fs, levels[c])
        looks.append(look)
        if look.kind not in ("hall", "vr"):
            continue
        fe_cls = HallFrontEnd if look.kind == "hall" else VrFrontEnd
        fe = fe_cls(fs, levels[c], **look.frontend_options)
        edges = Edges.concat([fe.process(probe[:, c], 0), fe.finish()])
        direction, _polarity = crank_direction(edges, look.kind)
        g = identify(edges.times[edges.direction == direction])
        if g is not None:
            wheels[c] = (g.confidence * min(1.0, g.gaps / 4.0), g.spec.name)
    crank = max(wheels, key=lambda c: wheels[c][0]) if wheels else None
    for c, name in enumerate(info.channels):
        look = looks[c]
        if look is None:
            guesses.append(
                ChannelGuess(name, "unknown", "", 0.0, f"{levels[c].non_finite} NaN samples")
            )
            continue
        if look.kind not in ("hall", "vr"):
            guesses.append(ChannelGuess(name, look.kind, "", look.confidence, look.reason))
            continue
        if c == crank:
            role = "crank"
            reason = f"{look.reason}; tooth periods show a {wheels[c][1]} wheel"
        else:
            role = "cam" if crank is not None else ""
            reason = look.reason
        guesses.append(
            ChannelGuess(name, look.kind, role, look.confidence, reason, look.edge_rate_hz)
        )
    return CaptureDescription(info, levels, tuple(guesses))
