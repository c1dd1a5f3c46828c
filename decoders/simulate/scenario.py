"""What a simulated capture contains: frozen dataclasses, their plain-dict (JSON) form, checks.

A :class:`Scenario` describes an engine (cylinder count, speed profile), its crank wheel and cams
with their sensors, the disturbances, the wiring of the channels and the instrument that records
them. Every class checks its own fields when built and raises
:class:`~toothcomb.decoders.errors.UsageError` naming the field and quoting the value;
:meth:`Scenario.from_dict` adds the path of the field (``cams[1].offset_deg``) and rejects keys it
does not know.

Angle convention (crank degrees, deg CA): the engine angle ``theta`` grows with rotation;
``theta = 0`` is top dead centre of cylinder 1 at the start of its power stroke (firing TDC), so
``theta mod 720`` is the position in the four-stroke cycle. Cylinder ``i`` (0-based, in firing
order) reaches firing TDC at ``i * 720 / n_cyl``. The crank wheel turns once per 360 deg CA and
the camshaft once per 720 deg CA; cam patterns and phases are given in crank degrees.

>>> s = Scenario.from_dict({"duration_s": 0.5, "speed": {"kind": "constant", "rpm": 1200}})
>>> s.speed.rpm, s.crank.wheel, [c.name for c in s.resolved_channels()]
(1200.0, '60-2', ['crank', 'cam_intake'])
>>> Scenario.from_dict(s.to_dict()) == s
True
"""

from __future__ import annotations

import dataclasses
import itertools
import math
import re
import types
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, Literal, Union, get_args, get_origin, get_type_hints

import numpy as np

from ..errors import UsageError

# --------------------------------------------------------------------------------------------
# small checkers: each names the field, quotes the value and says what would work


def _finite(name: str, value: float) -> None:
    if not math.isfinite(value):
        raise UsageError(f"{name} {value!r} is not a finite number; give a finite value")


def _positive(name: str, value: float, unit: str = "") -> None:
    _finite(name, value)
    if value <= 0:
        raise UsageError(f"{name} {value!r} must be greater than 0{unit}")


def _non_negative(name: str, value: float) -> None:
    _finite(name, value)
    if value < 0:
        raise UsageError(f"{name} {value!r} must be 0 or more")


def _between(name: str, value: float, lo: float, hi: float, what: str = "") -> None:
    _finite(name, value)
    if not lo <= value <= hi:
        raise UsageError(f"{name} {value!r} is outside {lo:g}..{hi:g}{what}; give a value inside")


def _fraction(name: str, value: float, why: str) -> None:
    _finite(name, value)
    if not 0.0 <= value < 1.0:
        raise UsageError(f"{name} {value!r} {why}; use a value in 0 <= {name} < 1")


def _deep_tuple(v: Any) -> Any:
    return tuple(_deep_tuple(x) for x in v) if isinstance(v, list | tuple) else v


def _tuples(obj: Any) -> None:
    """Turn lists given for sequence fields into tuples, so a scenario built in Python from lists
    stays hashable and equals the one built from a dict."""
    for f in dataclasses.fields(obj):
        v = getattr(obj, f.name)
        if isinstance(v, list):
            object.__setattr__(obj, f.name, _deep_tuple(v))


# --------------------------------------------------------------------------------------------
# speed profiles


@dataclass(frozen=True)
class _Ripple:
    """Angle-synchronous speed ripple shared by every speed profile.

    The instantaneous speed is ``rpm(t, theta) = base(t) * (1 - a*cos(psi)) / sqrt(1 - a**2)``
    with ``psi = 2*pi*order*(theta - ripple_phase_deg)/360``: ``a`` = :attr:`ripple`. The factor
    ``1/sqrt(1 - a**2)`` makes the time average of the speed equal ``base`` (at constant base),
    and the speed is lowest at ``ripple_phase_deg + k*360/order``.
    """

    #: relative ripple amplitude a, 0 <= a < 1 (a >= 1 would stop or reverse the engine)
    ripple: float = 0.0
    #: ripple cycles per crank revolution; None: the firing order n_cyl/2
    ripple_order: float | None = None
    #: crank angle of the speed minimum (default 0: at each firing TDC)
    ripple_phase_deg: float = 0.0

    def _check_ripple(self) -> None:
        _fraction(
            "ripple",
            self.ripple,
            "would drive rpm to or below 0 (rpm = base*(1 - ripple*cos(psi))/sqrt(1 - ripple**2))",
        )
        if self.ripple_order is not None:
            _between("ripple_order", self.ripple_order, 0.25, 32.0, " cycles per revolution")
        _finite("ripple_phase_deg", self.ripple_phase_deg)


@dataclass(frozen=True)
class ConstantSpeed(_Ripple):
    """The same mean speed all the time.

    >>> ConstantSpeed(rpm=3000.0).rpm
    3000.0
    """

    kind: Literal["constant"] = "constant"
    #: mean engine speed, rpm
    rpm: float = 800.0

    def __post_init__(self) -> None:
        _between("rpm", self.rpm, 1.0, 30000.0, " rpm")
        self._check_ripple()


@dataclass(frozen=True)
class IdleSpeed(_Ripple):
    """Idle: a small firing ripple plus a slow seeded random walk of the mean speed.

    The walk is an Ornstein-Uhlenbeck process (standard deviation :attr:`walk_rpm`, correlation
    time :attr:`walk_time_s`) drawn at knots a quarter of the correlation time apart, clipped to
    +-3 standard deviations and joined by a monotone cubic (PCHIP), so it never overshoots.
    """

    kind: Literal["idle"] = "idle"
    rpm: float = 800.0
    #: standard deviation of the slow wander of the mean speed, rpm
    walk_rpm: float = 10.0
    #: correlation time of the wander, seconds
    walk_time_s: float = 2.0
    ripple: float = 0.03

    def __post_init__(self) -> None:
        _between("rpm", self.rpm, 1.0, 30000.0, " rpm")
        _non_negative("walk_rpm", self.walk_rpm)
        _between("walk_time_s", self.walk_time_s, 0.01, 3600.0, " s")
        if self.rpm - 3.0 * self.walk_rpm <= 0:
            raise UsageError(
                f"walk_rpm {self.walk_rpm!r} lets the idle speed wander to 0 rpm "
                f"(3 x walk_rpm >= rpm {self.rpm!r}); use walk_rpm below {self.rpm / 3:g}"
            )
        self._check_ripple()


@dataclass(frozen=True)
class RampSpeed(_Ripple):
    """Linear change of speed between two times, constant before and after."""

    kind: Literal["ramp"] = "ramp"
    rpm_start: float = 800.0
    rpm_end: float = 3000.0
    t_start_s: float = 0.1
    t_end_s: float = 0.9

    def __post_init__(self) -> None:
        _between("rpm_start", self.rpm_start, 1.0, 30000.0, " rpm")
        _between("rpm_end", self.rpm_end, 1.0, 30000.0, " rpm")
        _finite("t_start_s", self.t_start_s)
        _finite("t_end_s", self.t_end_s)
        if self.t_end_s <= self.t_start_s:
            raise UsageError(
                f"t_end_s {self.t_end_s!r} is not after t_start_s {self.t_start_s!r}; "
                "give a ramp end later than its start"
            )
        self._check_ripple()


@dataclass(frozen=True)
class CrankingSpeed(_Ripple):
    """Starter cranking: low mean speed with a strong compression ripple locked to the angle."""

    kind: Literal["cranking"] = "cranking"
    #: mean cranking speed, rpm (starters turn engines at roughly 150..300 rpm)
    rpm: float = 200.0
    ripple: float = 0.2

    def __post_init__(self) -> None:
        _between("rpm", self.rpm, 1.0, 2000.0, " rpm")
        self._check_ripple()


@dataclass(frozen=True)
class SnapSpeed(_Ripple):
    """Throttle snap: smooth rise to a peak, hold, smooth fall back (cubic smoothstep flanks)."""

    kind: Literal["snap"] = "snap"
    rpm: float = 900.0
    peak_rpm: float = 4500.0
    t_start_s: float = 0.2
    rise_s: float = 0.3
    hold_s: float = 0.2
    fall_s: float = 0.8

    def __post_init__(self) -> None:
        _between("rpm", self.rpm, 1.0, 30000.0, " rpm")
        _between("peak_rpm", self.peak_rpm, 1.0, 30000.0, " rpm")
        _finite("t_start_s", self.t_start_s)
        _positive("rise_s", self.rise_s, " s")
        _non_negative("hold_s", self.hold_s)
        _positive("fall_s", self.fall_s, " s")
        self._check_ripple()


@dataclass(frozen=True)
class CoastSpeed(_Ripple):
    """Coast-down after switch-off: constant, then an exponential decay of the speed."""

    kind: Literal["coast"] = "coast"
    #: speed before switch-off, rpm
    rpm: float = 800.0
    #: switch-off time, seconds
    t_off_s: float = 0.1
    #: time constant of the decay, seconds
    tau_s: float = 0.5

    def __post_init__(self) -> None:
        _between("rpm", self.rpm, 1.0, 30000.0, " rpm")
        _finite("t_off_s", self.t_off_s)
        _positive("tau_s", self.tau_s, " s")
        self._check_ripple()


SpeedProfile = ConstantSpeed | IdleSpeed | RampSpeed | CrankingSpeed | SnapSpeed | CoastSpeed

# --------------------------------------------------------------------------------------------
# sensors


@dataclass(frozen=True)
class HallSensor:
    """A Hall (digital) sensor: two output levels and a first-order response.

    The output starts to move at the physical flank and follows
    ``1 - exp(-(t - t_flank)/tau_s)``, so its 50 % point lags the flank by ``tau_s * ln 2``.
    """

    kind: Literal["hall"] = "hall"
    #: the two output levels, volts
    low_v: float = 0.0
    high_v: float = 5.0
    #: output level while a tooth (or cam window) faces the sensor
    tooth_level: Literal["high", "low"] = "high"
    #: time constant of the output transition, seconds (0: ideal step)
    tau_s: float = 2e-6

    def __post_init__(self) -> None:
        _finite("low_v", self.low_v)
        _finite("high_v", self.high_v)
        if self.high_v <= self.low_v:
            raise UsageError(
                f"high_v {self.high_v!r} is not above low_v {self.low_v!r}; "
                "give the higher output level as high_v"
            )
        _between("tau_s", self.tau_s, 0.0, 0.01, " s")


@dataclass(frozen=True)
class VrSensor:
    """A variable-reluctance sensor: voltage proportional to d(flux)/dt.

    The flux is a sum of smooth bumps ``(1 - u**2)**4`` (``|u| < 1``), one per tooth centre, so
    the voltage is exactly 0 at each tooth centre, positive while a tooth approaches, and its
    amplitude grows with speed (Faraday's law). A missing tooth has no bump, so the gap gives a
    larger swing.
    """

    kind: Literal["vr"] = "vr"
    #: peak voltage at a steady 200 rpm of a regular crank tooth away from the gap, or of the
    #: narrowest cam tooth standing alone
    peak_v_at_200rpm: float = 1.0
    #: crank wheel: half-width of each flux bump in pitches (<= 1 keeps every centre crossing exact)
    spread: float = 1.0
    #: cam: half-width of a flux bump beyond half the tooth width, deg CA
    fringe_deg: float = 8.0
    #: clamp of the output (input protection), volts; None: no clamp
    clamp_v: float | None = None
    #: "hard": clip at +-clamp_v; "soft": clamp_v * tanh(v / clamp_v)
    clamp: Literal["hard", "soft"] = "hard"

    def __post_init__(self) -> None:
        _positive("peak_v_at_200rpm", self.peak_v_at_200rpm, " V")
        _finite("spread", self.spread)
        if not 0.1 <= self.spread <= 1.0:
            raise UsageError(
                f"spread {self.spread!r} is outside 0.1..1 pitches; above 1 a tooth's flux would "
                "reach its neighbour's centre, so give a value inside"
            )
        _positive("fringe_deg", self.fringe_deg, " deg CA")
        if self.clamp_v is not None:
            _positive("clamp_v", self.clamp_v, " V")


Sensor = HallSensor | VrSensor

# --------------------------------------------------------------------------------------------
# crank wheel

_NM = re.compile(r"^\s*(\d+)\s*-\s*(\d+)\s*$")


def parse_nm(text: str) -> tuple[int, int]:
    """Parse trade notation ``"N-M"`` into (N, M).

    >>> parse_nm("60-2")
    (60, 2)
    """
    m = _NM.match(text)
    if not m:
        raise UsageError(
            f"wheel {text!r} is not in N-M notation; write it like '60-2' or '36-1', "
            "or give teeth_deg for other shapes"
        )
    n, k = int(m.group(1)), int(m.group(2))
    if not (4 <= n <= 720 and 1 <= k <= n - 3):
        raise UsageError(f"wheel {text!r} is not a usable N-M wheel; N must be 4..720 and M 1..N-3")
    return n, k


def _library_teeth(name: str) -> tuple[float, ...] | None:
    """Tooth angles of a crank wheel from the pattern library (a name or a .toml path), or
    None when the library has no such wheel."""
    from ..wheels.pattern import PatternWheel

    spec = PatternWheel.parse(name)
    if spec is None:
        return None
    return tuple(float(a) for a in spec.teeth_deg)


@dataclass(frozen=True)
class DamagedTooth:
    """A damaged crank tooth: ``weak`` (smaller VR flux bump; a Hall sensor does not notice) or
    ``missing`` (broken off)."""

    #: tooth number (1 = first tooth after the gap; tooth 1 itself cannot be damaged)
    tooth: int = 10
    kind: Literal["weak", "missing"] = "weak"
    #: VR flux bump of a weak tooth relative to a good one
    amplitude: float = 0.3

    def __post_init__(self) -> None:
        if self.tooth < 2:
            raise UsageError(
                f"tooth {self.tooth!r} cannot be damaged: tooth 1 defines the reference event; "
                "damage tooth 2 or later"
            )
        _between("amplitude", self.amplitude, 0.0, 1.0)


@dataclass(frozen=True)
class Runt:
    """A narrow extra tooth (runt pulse) in the gap, next to the last tooth before it."""

    #: centre of the runt after the centre of the last tooth before the gap, deg CA
    #: (None: one pitch, i.e. the first missing position)
    offset_deg: float | None = None
    #: width of the runt, deg CA (None: a quarter pitch)
    width_deg: float | None = None
    #: VR flux bump of the runt relative to a full tooth
    amplitude: float = 0.3

    def __post_init__(self) -> None:
        if self.offset_deg is not None:
            _positive("offset_deg", self.offset_deg, " deg CA")
        if self.width_deg is not None:
            _positive("width_deg", self.width_deg, " deg CA")
        _between("amplitude", self.amplitude, 0.0, 1.0)


@dataclass(frozen=True)
class CrankWheel:
    """The crank trigger wheel, its sensor and its defects.

    Tooth ``k`` (1-based; tooth 1 is the first tooth after the gap in the direction of rotation)
    has its centre at engine angle ``tooth1_deg + (k - 1) * pitch`` for an N-M wheel, or at
    ``tooth1_deg + teeth_deg[k - 1]`` for a wheel given by a tooth list.
    """

    #: trade notation N-M; with :attr:`teeth_deg` only a label
    wheel: str = "60-2"
    #: other wheel shapes: tooth centres after tooth 1's centre, deg CA (first 0, rising, < 360)
    teeth_deg: tuple[float, ...] = ()
    #: engine angle of tooth 1's centre, deg CA
    tooth1_deg: float = 0.0
    #: tooth width as a fraction of the pitch
    duty: float = 0.5
    sensor: Sensor = field(default_factory=VrSensor)
    damaged: tuple[DamagedTooth, ...] = ()
    runt: Runt | None = None
    #: extra width of the last tooth before the gap (its trailing flank moves into the gap), deg
    wide_tooth_deg: float = 0.0
    #: runout: each tooth's VR bump is scaled by 1 + runout*cos(centre - runout_phase_deg), once
    #: per revolution (the centre crossings stay exact; a Hall sensor does not notice)
    runout: float = 0.0
    runout_phase_deg: float = 0.0

    def __post_init__(self) -> None:
        _tuples(self)
        if self.teeth_deg:
            t = self.teeth_deg
            for v in t:
                _finite("teeth_deg", v)
            if t[0] != 0.0:
                raise UsageError(
                    f"teeth_deg starts at {t[0]!r}; the list gives centres after tooth 1's centre, "
                    "so its first entry must be 0"
                )
            if len(t) < 2 or any(b <= a for a, b in itertools.pairwise(t)) or t[-1] >= 360:
                raise UsageError(
                    f"teeth_deg {list(t)!r} must hold at least 2 strictly rising angles below 360"
                )
        elif not _NM.match(self.wheel) and (lib := _library_teeth(self.wheel)) is not None:
            object.__setattr__(self, "teeth_deg", lib)
        else:
            parse_nm(self.wheel)
        _finite("tooth1_deg", self.tooth1_deg)
        if not 0.05 <= self.duty <= 0.95:
            raise UsageError(f"duty {self.duty!r} is outside 0.05..0.95; give a tooth duty inside")
        seen = set()
        for d in self.damaged:
            if d.tooth > self.n_teeth:
                raise UsageError(
                    f"damaged tooth {d.tooth!r} does not exist; the wheel has teeth "
                    f"1..{self.n_teeth}"
                )
            if d.tooth in seen:
                raise UsageError(f"damaged tooth {d.tooth!r} is listed twice; list it once")
            seen.add(d.tooth)
        _non_negative("wide_tooth_deg", self.wide_tooth_deg)
        _fraction("runout", self.runout, "would make a bump vanish or reverse")
        _finite("runout_phase_deg", self.runout_phase_deg)

    @property
    def offsets_deg(self) -> tuple[float, ...]:
        """Tooth centres after tooth 1's centre, deg CA."""
        if self.teeth_deg:
            return tuple(float(v) for v in self.teeth_deg)
        n, m = parse_nm(self.wheel)
        return tuple(k * 360.0 / n for k in range(n - m))

    @property
    def n_teeth(self) -> int:
        """Teeth on the wheel (N - M for an N-M wheel)."""
        return len(self.offsets_deg)

    @property
    def positions(self) -> int:
        """Equally spaced tooth positions N (a tooth list: 360 / smallest spacing, rounded)."""
        if not self.teeth_deg:
            return parse_nm(self.wheel)[0]
        t = [*self.teeth_deg, 360.0]
        return max(1, round(360.0 / min(b - a for a, b in itertools.pairwise(t))))

    @property
    def missing(self) -> int:
        """Missing positions M."""
        return self.positions - self.n_teeth

    @property
    def pitch_deg(self) -> float:
        return 360.0 / self.positions

    @property
    def label(self) -> str:
        """Trade notation (or the label of a tooth-list wheel)."""
        return self.wheel if not self.teeth_deg else (self.wheel or "custom")


# --------------------------------------------------------------------------------------------
# cams


@dataclass(frozen=True)
class PhaserMove:
    """One move of a cam phaser, from wherever the phaser is at ``t_s``.

    ``step``: first-order approach ``to + (from - to)*exp(-(t - t_s)/tau_s)``;
    ``ramp``: straight line to ``to_deg`` over ``duration_s``, then hold.
    """

    kind: Literal["step", "ramp"] = "step"
    t_s: float = 0.0
    #: target phase, deg CA (positive = retarded = later)
    to_deg: float = 0.0
    tau_s: float = 0.05
    duration_s: float = 0.2

    def __post_init__(self) -> None:
        _tuples(self)
        _finite("t_s", self.t_s)
        _between("to_deg", self.to_deg, -180.0, 180.0, " deg CA")
        _positive("tau_s", self.tau_s, " s")
        _positive("duration_s", self.duration_s, " s")


@dataclass(frozen=True)
class Phaser:
    """A cam phaser: its phase at the start and the moves it makes (holds in between).

    A hunting phaser (its control loop oscillating while it should hold) adds
    ``hunt_deg * sin(2 pi hunt_hz (t - hunt_from_s))`` between ``hunt_from_s`` and
    ``hunt_to_s`` (0: to the end of the capture).
    """

    initial_deg: float = 0.0
    moves: tuple[PhaserMove, ...] = ()
    #: amplitude of a hunting oscillation, deg CA (0: none)
    hunt_deg: float = 0.0
    hunt_hz: float = 2.0
    hunt_from_s: float = 0.0
    hunt_to_s: float = 0.0

    def __post_init__(self) -> None:
        _between("initial_deg", self.initial_deg, -180.0, 180.0, " deg CA")
        _between("hunt_deg", self.hunt_deg, 0.0, 90.0, " deg CA")
        _positive("hunt_hz", self.hunt_hz, " Hz")
        _finite("hunt_from_s", self.hunt_from_s)
        _finite("hunt_to_s", self.hunt_to_s)
        times = [m.t_s for m in self.moves]
        if times != sorted(times):
            raise UsageError(f"moves start at {times!r}; list the moves in time order")


@dataclass(frozen=True)
class ValveDrive:
    """The oil control valve of a cam phaser, driven by PWM, and how the phaser follows it.

    The engine computer switches the valve solenoid at ``hz`` with an on-time share (duty) that
    steps through ``duty_pct`` ((time_s, duty %) pairs, each held until the next). A
    **low-side** driver switches the solenoid's ground: the recorded low side sits near 0 V while
    on and at battery voltage while off, with the solenoid's flyback spike (``flyback_v`` above
    battery, decaying with ``flyback_tau_s``) at each turn-off. A **high-side** driver switches
    its supply: battery while on, 0 V off, the spike going ``flyback_v`` below ground. The
    battery carries alternator ripple.

    The phaser turns at ``gain_deg_s_per_pct * (duty - hold_pct)`` deg CA/s (outside a
    ``deadband_pct`` around the hold duty, at most ``max_rate_deg_s``), ``delay_s`` after the
    valve is commanded, between end stops ``stops_deg`` (deg CA from park, + = retarded). More
    duty than hold **advances** the cam (moves it to earlier, negative phase), unless
    ``wrong_way``. ``stuck`` holds it at park whatever the command.
    """

    hz: float = 250.0
    duty_pct: tuple[tuple[float, float], ...] = ((0.0, 50.0),)
    drive: Literal["low-side", "high-side"] = "low-side"
    battery_v: float = 13.8
    ripple_v: float = 0.15
    ripple_hz: float = 700.0
    on_v: float = 0.3
    flyback_v: float = 30.0
    flyback_tau_s: float = 40e-6
    #: time constant of the switching edges, s
    edge_tau_s: float = 2e-6
    hold_pct: float = 50.0
    gain_deg_s_per_pct: float = 8.0
    max_rate_deg_s: float = 400.0
    deadband_pct: float = 1.0
    delay_s: float = 0.03
    stops_deg: tuple[float, float] = (-45.0, 0.0)
    stuck: bool = False
    wrong_way: bool = False

    def __post_init__(self) -> None:
        _tuples(self)
        _positive("hz", self.hz, " Hz")
        if not self.duty_pct:
            raise UsageError("duty_pct is empty; give at least one (time_s, duty %) pair")
        times = [t for t, _ in self.duty_pct]
        if times != sorted(times):
            raise UsageError(f"duty_pct times {times!r} are not in order; sort them")
        for _, d in self.duty_pct:
            _between("duty_pct", d, 0.0, 100.0, " %")
        _positive("battery_v", self.battery_v, " V")
        _non_negative("ripple_v", self.ripple_v)
        _positive("ripple_hz", self.ripple_hz, " Hz")
        _non_negative("flyback_v", self.flyback_v)
        _positive("flyback_tau_s", self.flyback_tau_s, " s")
        _positive("edge_tau_s", self.edge_tau_s, " s")
        _between("hold_pct", self.hold_pct, 0.0, 100.0, " %")
        _non_negative("gain_deg_s_per_pct", self.gain_deg_s_per_pct)
        _positive("max_rate_deg_s", self.max_rate_deg_s, " deg CA/s")
        _non_negative("deadband_pct", self.deadband_pct)
        _non_negative("delay_s", self.delay_s)
        lo, hi = self.stops_deg
        if not lo <= 0.0 <= hi:
            raise UsageError(
                f"stops_deg {list(self.stops_deg)!r} must hold park (0); give (low <= 0 <= high)"
            )

    def duty_at(self, t: np.ndarray) -> np.ndarray:
        """Commanded duty (%) at times ``t`` (the first value before the first step)."""
        times = np.array([x for x, _ in self.duty_pct])
        vals = np.array([d for _, d in self.duty_pct])
        k = np.clip(np.searchsorted(times, t, side="right") - 1, 0, len(vals) - 1)
        return vals[k]


@dataclass(frozen=True)
class Cam:
    """A camshaft, its trigger pattern, sensor and phase.

    The cam phase ``phi(t) = offset_deg + jumped_teeth*720/sprocket_teeth + phaser(t)``
    (deg CA, positive = retarded = events later): an edge at pattern angle ``a`` happens when
    ``theta - phi(t) = a (mod 720)``.
    """

    #: role name of the cam ("cam_intake", "cam_exhaust", ...)
    name: str = "cam_intake"
    #: teeth/windows as [start, end] cycle degrees (start in 0..720, end > start, wraps past 720)
    pattern: tuple[tuple[float, float], ...] = ((90.0, 270.0),)
    sensor: Sensor = field(default_factory=HallSensor)
    #: static phase offset, deg CA (positive = retarded)
    offset_deg: float = 0.0
    #: teeth of the cam drive sprocket (0: unknown); one drive tooth = 720/T deg CA
    sprocket_teeth: int = 0
    #: belt/chain jumped by this many sprocket teeth (positive = retarded)
    jumped_teeth: int = 0
    phaser: Phaser = field(default_factory=Phaser)
    #: the phaser's oil control valve (PWM) and the phaser's response to it; record it on a
    #: channel with ``source = "valve:<cam name>"``. None: the phaser follows ``phaser``
    valve: ValveDrive | None = None

    def __post_init__(self) -> None:
        _tuples(self)
        if not re.match(r"^[A-Za-z][A-Za-z0-9_.-]*$", self.name) or self.name in ("crank", "none"):
            raise UsageError(
                f"name {self.name!r} is not a usable cam name; use letters, digits, '_' or '-' "
                "and not 'crank' or 'none'"
            )
        if not self.pattern:
            raise UsageError("pattern is empty; give at least one [start, end] window")
        if self.valve is not None and self.phaser.moves:
            raise UsageError(
                f"cam {self.name!r} has both phaser moves and a valve; the valve drives the "
                "phaser, so leave out the moves"
            )
        spans = []
        for s, e in self.pattern:
            _finite("pattern", s)
            _finite("pattern", e)
            if not (0.0 <= s < 720.0 and s < e < s + 720.0):
                raise UsageError(
                    f"pattern window {[s, e]!r} is not [start, end] with 0 <= start < 720 and "
                    "start < end < start + 720; give cycle degrees"
                )
            spans.append((s, e))
        spans.sort()
        for (s0, e0), (s1, _e1) in itertools.pairwise([*spans, (spans[0][0] + 720.0, 0.0)]):
            if e0 >= s1:
                raise UsageError(
                    f"pattern windows starting at {s0!r} and {s1 % 720.0!r} overlap or touch; "
                    "leave a gap between windows"
                )
        _between("offset_deg", self.offset_deg, -360.0, 360.0, " deg CA")
        if self.sprocket_teeth < 0 or self.sprocket_teeth > 400:
            raise UsageError(
                f"sprocket_teeth {self.sprocket_teeth!r} is outside 0..400; give the tooth count "
                "of the cam sprocket (0 when unknown)"
            )
        if self.jumped_teeth and not self.sprocket_teeth:
            raise UsageError(
                f"jumped_teeth {self.jumped_teeth!r} needs sprocket_teeth; give the sprocket's "
                "tooth count T (one tooth = 720/T deg CA)"
            )
        if self.sprocket_teeth and abs(self.jumped_teeth) * 720.0 / self.sprocket_teeth > 360:
            raise UsageError(
                f"jumped_teeth {self.jumped_teeth!r} moves the cam more than 360 deg CA; give fewer"
            )

    @staticmethod
    def _prepare_dict(data: dict[str, Any], path: str) -> dict[str, Any]:
        """Let a pattern be given as a shorthand table, e.g. {"kind": "equal", "n": 4, ...}."""
        p = data.get("pattern")
        if isinstance(p, Mapping):
            from .wheel import cam_pattern

            data["pattern"] = [list(w) for w in cam_pattern(p, where=_join(path, "pattern"))]
        return data

    @property
    def jump_deg(self) -> float:
        """Phase shift from the jumped belt/chain, deg CA."""
        return self.jumped_teeth * 720.0 / self.sprocket_teeth if self.sprocket_teeth else 0.0


# --------------------------------------------------------------------------------------------
# channels, disturbances, instrument


@dataclass(frozen=True)
class Dropout:
    """The sensor signal of a channel is gone (reads ``level_v``) for a while."""

    t_s: float = 0.5
    duration_s: float = 0.05
    level_v: float = 0.0

    def __post_init__(self) -> None:
        _finite("t_s", self.t_s)
        _positive("duration_s", self.duration_s, " s")
        _finite("level_v", self.level_v)


@dataclass(frozen=True)
class Channel:
    """One recorded channel: which signal it carries and what the wiring does to it.

    The recorded voltage is ``gain * (sensor + spikes + noise) + offset_v``.
    """

    #: channel name in the capture ("" = the source's name)
    name: str = ""
    #: "crank", a cam name, or "none" (an unconnected input: noise only)
    source: str = "crank"
    gain: float = 1.0
    offset_v: float = 0.0
    #: rms of white Gaussian noise in the capture's band (0..sample_rate/2), volts at the sensor
    noise_v: float = 0.0
    #: VR leads swapped (the signal is inverted)
    reversed: bool = False
    dropouts: tuple[Dropout, ...] = ()
    #: scope input range (low, high), volts; None: the instrument's range or automatic
    range_v: tuple[float, float] | None = None

    def __post_init__(self) -> None:
        _tuples(self)
        _finite("gain", self.gain)
        if self.gain == 0:
            raise UsageError("gain 0 would record nothing; give a non-zero gain")
        _finite("offset_v", self.offset_v)
        _non_negative("noise_v", self.noise_v)
        if self.range_v is not None:
            _check_range("range_v", self.range_v)

    @property
    def label(self) -> str:
        return self.name or self.source


def _check_range(name: str, r: tuple[float, float]) -> None:
    lo, hi = r
    _finite(name, lo)
    _finite(name, hi)
    if hi <= lo:
        raise UsageError(f"{name} {list(r)!r} is not (low, high) with high > low; swap or widen it")


@dataclass(frozen=True)
class IgnitionSpikes:
    """Ignition interference: a short exponential pulse at every firing.

    Cylinder ``i`` fires at engine angle ``i*720/n_cyl + angle_deg`` (negative = before TDC);
    each listed channel gets ``amplitude_v * exp(-(t - t_fire)/tau_s)`` from then on.
    """

    angle_deg: float = -10.0
    amplitude_v: float = 2.0
    tau_s: float = 20e-6
    #: channel names that pick the spikes up (empty: every channel)
    channels: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        _tuples(self)
        _between("angle_deg", self.angle_deg, -360.0, 360.0, " deg CA")
        _finite("amplitude_v", self.amplitude_v)
        _between("tau_s", self.tau_s, 1e-8, 1e-2, " s")


#: default sample formats and files per instrument kind
_INSTRUMENT_DEFAULTS = {
    "scope": {"bits": 8, "format": "csv"},
    "soundcard": {"bits": 16, "format": "wav"},
    "float": {"bits": 0, "format": "hdf5"},
}


@dataclass(frozen=True)
class Instrument:
    """The recorder.

    ``scope``: DC-coupled, sampled at the sample instants, quantised to ``bits`` over each
    channel's range (step = range / 2**bits). ``soundcard``: generated ``oversample`` times
    faster, AC-coupled (first-order high-pass at ``ac_corner_hz``), anti-alias filtered and
    decimated with a delay-compensated linear-phase FIR, clipped at +-1.0 full scale
    (``full_scale_v`` volts) and quantised to ``bits`` (16 or 24). ``float``: sampled, no
    quantisation.
    """

    kind: Literal["scope", "soundcard", "float"] = "float"
    sample_rate: float = 100_000.0
    #: converter bits (None: 8 for a scope, 16 for a sound card)
    bits: int | None = None
    #: scope input range for every channel (volts); None: automatic per channel
    range_v: tuple[float, float] | None = None
    #: sound card AC-coupling corner, Hz (None: 5 Hz; 0: DC-coupled)
    ac_corner_hz: float | None = None
    #: sound card generation rate / sample rate
    oversample: int = 4
    #: sound card: input volts that give full scale (1.0)
    full_scale_v: float = 1.0
    #: preferred file format for writing ("wav", "flac", "csv", "hdf5"; None: by kind)
    format: str | None = None

    def __post_init__(self) -> None:
        _tuples(self)
        _finite("sample_rate", self.sample_rate)
        if self.kind == "soundcard":
            _between("sample_rate", self.sample_rate, 8000.0, 384000.0, " Hz for a sound card")
            if self.bits is not None and self.bits not in (16, 24):
                raise UsageError(f"bits {self.bits!r} is not a sound card depth; use 16 or 24")
            if self.ac_corner_hz is not None and self.ac_corner_hz != 0:
                _between("ac_corner_hz", self.ac_corner_hz, 0.5, 100.0, " Hz")
            _between("oversample", self.oversample, 1, 16)
            _positive("full_scale_v", self.full_scale_v, " V")
        else:
            _between("sample_rate", self.sample_rate, 1000.0, 1e9, " Hz")
            if self.ac_corner_hz:
                raise UsageError(
                    f"ac_corner_hz {self.ac_corner_hz!r} applies to a sound card only; a "
                    f"{self.kind} here is DC-coupled, so leave it out"
                )
        if self.kind == "scope" and self.bits is not None:
            _between("bits", self.bits, 4, 16, " bits")
        if self.range_v is not None:
            _check_range("range_v", self.range_v)

    @property
    def resolved_bits(self) -> int:
        """Converter bits (0 for float)."""
        if self.kind == "float":
            return 0
        return self.bits if self.bits is not None else int(_INSTRUMENT_DEFAULTS[self.kind]["bits"])

    @property
    def resolved_ac_corner_hz(self) -> float:
        """AC-coupling corner in Hz, 0 when DC-coupled."""
        if self.kind != "soundcard":
            return 0.0
        return 5.0 if self.ac_corner_hz is None else float(self.ac_corner_hz)

    @property
    def resolved_format(self) -> str:
        return self.format or str(_INSTRUMENT_DEFAULTS[self.kind]["format"])

    @property
    def units(self) -> str:
        """Unit of the recorded samples: volts, or full scale for a sound card."""
        return "FS" if self.kind == "soundcard" else "V"


# --------------------------------------------------------------------------------------------
# the scenario


@dataclass(frozen=True)
class Scenario:
    """Everything that makes one simulated capture; the same scenario and seed give the same
    samples."""

    duration_s: float = 1.0
    #: seed of every random draw (noise, idle walk)
    seed: int = 0
    n_cyl: int = 4
    #: engine angle theta at t = 0, deg CA
    start_angle_deg: float = 0.0
    speed: SpeedProfile = field(default_factory=ConstantSpeed)
    crank: CrankWheel = field(default_factory=CrankWheel)
    cams: tuple[Cam, ...] = field(default_factory=lambda: (Cam(),))
    #: recorded channels in file order (empty: the crank, then each cam)
    channels: tuple[Channel, ...] = ()
    spikes: IgnitionSpikes | None = None
    instrument: Instrument = field(default_factory=Instrument)
    #: free text carried into the truth and file comments
    name: str = ""
    description: str = ""

    def __post_init__(self) -> None:
        _tuples(self)
        _between("duration_s", self.duration_s, 1e-4, 86400.0, " s")
        if isinstance(self.seed, bool) or not 0 <= self.seed < 2**63:
            raise UsageError(f"seed {self.seed!r} must be an integer 0 <= seed < 2**63")
        if not 1 <= self.n_cyl <= 16:
            raise UsageError(f"n_cyl {self.n_cyl!r} is outside 1..16; give the cylinder count")
        _finite("start_angle_deg", self.start_angle_deg)
        names = [c.name for c in self.cams]
        for n in names:
            if names.count(n) > 1:
                raise UsageError(f"cams: name {n!r} is used twice; give each cam its own name")
        chans = self.resolved_channels()
        if not chans:
            raise UsageError("channels is empty and there is nothing to record; add a channel")
        sources = {"crank", "none", *names, *(f"valve:{c.name}" for c in self.cams if c.valve)}
        labels = [c.label for c in chans]
        for c in chans:
            if c.source not in sources:
                raise UsageError(
                    f"channels: source {c.source!r} is not 'crank', 'none', a cam name "
                    f"({', '.join(names) or 'no cams'}) or 'valve:<cam>' of a cam with a valve; "
                    "give one of those"
                )
            if labels.count(c.label) > 1:
                raise UsageError(
                    f"channels: name {c.label!r} is used twice; name each channel once"
                )
            sensor = self.sensor_of(c.source)
            if c.reversed and (sensor is None or sensor.kind != "vr"):
                raise UsageError(
                    f"channels: reversed is set on {c.label!r}, whose source {c.source!r} is not "
                    "a VR sensor; reversed leads apply to VR sensors only"
                )
        if self.spikes is not None:
            for n in self.spikes.channels:
                if n not in labels:
                    raise UsageError(
                        f"spikes: channel {n!r} is not recorded (channels: {', '.join(labels)})"
                    )
        n = round(self.duration_s * self.instrument.sample_rate)
        if n < 2:
            raise UsageError(
                f"duration_s {self.duration_s!r} gives {n} samples at "
                f"{self.instrument.sample_rate:g} Hz; make it at least 2 samples long"
            )
        # the geometry and motion checks need everything together; they raise UsageError
        from .engine import build_model

        build_model(self)

    # ---- derived
    @property
    def n_samples(self) -> int:
        return round(self.duration_s * self.instrument.sample_rate)

    @property
    def sample_rate(self) -> float:
        return float(self.instrument.sample_rate)

    def resolved_channels(self) -> tuple[Channel, ...]:
        """The recorded channels (defaults filled in), in file order."""
        chans = self.channels or (
            Channel(source="crank"),
            *(Channel(source=c.name) for c in self.cams),
        )
        return tuple(c if c.name else dataclasses.replace(c, name=c.source) for c in chans)

    def sensor_of(self, source: str) -> Sensor | None:
        """The sensor that drives ``source`` ("crank", a cam name; None for "none")."""
        if source == "crank":
            return self.crank.sensor
        for c in self.cams:
            if c.name == source:
                return c.sensor
        return None

    def cam(self, name: str) -> Cam:
        for c in self.cams:
            if c.name == name:
                return c
        have = ", ".join(c.name for c in self.cams)
        raise UsageError(f"cam {name!r} is not in the scenario (it has {have})")

    # ---- dict form
    def to_dict(self) -> dict[str, Any]:
        """Plain dict (JSON-able) that :meth:`from_dict` turns back into an equal scenario."""
        return _to_plain(self)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Scenario:
        """Build a scenario from a plain dict; unknown keys and bad values raise UsageError
        naming the key path."""
        return _build(cls, data, "")

    def replace(self, **changes: Any) -> Scenario:
        """A copy with some top-level fields changed."""
        return dataclasses.replace(self, **changes)


# --------------------------------------------------------------------------------------------
# generic dict <-> dataclass conversion


def _to_plain(obj: Any) -> Any:
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: _to_plain(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, tuple | list):
        return [_to_plain(v) for v in obj]
    return obj


def _join(path: str, key: str) -> str:
    return f"{path}.{key}" if path and not key.startswith("[") else f"{path}{key}"


def _kinds(tp: Any) -> dict[str, type]:
    out = {}
    for alt in get_args(tp):
        if dataclasses.is_dataclass(alt):
            for f in dataclasses.fields(alt):
                if f.name == "kind":
                    out[str(f.default)] = alt
    return out


def _convert(tp: Any, value: Any, path: str) -> Any:
    origin = get_origin(tp)
    if origin in (Union, types.UnionType):
        args = get_args(tp)
        if value is None and type(None) in args:
            return None
        rest = [a for a in args if a is not type(None)]
        if len(rest) == 1:
            return _convert(rest[0], value, path)
        kinds = _kinds(tp)
        if kinds and all(dataclasses.is_dataclass(a) for a in rest):
            if not isinstance(value, Mapping):
                raise UsageError(f"{path} {value!r} is not a table; give a dict with a 'kind' key")
            kind = value.get("kind", next(iter(kinds)))
            if kind not in kinds:
                raise UsageError(
                    f"{_join(path, 'kind')} {kind!r} is unknown; use one of {', '.join(kinds)}"
                )
            return _build(kinds[kind], value, path)
        raise TypeError(f"unsupported annotation {tp!r}")  # pragma: no cover - programming error
    if origin is Literal:
        if value not in get_args(tp):
            allowed = ", ".join(repr(a) for a in get_args(tp))
            raise UsageError(f"{path} {value!r} is not allowed; use one of {allowed}")
        return value
    if origin is tuple:
        args = get_args(tp)
        if isinstance(value, str | bytes) or not isinstance(value, list | tuple):
            raise UsageError(f"{path} {value!r} is not a list; give a list")
        if len(args) == 2 and args[1] is Ellipsis:
            return tuple(_convert(args[0], v, f"{path}[{i}]") for i, v in enumerate(value))
        if len(value) != len(args):
            raise UsageError(f"{path} {value!r} must have {len(args)} entries")
        return tuple(
            _convert(a, v, f"{path}[{i}]") for i, (a, v) in enumerate(zip(args, value, strict=True))
        )
    if dataclasses.is_dataclass(tp):
        return _build(tp, value, path)
    if tp is float:
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise UsageError(f"{path} {value!r} is not a number; give a number")
        return float(value)
    if tp is int:
        if isinstance(value, float) and value.is_integer():
            value = int(value)
        if isinstance(value, bool) or not isinstance(value, int):
            raise UsageError(f"{path} {value!r} is not a whole number; give an integer")
        return value
    if tp is bool:
        if not isinstance(value, bool):
            raise UsageError(f"{path} {value!r} is not true or false; give a boolean")
        return value
    if tp is str:
        if not isinstance(value, str):
            raise UsageError(f"{path} {value!r} is not text; give a string")
        return value
    raise TypeError(f"unsupported annotation {tp!r}")  # pragma: no cover - programming error


def _build(cls: Any, data: Any, path: str) -> Any:
    if isinstance(data, cls):
        return data
    if not isinstance(data, Mapping):
        raise UsageError(f"{path or cls.__name__} {data!r} is not a table; give a dict")
    hints = get_type_hints(cls)
    names = [f.name for f in dataclasses.fields(cls) if f.init]
    unknown = [k for k in data if k not in names]
    if unknown:
        raise UsageError(
            f"{_join(path, str(unknown[0]))} is not a known key; the keys here are "
            f"{', '.join(names)}"
        )
    hook = getattr(cls, "_prepare_dict", None)
    if hook is not None:
        data = hook(dict(data), path)
    data = dict(data)
    for f in dataclasses.fields(cls):
        # a table without "kind" for a field that takes several kinds keeps the default's kind
        given = data.get(f.name)
        if isinstance(given, Mapping) and "kind" not in given and _kinds(hints[f.name]):
            default = f.default_factory() if f.default_factory is not dataclasses.MISSING else None
            if default is not None:
                data[f.name] = {"kind": default.kind, **given}
    kwargs = {k: _convert(hints[k], v, _join(path, k)) for k, v in data.items()}
    try:
        return cls(**kwargs)
    except UsageError as exc:
        if not path:
            raise
        # messages start with the field name; put the path of the table in front of it
        raise UsageError(f"{path}.{exc}") from None
