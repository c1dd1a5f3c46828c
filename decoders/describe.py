"""Describe a capture without decoding it: channels, rate, duration, levels, what each channel
looks like (being written)."""

from __future__ import annotations

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
    path: str, *, sample_rate: float | None = None, block_size: int | None = None, progress=None
) -> CaptureDescription:
    """Read a capture once and describe it."""
    raise NotImplementedError("describe_capture is being written")
