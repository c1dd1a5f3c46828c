"""The result of a decode, and its JSON form (field names fixed by DESIGN.md).

Everything the report, the JSON writer and scripts need is here; the command line only renders it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Literal

from .model import CaptureInfo

Sensor = Literal["hall", "vr"]
Severity = Literal["info", "warning", "error"]


@dataclass(frozen=True)
class Finding:
    """Something the decoder noticed that a user should know (reversed wiring, a dropout, ...)."""

    #: "info", "warning" or "error"
    severity: Severity
    #: short stable identifier for scripts, e.g. "vr-reversed", "sync-lost", "dropout"
    code: str
    #: one sentence for people
    message: str
    #: capture time the finding refers to (seconds), when it has one
    time_s: float | None = None

    def to_json(self) -> dict[str, Any]:
        d: dict[str, Any] = {"severity": self.severity, "code": self.code, "message": self.message}
        if self.time_s is not None:
            d["time_s"] = self.time_s
        return d


@dataclass(frozen=True)
class AngleStats:
    """Statistics of a set of angles in deg CA (circular: no false spread across 0/360)."""

    mean: float
    std: float
    min: float
    max: float
    n: int

    def to_json(self) -> dict[str, Any]:
        return {"mean": self.mean, "std": self.std, "min": self.min, "max": self.max, "n": self.n}


@dataclass(frozen=True)
class JitterStats:
    """Jitter of a sequence of events, named as in IEEE Std 2414-2020.

    ``tie``: time interval error, each event's deviation from its ideal (trend-removed) time;
    ``period``: period jitter, each period's deviation from its ideal period;
    ``cycle_to_cycle``: difference between successive periods. Each as rms and peak-to-peak,
    in seconds and in crank degrees (at the local speed).
    """

    n: int
    tie_rms_s: float
    tie_pp_s: float
    period_rms_s: float
    period_pp_s: float
    c2c_rms_s: float
    c2c_pp_s: float
    tie_rms_deg: float
    tie_pp_deg: float
    period_rms_deg: float
    period_pp_deg: float
    c2c_rms_deg: float
    c2c_pp_deg: float
    #: what trend was removed before the jitter was computed, in words
    detrend: str = ""

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {"n": self.n, "detrend": self.detrend}
        for name in ("tie", "period", "c2c"):
            out[name] = {
                "rms_s": getattr(self, f"{name}_rms_s"),
                "pp_s": getattr(self, f"{name}_pp_s"),
                "rms_deg": getattr(self, f"{name}_rms_deg"),
                "pp_deg": getattr(self, f"{name}_pp_deg"),
            }
        return out


@dataclass(frozen=True)
class CamEdge:
    """One distinct edge of a cam pattern and every occurrence of it."""

    #: "leading" / "trailing" (Hall flanks) or "centre" (VR tooth centre)
    flank: str
    #: "rising" or "falling": the signal direction of the event
    direction: str
    #: angle after the most recent crank reference event, 0 <= angle < 360
    angle: AngleStats
    #: which revolution of the 720 deg cycle (0 or 1), None when the cycle phase is unknown
    revolution: int | None
    #: (time_s, angle_deg) of every occurrence
    events: tuple[tuple[float, float], ...]
    #: jitter of the edge angle after slow phase trends are removed (deg fields meaningful)
    jitter: JitterStats | None = None
    #: index of the tooth/window this edge belongs to in the cam pattern (0-based)
    window: int | None = None

    @property
    def cycle_angle(self) -> float | None:
        """Angle in the 720 deg cycle (revolution * 360 + angle), when the phase is known."""
        if self.revolution is None:
            return None
        return self.revolution * 360.0 + self.angle.mean

    def to_json(self) -> dict[str, Any]:
        d: dict[str, Any] = {
            "flank": self.flank,
            "direction": self.direction,
            "angle_deg": self.angle.to_json(),
            "revolution": self.revolution,
            "cycle_angle_deg": self.cycle_angle,
            "window": self.window,
            "events": [[t, a] for t, a in self.events],
        }
        if self.jitter is not None:
            d["jitter"] = self.jitter.to_json()
        return d


@dataclass(frozen=True)
class CamResult:
    """Everything measured on one cam channel."""

    channel: str
    sensor: Sensor
    edges: tuple[CamEdge, ...]
    #: teeth/windows per cycle as [start, end] cycle degrees (0..720), when the phase is known,
    #: else per revolution (0..360)
    pattern: tuple[tuple[float, float], ...] = ()
    #: True when this cam fixed the cycle phase (its pattern differs between the revolutions)
    phase_source: bool = False
    findings: tuple[Finding, ...] = ()

    def to_json(self) -> dict[str, Any]:
        return {
            "channel": self.channel,
            "sensor": self.sensor,
            "edges": [e.to_json() for e in self.edges],
            "pattern_deg": [list(w) for w in self.pattern],
            "phase_source": self.phase_source,
            "findings": [f.to_json() for f in self.findings],
        }


@dataclass(frozen=True)
class RpmStats:
    min: float
    mean: float
    max: float

    def to_json(self) -> dict[str, Any]:
        return {"min": self.min, "mean": self.mean, "max": self.max}


@dataclass(frozen=True)
class CrankResult:
    """Everything measured on the crank channel."""

    channel: str
    sensor: Sensor
    #: trade notation ("60-2") or a pattern name
    wheel: str
    #: tooth positions on the wheel (N)
    positions: int
    #: missing positions in the gap (M)
    missing: int
    #: "normal" or "reversed" (VR lead polarity; Hall is always "normal")
    polarity: Literal["normal", "reversed"]
    #: Hall: signal direction of the leading flank; VR: direction of the tooth-centre crossing
    event_direction: Literal["rising", "falling"]
    rpm: RpmStats
    revolutions: int
    sync_losses: int
    #: every crank reference event (tooth 1 after the gap), seconds
    reference_times_s: tuple[float, ...]
    #: teeth seen that the wheel does not have / expected teeth not seen
    extra_teeth: int = 0
    missing_teeth: int = 0
    jitter: JitterStats | None = None
    findings: tuple[Finding, ...] = ()
    #: (time_s, rpm) per tooth, decimated for plots and reports
    rpm_trace: tuple[tuple[float, float], ...] = ()

    @property
    def pitch_deg(self) -> float:
        return 360.0 / self.positions

    def to_json(self) -> dict[str, Any]:
        d: dict[str, Any] = {
            "channel": self.channel,
            "sensor": self.sensor,
            "wheel": self.wheel,
            "pitch_deg": self.pitch_deg,
            "polarity": self.polarity,
            "event_direction": self.event_direction,
            "rpm": self.rpm.to_json(),
            "revolutions": self.revolutions,
            "sync_losses": self.sync_losses,
            "extra_teeth": self.extra_teeth,
            "missing_teeth": self.missing_teeth,
            "reference_times_s": list(self.reference_times_s),
            "findings": [f.to_json() for f in self.findings],
        }
        if self.jitter is not None:
            d["jitter"] = self.jitter.to_json()
        return d


@dataclass(frozen=True)
class DecodeResult:
    """The whole answer of one decode."""

    capture: CaptureInfo
    crank: CrankResult
    cams: tuple[CamResult, ...]
    #: findings that belong to no single channel
    findings: tuple[Finding, ...] = ()
    #: how each choice was made (e.g. {"crank": "hint", "wheel": "identified (confidence 0.98)"})
    choices: dict[str, str] = field(default_factory=dict)

    @property
    def all_findings(self) -> list[Finding]:
        out = list(self.findings) + list(self.crank.findings)
        for c in self.cams:
            out.extend(c.findings)
        return out

    def to_json(self) -> dict[str, Any]:
        cap = self.capture
        return {
            "tool": {"name": "toothcomb", "schema": 1},
            "capture": {
                "path": cap.path,
                "format": cap.format,
                "sample_rate": cap.sample_rate,
                "duration_s": cap.duration_s,
                "n_samples": cap.n_samples,
                "channels": list(cap.channels),
            },
            "crank": self.crank.to_json(),
            "cams": [c.to_json() for c in self.cams],
            "findings": [f.to_json() for f in self.findings],
            "choices": dict(self.choices),
        }
