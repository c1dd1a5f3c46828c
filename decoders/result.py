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
class EdgeComparison:
    """How one measured cam edge sits against its expected position (an engine profile or a
    known-good capture). Angles in deg CA; a positive deviation means late (retarded).

    ``to_json()`` gives the fields DESIGN.md names; :class:`CamEdge` merges them into its own.

    >>> c = EdgeComparison(120.0, 0, 17.1, 2.85, 1.0, 0.05, "off-by-teeth", 1, "drive", 3.0, 720.0)
    >>> c.expected_cycle_deg, c.to_json()["off_by_teeth"], c.to_json()["tooth_kind"]
    (120.0, 1, 'drive')
    """

    #: expected angle after the most recent crank reference event, 0 <= angle < 360
    expected_deg: float
    #: revolution of the cycle the expected edge falls in (0 or 1); None when compared per
    #: revolution (one side does not know the cycle phase)
    expected_revolution: int | None
    #: measured - expected, wrapped to (-360, 360] on the cycle or (-180, 180] per revolution
    deviation_deg: float
    #: deviation in crank trigger wheel teeth (deviation / crank pitch)
    deviation_trigger_teeth: float
    #: deviation in cam drive teeth (deviation / (720 / T)); None when T is not known
    deviation_drive_teeth: float | None
    #: standard uncertainty of the deviation (1 sigma, coverage factor k = 1), deg CA
    uncertainty_deg: float
    #: "in-time", "drifted" or "off-by-teeth"
    status: str
    #: whole teeth off (signed, + = late) when the status is "off-by-teeth", else None
    off_by_teeth: int | None
    #: which teeth ``off_by_teeth`` counts: "drive" (cam sprocket) or "trigger" (crank wheel)
    tooth_kind: str | None
    #: tolerance the deviation was held against, deg CA
    tolerance_deg: float
    #: 720.0 when compared on the cycle, 360.0 when compared per revolution
    period_deg: float
    #: measured angle from the nearest TDC of cylinder 1 (- = BTDC, + = ATDC), when the profile
    #: gives the angle from the reference event to TDC
    from_tdc_deg: float | None = None
    #: expected angle from the nearest TDC of cylinder 1 (- = BTDC, + = ATDC)
    expected_from_tdc_deg: float | None = None

    @property
    def expected_cycle_deg(self) -> float | None:
        """Expected angle in the 720 deg cycle, when the revolution is known."""
        if self.expected_revolution is None:
            return None
        return self.expected_revolution * 360.0 + self.expected_deg

    def to_json(self) -> dict[str, Any]:
        return {
            "expected_deg": self.expected_deg,
            "expected_revolution": self.expected_revolution,
            "expected_cycle_deg": self.expected_cycle_deg,
            "deviation_deg": self.deviation_deg,
            "deviation_trigger_teeth": self.deviation_trigger_teeth,
            "deviation_drive_teeth": self.deviation_drive_teeth,
            "uncertainty_deg": self.uncertainty_deg,
            "uncertainty_k": 1,
            "status": self.status,
            "off_by_teeth": self.off_by_teeth,
            "tooth_kind": self.tooth_kind,
            "tolerance_deg": self.tolerance_deg,
            "compared_on_deg": self.period_deg,
            "from_tdc_deg": self.from_tdc_deg,
            "expected_from_tdc_deg": self.expected_from_tdc_deg,
        }


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
    #: the edge against its expected position, after a comparison (``verdict.compare``)
    comparison: EdgeComparison | None = None

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
        if self.comparison is not None:
            d.update(self.comparison.to_json())
        return d


@dataclass(frozen=True)
class PhaserMove:
    """One move of a cam phaser. Phases in deg CA on the trace's base (+ = retarded)."""

    #: left the start band / settled inside the end band, s
    t_start_s: float
    t_end_s: float
    #: settled phase before and after the move
    from_deg: float
    to_deg: float
    #: to - from (+ = retarded)
    travel_deg: float
    #: steepest rate, deg CA/s
    peak_rate_deg_s: float
    #: mean rate between the 10 % and 90 % points (0.8 travel / t10_90), deg CA/s
    mean_rate_deg_s: float
    #: 10-90 % response time, s
    t10_90_s: float
    #: largest excursion past ``to_deg`` in the direction of the move, deg CA (0 = none)
    overshoot_deg: float
    #: t_end_s - t_start_s
    settling_s: float
    #: mean engine speed during the move
    rpm: float = float("nan")

    def to_json(self) -> dict[str, Any]:
        return {
            "t_start_s": self.t_start_s,
            "t_end_s": self.t_end_s,
            "from_deg": self.from_deg,
            "to_deg": self.to_deg,
            "travel_deg": self.travel_deg,
            "peak_rate_deg_s": self.peak_rate_deg_s,
            "mean_rate_deg_s": self.mean_rate_deg_s,
            "t10_90_s": self.t10_90_s,
            "overshoot_deg": self.overshoot_deg,
            "settling_s": self.settling_s,
            "rpm": self.rpm,
        }


@dataclass(frozen=True)
class PhaserHold:
    """A stretch where the cam phaser held still (or hunted around one position)."""

    t_start_s: float
    t_end_s: float
    #: median phase, deg CA on the trace's base
    phase_deg: float
    #: standard deviation of the phase around ``phase_deg``, deg CA
    jitter_deg: float
    #: peak-to-peak of the lightly smoothed phase, deg CA
    pp_deg: float
    #: events in the hold
    n: int
    #: True when the phase swings back and forth instead of holding
    hunting: bool = False
    hunting_amplitude_deg: float | None = None
    hunting_hz: float | None = None
    #: when the hunting was seen (within the hold)
    hunting_t_start_s: float | None = None
    hunting_t_end_s: float | None = None

    def to_json(self) -> dict[str, Any]:
        return {
            "t_start_s": self.t_start_s,
            "t_end_s": self.t_end_s,
            "phase_deg": self.phase_deg,
            "jitter_deg": self.jitter_deg,
            "pp_deg": self.pp_deg,
            "n": self.n,
            "hunting": self.hunting,
            "hunting_amplitude_deg": self.hunting_amplitude_deg,
            "hunting_hz": self.hunting_hz,
            "hunting_t_start_s": self.hunting_t_start_s,
            "hunting_t_end_s": self.hunting_t_end_s,
        }


@dataclass(frozen=True)
class PhaserResult:
    """The cam phase over time and what the phaser did (``analysis.phaser``)."""

    #: "first-hold" (0 = where the cam sat first, its park position at start-up) or "expected"
    #: (0 = the profile's expected angle: the phase is the deviation)
    base: str
    #: on "first-hold": the raw trace value that became 0 (internal scale), else 0
    base_shift_deg: float
    moves: tuple[PhaserMove, ...]
    holds: tuple[PhaserHold, ...]
    #: the trace: one entry per cam event kept
    time_s: tuple[float, ...]
    phase_deg: tuple[float, ...]
    rpm: tuple[float, ...]
    #: index into the cam's edges of each event
    edge: tuple[int, ...]
    #: events set aside as outliers, and the rule that did it
    dropped: int
    dropped_rule: str
    #: largest travel of a move, deg CA (0 when the cam did not move)
    authority_deg: float
    #: robust noise of the trace around its smoothed self, deg CA
    noise_deg: float = 0.0
    #: the user said the phaser should stay parked in this capture
    expect_parked: bool = False

    @property
    def parked(self) -> bool:
        """True when the cam held one position: no move, no hunting."""
        return not self.moves and not any(h.hunting for h in self.holds)

    def to_json(self) -> dict[str, Any]:
        return {
            "authority_deg": self.authority_deg,
            "base": self.base,
            "parked": self.parked,
            "moves": [m.to_json() for m in self.moves],
            "holds": [h.to_json() for h in self.holds],
            "trace": {
                "time_s": list(self.time_s),
                "phase_deg": list(self.phase_deg),
                "rpm": list(self.rpm),
                "edge": list(self.edge),
            },
            "dropped": {"count": self.dropped, "rule": self.dropped_rule},
            "noise_deg": self.noise_deg,
            "expect_parked": self.expect_parked,
        }


@dataclass(frozen=True)
class ActuatorResult:
    """A phaser's valve command (PWM) on its own channel, and how its cam followed it.

    Duty is the solenoid's on-time share in percent.
    """

    channel: str
    #: "low-side" or "high-side" (which side the driver switches); None when not told apart
    drive: str | None
    #: how the drive side was told
    drive_how: str
    #: PWM frequency from the regular periods, Hz
    pwm_hz: float
    duty_mean: float
    duty_min: float
    duty_max: float
    #: per period: start time (turn-on), duty %, frequency Hz
    time_s: tuple[float, ...] = ()
    duty_pct: tuple[float, ...] = ()
    hz: tuple[float, ...] = ()
    #: the cam channel this valve drives, and whether the user said so ("given") or toothcomb
    #: chose it ("proposed")
    cam: str | None = None
    pairing: str | None = None
    #: duty at which the cam holds still, %
    hold_duty: float | None = None
    #: False when the cam does not move as the command asks (stuck, or the wrong way)
    follows: bool | None = None
    #: from a duty change to the cam's response, s
    delay_s: float | None = None
    #: cam rate per duty point away from the hold duty, deg CA/s per % (signed: - = more duty
    #: advances the cam)
    rate_per_pct: float | None = None
    #: how much of the cam's rate the duty explains (coefficient of determination)
    fit_r2: float | None = None
    #: "advances" / "retards": what more duty did to the cam in this capture
    more_duty: str | None = None
    #: cam drift while the duty sat at the hold duty, deg CA/s (steady-state)
    drift_deg_s: float | None = None
    findings: tuple[Finding, ...] = ()

    def to_json(self) -> dict[str, Any]:
        return {
            "channel": self.channel,
            "cam": self.cam,
            "pairing": self.pairing,
            "drive": self.drive,
            "drive_how": self.drive_how,
            "pwm_hz": self.pwm_hz,
            "duty": {"mean": self.duty_mean, "min": self.duty_min, "max": self.duty_max},
            "hold_duty": self.hold_duty,
            "follows": self.follows,
            "delay_s": self.delay_s,
            "rate_deg_s_per_pct": self.rate_per_pct,
            "fit_r2": self.fit_r2,
            "more_duty": self.more_duty,
            "drift_deg_s": self.drift_deg_s,
            "findings": [f.message for f in self.findings],
            "finding_codes": [f.code for f in self.findings],
            "trace": {
                "time_s": list(self.time_s),
                "duty_pct": list(self.duty_pct),
                "hz": list(self.hz),
            },
        }


@dataclass(frozen=True)
class CamPatternMatch:
    """A pattern-library cam pattern that fits a measured cam (``analysis.campattern``).

    >>> CamPatternMatch("quad-even", 152.5, False, 0.02, 0.03, True).to_json()["shift_deg"]
    152.5
    """

    #: the library pattern's name
    name: str
    #: turn that maps the library pattern onto the measurement: measured angle = library angle
    #: + shift (deg CA, mod 720 on the cycle, mod 360 when the cycle phase is unknown); given
    #: as the smallest such turn, 0 <= shift < the pattern's own repeat angle
    shift_deg: float
    #: True when the sensor's output is low while a tooth/window passes (rising and falling swap)
    inverted: bool
    #: misfit of the edges after the shift, rms and largest, deg CA
    rms_deg: float
    max_deg: float
    #: False when the cycle phase is unknown: matched per revolution, shift known modulo 360
    phase_known: bool

    def to_json(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "shift_deg": self.shift_deg,
            "inverted": self.inverted,
            "rms_deg": self.rms_deg,
            "max_deg": self.max_deg,
            "phase_known": self.phase_known,
        }


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
    #: the cam phase over time, its holds and moves (``analysis.phaser``)
    phaser: PhaserResult | None = None
    #: the phaser's valve command and how the cam followed it, when it was recorded
    actuator: ActuatorResult | None = None
    #: pattern-library cam patterns that fit this cam, best first (empty: none fits)
    library: tuple[CamPatternMatch, ...] = ()

    def to_json(self) -> dict[str, Any]:
        return {
            "channel": self.channel,
            "sensor": self.sensor,
            "edges": [e.to_json() for e in self.edges],
            "pattern_deg": [list(w) for w in self.pattern],
            "library_matches": [m.to_json() for m in self.library],
            "phase_source": self.phase_source,
            "findings": [f.to_json() for f in self.findings],
            "phaser": self.phaser.to_json() if self.phaser is not None else None,
            "actuator": self.actuator.to_json() if self.actuator is not None else None,
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
    #: (time_s, rpm) per tooth interval (mid-time), thinned to one per time bucket on long captures
    rpm_trace: tuple[tuple[float, float], ...] = ()
    #: every tooth's angle after tooth 1 (deg CA); empty when not known (an N-M wheel is then
    #: drawn from ``positions`` and ``missing``)
    teeth_deg: tuple[float, ...] = ()

    @property
    def pitch_deg(self) -> float:
        return 360.0 / self.positions

    @property
    def is_missing_tooth(self) -> bool:
        """True for an N-M wheel (one gap of ``missing`` teeth)."""
        n = self.positions - self.missing
        if not self.teeth_deg:
            return True
        nominal = [k * 360.0 / self.positions for k in range(n)]
        return len(self.teeth_deg) == n and all(
            abs(a - b) < 1e-6 for a, b in zip(self.teeth_deg, nominal, strict=True)
        )

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
            "teeth_deg": list(self.teeth_deg),
            "rpm_per_tooth": {
                "time_s": [t for t, _ in self.rpm_trace],
                "rpm": [r for _, r in self.rpm_trace],
            },
            "findings": [f.to_json() for f in self.findings],
        }
        if self.jitter is not None:
            d["jitter"] = self.jitter.to_json()
        return d


@dataclass(frozen=True)
class CamComparison:
    """One cam against its expected positions: the shift common to its edges and the call.

    A belt or chain that jumps moves every edge of a cam together, so the common shift is the
    cam's answer; each edge also carries its own :class:`EdgeComparison`.
    """

    #: cam name from the profile (or the reference capture's channel name)
    name: str
    #: channel of this capture the cam was found on; None when no decoded cam matched
    channel: str | None
    #: common shift of the cam's edges (mean of their deviations), deg CA, + = late
    shift_deg: float
    #: standard uncertainty of the shift (1 sigma), deg CA
    uncertainty_deg: float
    #: shift / crank pitch
    shift_trigger_teeth: float
    #: shift / (720 / T), when T is known
    shift_drive_teeth: float | None
    #: "in-time", "drifted", "off-by-teeth", or "not-measured" (no decoded cam matched)
    status: str
    off_by_teeth: int | None
    #: "drive" or "trigger" when ``off_by_teeth`` is set
    tooth_kind: str | None
    tolerance_deg: float
    #: teeth T on the cam drive sprocket, when known
    sprocket_teeth: int | None
    #: 720.0 when compared on the cycle, 360.0 when per revolution
    period_deg: float
    #: expected edges matched with a measured edge / expected edges
    matched: int
    expected: int
    #: the call in the trade's words, e.g. "intake cam 1 drive tooth late (17.1 deg CA retarded)"
    sentence: str
    #: SAE J2012 crankshaft/camshaft position correlation code for this cam's bank and sensor,
    #: when the profile names them and the cam is out of tolerance
    correlation_code: str | None = None

    def to_json(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "channel": self.channel,
            "shift_deg": self.shift_deg,
            "uncertainty_deg": self.uncertainty_deg,
            "shift_trigger_teeth": self.shift_trigger_teeth,
            "shift_drive_teeth": self.shift_drive_teeth,
            "status": self.status,
            "off_by_teeth": self.off_by_teeth,
            "tooth_kind": self.tooth_kind,
            "tolerance_deg": self.tolerance_deg,
            "sprocket_teeth": self.sprocket_teeth,
            "compared_on_deg": self.period_deg,
            "matched": self.matched,
            "expected": self.expected,
            "sentence": self.sentence,
            "correlation_code": self.correlation_code,
        }


@dataclass(frozen=True)
class Verdict:
    """The timing verdict of a decode compared with an engine profile or a known-good capture."""

    #: what was compared with: a profile file, a shipped profile name or a reference JSON path
    reference: str
    #: "profile" or "known-good capture"
    reference_kind: str
    #: the profile's name
    profile_name: str
    #: tolerance applied where the profile gives none for a cam, deg CA
    tolerance_deg: float
    #: teeth on the cam drive sprocket (profile or command line), when known
    sprocket_teeth: int | None
    #: "belt", "chain" or "gear", when the profile says
    drive: str | None
    #: angle from the crank reference event to TDC of cylinder 1, when the profile gives it
    tdc_after_reference_deg: float | None
    #: mean engine speed of the capture the verdict was measured at, rpm
    rpm: float
    cams: tuple[CamComparison, ...]
    #: the verdict in words: one sentence per cam, then what the cams tell together
    sentences: tuple[str, ...]
    #: background worth knowing (the diagnostic trouble code family such a fault sets)
    context: tuple[str, ...] = ()
    findings: tuple[Finding, ...] = ()

    @property
    def in_time(self) -> bool:
        """True when every compared cam is in time."""
        return all(c.status in ("in-time", "not-measured") for c in self.cams)

    def to_json(self) -> dict[str, Any]:
        return {
            "reference": self.reference,
            "reference_kind": self.reference_kind,
            "profile_name": self.profile_name,
            "tolerance_deg": self.tolerance_deg,
            "sprocket_teeth": self.sprocket_teeth,
            "drive": self.drive,
            "tdc_after_reference_deg": self.tdc_after_reference_deg,
            "rpm": self.rpm,
            "in_time": self.in_time,
            "cams": [c.to_json() for c in self.cams],
            "sentences": list(self.sentences),
            "context": list(self.context),
            "findings": [f.to_json() for f in self.findings],
        }


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
    #: the timing verdict, after a comparison with an engine profile or a known-good capture
    verdict: Verdict | None = None
    #: every actuator (valve command) channel, paired with a cam or not
    actuators: tuple[ActuatorResult, ...] = ()

    @property
    def all_findings(self) -> list[Finding]:
        out = list(self.findings) + list(self.crank.findings)
        for c in self.cams:
            out.extend(c.findings)
        for a in self.actuators:
            out.extend(a.findings)
        if self.verdict is not None:
            out.extend(self.verdict.findings)
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
            "actuators": [a.to_json() for a in self.actuators],
            "findings": [f.to_json() for f in self.findings],
            "choices": dict(self.choices),
            **({"verdict": self.verdict.to_json()} if self.verdict is not None else {}),
        }
