"""The assembled engine of a scenario: motion, crank wheel, cams, and the signal of each sensor.

:func:`build_model` turns a :class:`~.scenario.Scenario` into the objects that evaluate it (and
checks what only the whole scenario can tell, such as a phaser faster than the engine). Each
:class:`Source` gives its sensor's voltage at any times, and the times of its events.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np

from ..errors import UsageError
from .chain import exp_pulses
from .phase import CamPhase
from .scenario import HallSensor, Scenario, ValveDrive, VrSensor
from .sensors import BUMP_SLOPE_PEAK, FluxWheel, clamp_voltage, comb_peak_slope, step_response
from .speed import Motion, solve_increasing
from .wheel import Geometry, angles_in_range, cam_geometry, crank_geometry

#: 200 rpm in deg CA per second: the speed at which a VR sensor's peak voltage is specified
OMEGA_200 = 1200.0
#: first-order tails are followed for this many time constants
TAIL_TAUS = 45.0

LEADING, TRAILING = 1, -1


@dataclass
class Flanks:
    """Hall flanks of a source inside a time span, in time order."""

    times: np.ndarray
    #: LEADING or TRAILING
    kind: np.ndarray
    #: index into the geometry's arrays
    tooth: np.ndarray
    #: wheel angle of each flank (unwrapped)
    angle: np.ndarray


class Source:
    """One sensor on one wheel: the crank (``phase`` None) or a cam (with its phase)."""

    def __init__(
        self,
        name: str,
        geometry: Geometry,
        sensor: HallSensor | VrSensor,
        motion: Motion,
        phase: CamPhase | None,
        pitch: float | None,
    ) -> None:
        self.name = name
        self.g = geometry
        self.sensor = sensor
        self.motion = motion
        self.phase = phase
        self.period = geometry.period
        n = geometry.start.size
        self._flank_angle = np.concatenate((geometry.start, geometry.end % self.period))
        self._flank_kind = np.concatenate((np.full(n, LEADING), np.full(n, TRAILING)))
        self._flank_tooth = np.concatenate((np.arange(n), np.arange(n)))
        self.flux: FluxWheel | None = None
        self.vr_gain = 0.0
        if isinstance(sensor, VrSensor):
            self.flux = FluxWheel(geometry)
            if pitch is not None:
                ref = comb_peak_slope(pitch, sensor.spread * pitch)
            else:
                ref = BUMP_SLOPE_PEAK / float(np.min(geometry.vr_half))
            #: volts per (flux slope * deg/s)
            self.vr_gain = sensor.peak_v_at_200rpm / (OMEGA_200 * ref)

    # ---- wheel angle
    def angle(self, t: np.ndarray, theta: np.ndarray | None = None) -> np.ndarray:
        """Wheel angle: theta for the crank, theta - phi(t) for a cam, deg CA."""
        th = self.motion.angle(t) if theta is None else theta
        return th if self.phase is None else th - self.phase.value(t)

    def rate(self, t: np.ndarray, omega: np.ndarray | None = None) -> np.ndarray:
        w = self.motion.omega(t) if omega is None else omega
        return w if self.phase is None else w - self.phase.rate(t)

    def times_at(self, angles: np.ndarray, t_lo: float, t_hi: float) -> np.ndarray:
        """Times at which the wheel angle reaches ``angles`` (inside [t_lo, t_hi])."""
        return solve_increasing(lambda t: self.angle(t), lambda t: self.rate(t), angles, t_lo, t_hi)

    def events(self, base: np.ndarray, t_lo: float, t_hi: float) -> tuple[np.ndarray, ...]:
        """Every wheel angle ``base[j] + m*period`` reached in [t_lo, t_hi): (times, angles, j)."""
        lo = float(self.angle(np.array(t_lo)))
        hi = float(self.angle(np.array(t_hi)))
        a, j = angles_in_range(base, self.period, lo, hi)
        return self.times_at(a, t_lo, t_hi), a, j

    def flanks(self, t_lo: float, t_hi: float) -> Flanks:
        t, a, j = self.events(self._flank_angle, t_lo, t_hi)
        return Flanks(t, self._flank_kind[j], self._flank_tooth[j], a)

    def tooth_present(self, x: float) -> bool:
        """Is a tooth (or window) facing the sensor at wheel angle ``x``?"""
        d = (x - self.g.start) % self.period
        return bool(np.any(d < self.g.end - self.g.start))

    # ---- sensor output
    def hall_levels(self) -> tuple[float, float]:
        """(level with no tooth, level with a tooth), volts."""
        s = self.sensor
        assert isinstance(s, HallSensor)
        return (s.low_v, s.high_v) if s.tooth_level == "high" else (s.high_v, s.low_v)

    def output(self, t: np.ndarray, theta: np.ndarray, omega: np.ndarray) -> np.ndarray:
        """Sensor voltage at times ``t`` (sorted), given theta and omega there."""
        if isinstance(self.sensor, HallSensor):
            gap, tooth = self.hall_levels()
            tau = self.sensor.tau_s
            t0 = float(t[0]) - TAIL_TAUS * tau
            t1 = float(t[-1]) + 1e-12  # a flank exactly at the last sample belongs to it
            fl = self.flanks(t0, t1)
            x0 = float(self.angle(np.array(t0)))
            level0 = tooth if self.tooth_present(x0) else gap
            after = np.where(fl.kind == LEADING, tooth, gap).astype(float)
            return step_response(t, fl.times, after, level0, tau)
        assert self.flux is not None
        x = self.angle(t, theta)
        xd = self.rate(t, omega)
        v = self.vr_gain * xd * self.flux.slope(x)
        return clamp_voltage(v, self.sensor.clamp_v, self.sensor.clamp)

    def peak_volts(self, omega_max: float) -> float:
        """Bound of |output| at speeds up to ``omega_max`` deg/s (for automatic scope ranges)."""
        if isinstance(self.sensor, HallSensor):
            return max(abs(self.sensor.low_v), abs(self.sensor.high_v))
        assert self.flux is not None
        v = self.vr_gain * omega_max * self.flux.peak_slope(n=20_001) * 1.01
        return min(v, self.sensor.clamp_v) if self.sensor.clamp_v is not None else v


class ValveSource:
    """The recorded voltage of a phaser's oil control valve solenoid (see
    :class:`~.scenario.ValveDrive`)."""

    flux = None

    def __init__(self, name: str, valve: ValveDrive) -> None:
        self.name = name
        self.valve = valve

    def switch_times(self, t_lo: float, t_hi: float) -> tuple[np.ndarray, np.ndarray]:
        """(turn-on times, turn-off times) of the PWM in [t_lo, t_hi); each period's duty is
        the command at the period's start."""
        v = self.valve
        k0 = math.floor(t_lo * v.hz) - 1
        k1 = math.ceil(t_hi * v.hz) + 1
        starts = np.arange(k0, k1 + 1) / v.hz
        duty = v.duty_at(starts) / 100.0
        on = starts[(duty > 0.0)]
        off = (starts + duty / v.hz)[(duty > 0.0) & (duty < 1.0)]
        return on[(on >= t_lo) & (on < t_hi)], off[(off >= t_lo) & (off < t_hi)]

    def hall_levels(self) -> tuple[float, float]:
        """Lowest and highest voltage the channel can show (for automatic scope ranges)."""
        v = self.valve
        top = v.battery_v + v.ripple_v
        if v.drive == "low-side":
            return min(v.on_v, 0.0), top + v.flyback_v
        return -v.flyback_v, top

    def peak_volts(self, omega_max: float) -> float:
        lo, hi = self.hall_levels()
        return max(abs(lo), abs(hi))

    def output(self, t: np.ndarray, theta: np.ndarray, omega: np.ndarray) -> np.ndarray:
        """Solenoid voltage at times ``t`` (sorted)."""
        v = self.valve
        t0 = float(t[0]) - TAIL_TAUS * max(v.edge_tau_s, v.flyback_tau_s)
        t1 = float(t[-1]) + 1e-12
        on, off = self.switch_times(t0, t1)
        times = np.concatenate((on, off))
        after = np.concatenate((np.ones(on.size), np.zeros(off.size)))
        order = np.argsort(times, kind="stable")
        times, after = times[order], after[order]
        start_on = bool(v.duty_at(np.array([t0]))[0] / 100.0 > ((t0 * v.hz) % 1.0))
        energised = step_response(t, times, after, 1.0 if start_on else 0.0, v.edge_tau_s)
        battery = v.battery_v + v.ripple_v * np.sin(2.0 * np.pi * v.ripple_hz * t)
        if v.drive == "low-side":
            volts = battery - (battery - v.on_v) * energised
            return volts + exp_pulses(t, off, v.flyback_v, v.flyback_tau_s)
        volts = battery * energised
        return volts - exp_pulses(t, off, v.flyback_v, v.flyback_tau_s)


@dataclass
class EngineModel:
    """Everything that evaluates a scenario."""

    scenario: Scenario
    motion: Motion
    crank: Source
    cams: dict[str, Source]
    #: deg/s bound of the engine speed over the capture
    omega_max: float
    valves: dict[str, ValveSource] = field(default_factory=dict)

    def source(self, name: str) -> Source | ValveSource | None:
        if name == "crank":
            return self.crank
        if name.startswith("valve:"):
            return self.valves.get(name)
        return self.cams.get(name)

    def firing_angles(self) -> tuple[np.ndarray, float]:
        """(base angles, period) of the ignition events (one per cylinder per cycle)."""
        sc = self.scenario
        assert sc.spikes is not None
        period = 720.0 / sc.n_cyl
        return np.array([sc.spikes.angle_deg % period]), period

    def spike_times(self, t_lo: float, t_hi: float) -> np.ndarray:
        """Ignition times in [t_lo, t_hi)."""
        base, period = self.firing_angles()
        lo = float(self.motion.angle(t_lo))
        hi = float(self.motion.angle(t_hi))
        a, _ = angles_in_range(base, period, lo, hi)
        return solve_increasing(self.motion.angle, self.motion.omega, a, t_lo, t_hi)


def _omega_bound(motion: Motion, t_end: float) -> float:
    t = np.linspace(-0.01, t_end + 0.01, 4001)
    base = float(np.max(motion.base_rpm(t)))
    a = motion.a
    return 6.0 * base * (1.0 + a) / math.sqrt(1.0 - a * a) * 1.02


def _check_phaser(name: str, src: Source, motion: Motion) -> None:
    assert src.phase is not None
    for (t0, t1), m in zip(src.phase.move_windows(), src.phase.moves, strict=True):
        t = np.linspace(t0, max(t1, t0 + 1e-6), 2001)
        w = motion.omega(t)
        r = np.abs(src.phase.rate(t))
        bad = r > 0.5 * w
        if np.any(bad):
            k = int(np.argmax(bad))
            raise UsageError(
                f"cams: the phaser of {name!r} moving at t_s {m.t_s!r} turns at {r[k]:.4g} deg/s, "
                f"more than half the engine's {w[k]:.4g} deg CA/s then; give it a longer "
                "tau_s or duration_s"
            )


@lru_cache(maxsize=16)
def build_model(scenario: Scenario) -> EngineModel:
    """Assemble (and check) the engine of a scenario; cached per scenario."""
    sc = scenario
    motion = Motion(sc.speed, sc.n_cyl, sc.start_angle_deg, sc.seed, sc.duration_s)
    crank = Source(
        "crank", crank_geometry(sc.crank), sc.crank.sensor, motion, None, sc.crank.pitch_deg
    )
    cams: dict[str, Source] = {}
    for cam in sc.cams:
        src = Source(
            cam.name, cam_geometry(cam), cam.sensor, motion, CamPhase(cam, sc.duration_s), None
        )
        if src.phase is not None and src.phase.moving:
            _check_phaser(cam.name, src, motion)
        cams[cam.name] = src
    valves = {
        f"valve:{cam.name}": ValveSource(f"valve:{cam.name}", cam.valve)
        for cam in sc.cams if cam.valve is not None
    }
    return EngineModel(sc, motion, crank, cams, _omega_bound(motion, sc.duration_s), valves)
