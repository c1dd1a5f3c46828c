"""Cam phase over time: static offset, jumped belt/chain, and a phaser that moves.

``phi(t) = offset_deg + jumped_teeth * 720 / sprocket_teeth + phaser(t)`` in deg CA, positive =
retarded (cam events later). The phaser holds ``initial_deg`` until its first move; each move
starts from wherever the phaser is at that moment (so a move may interrupt the previous one).

>>> cam = Cam(phaser=Phaser(moves=(PhaserMove("step", t_s=1.0, to_deg=20.0, tau_s=0.1),)))
>>> p = CamPhase(cam)
>>> [round(float(v), 6) for v in p.value([0.5, 1.1])]   # 20 * (1 - exp(-1))
[0.0, 12.642411]
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from .scenario import Cam, Phaser, PhaserMove, ValveDrive  # noqa: F401  (doctests)

#: time step of the valve-driven phaser's integration, s
VALVE_STEP_S = 2.5e-4


def valve_trajectory(valve: ValveDrive, t_end: float) -> tuple[np.ndarray, np.ndarray]:
    """(times, phaser position) of a phaser following its valve command, integrated in steps of
    :data:`VALVE_STEP_S` from 0 to ``t_end`` (position piecewise linear between the times).

    >>> v = ValveDrive(duty_pct=((0.0, 50.0), (0.1, 70.0)), gain_deg_s_per_pct=10.0,
    ...                deadband_pct=0.0, delay_s=0.0)
    >>> t, p = valve_trajectory(v, 0.2)
    >>> round(float(np.interp(0.15, t, p)), 6)   # 20 % over hold: -200 deg CA/s for 0.05 s
    -10.0
    """
    n = math.ceil(max(t_end, 0.0) / VALVE_STEP_S) + 2
    t = np.arange(n) * VALVE_STEP_S
    offset = valve.duty_at(t - valve.delay_s) - valve.hold_pct
    offset = np.sign(offset) * np.maximum(np.abs(offset) - valve.deadband_pct, 0.0)
    rate = -valve.gain_deg_s_per_pct * offset  # more duty advances: negative phase
    if valve.wrong_way:
        rate = -rate
    if valve.stuck:
        rate = np.zeros_like(rate)
    rate = np.clip(rate, -valve.max_rate_deg_s, valve.max_rate_deg_s)
    lo, hi = valve.stops_deg
    p = np.empty(n)
    p[0] = 0.0
    x = 0.0
    for k in range(1, n):
        x = min(max(x + rate[k - 1] * VALVE_STEP_S, lo), hi)
        p[k] = x
    return t, p


class CamPhase:
    """Phase of one cam, deg CA, and its rate, evaluated exactly at any time."""

    def __init__(self, cam: Cam, t_end: float = 0.0) -> None:
        self.static_deg = float(cam.offset_deg + cam.jump_deg)
        self.initial_deg = float(cam.phaser.initial_deg)
        self.moves: tuple[PhaserMove, ...] = cam.phaser.moves
        self._t = np.array([m.t_s for m in self.moves], dtype=float)
        starts = []
        p = self.initial_deg
        for i, m in enumerate(self.moves):
            if i > 0:
                p = self._move_value(i - 1, starts[-1], np.array(m.t_s))[()]
            starts.append(float(p))
        #: phaser position at the start of each move
        self.from_deg = tuple(starts)
        ph = cam.phaser
        self._hunt = (float(ph.hunt_deg), float(ph.hunt_hz), float(ph.hunt_from_s),
                      float(ph.hunt_to_s) if ph.hunt_to_s > 0 else math.inf)
        self._valve: tuple[np.ndarray, np.ndarray] | None = None
        if cam.valve is not None:
            self._valve = valve_trajectory(cam.valve, t_end + 1.0)

    def _valve_value(self, t: np.ndarray) -> np.ndarray:
        if self._valve is None:
            return np.zeros_like(t)
        return np.interp(t, *self._valve)

    def _valve_rate(self, t: np.ndarray) -> np.ndarray:
        if self._valve is None:
            return np.zeros_like(t)
        tt, pp = self._valve
        k = np.clip(np.searchsorted(tt, t, side="right") - 1, 0, len(tt) - 2)
        inside = (t >= tt[0]) & (t < tt[-1])
        return np.where(inside, (pp[k + 1] - pp[k]) / (tt[k + 1] - tt[k]), 0.0)

    def _hunt_value(self, t: np.ndarray) -> np.ndarray:
        amp, hz, t0, t1 = self._hunt
        if amp == 0.0:
            return np.zeros_like(t)
        on = (t >= t0) & (t < t1)
        return np.where(on, amp * np.sin(2.0 * np.pi * hz * (t - t0)), 0.0)

    def _hunt_rate(self, t: np.ndarray) -> np.ndarray:
        amp, hz, t0, t1 = self._hunt
        if amp == 0.0:
            return np.zeros_like(t)
        on = (t >= t0) & (t < t1)
        w = 2.0 * np.pi * hz
        return np.where(on, amp * w * np.cos(w * (t - t0)), 0.0)

    @property
    def moving(self) -> bool:
        return bool(self.moves) or self._valve is not None

    def _move_value(self, i: int, p0: float, t: np.ndarray) -> np.ndarray:
        m = self.moves[i]
        d = t - m.t_s
        if m.kind == "step":
            return m.to_deg + (p0 - m.to_deg) * np.exp(-d / m.tau_s)
        return p0 + (m.to_deg - p0) * np.clip(d / m.duration_s, 0.0, 1.0)

    def _move_rate(self, i: int, p0: float, t: np.ndarray) -> np.ndarray:
        m = self.moves[i]
        d = t - m.t_s
        if m.kind == "step":
            return (m.to_deg - p0) / m.tau_s * np.exp(-d / m.tau_s)
        return np.where((d >= 0) & (d < m.duration_s), (m.to_deg - p0) / m.duration_s, 0.0)

    def phaser(self, t: float | Sequence[float] | np.ndarray) -> np.ndarray:
        """Phaser position alone, deg CA."""
        t = np.asarray(t, dtype=float)
        out = np.full_like(t, self.initial_deg)
        out += self._hunt_value(t) + self._valve_value(t)
        if not self.moves:
            return out
        k = np.searchsorted(self._t, t, side="right") - 1
        for i in range(len(self.moves)):
            m = k == i
            if np.any(m):
                out[m] = self._move_value(i, self.from_deg[i], t[m]) + self._hunt_value(t[m])
        return out

    def value(self, t: float | Sequence[float] | np.ndarray) -> np.ndarray:
        """Cam phase phi(t), deg CA (positive = retarded)."""
        return self.static_deg + self.phaser(t)

    def rate(self, t: float | Sequence[float] | np.ndarray) -> np.ndarray:
        """d(phi)/dt, deg CA per second."""
        t = np.asarray(t, dtype=float)
        out = np.zeros_like(t)
        out += self._hunt_rate(t) + self._valve_rate(t)
        if not self.moves:
            return out
        k = np.searchsorted(self._t, t, side="right") - 1
        for i in range(len(self.moves)):
            m = k == i
            if np.any(m):
                out[m] = self._move_rate(i, self.from_deg[i], t[m]) + self._hunt_rate(t[m])
        return out

    def move_windows(self) -> list[tuple[float, float]]:
        """(start, end) of each move; a step 'ends' when 99.99 % of it is done or the next move
        starts."""
        out = []
        for i, m in enumerate(self.moves):
            end = m.t_s + (m.tau_s * math.log(1e4) if m.kind == "step" else m.duration_s)
            if i + 1 < len(self.moves):
                end = min(end, self.moves[i + 1].t_s)
            out.append((m.t_s, end))
        return out

    def summary(self) -> list[dict[str, Any]]:
        """Each move as a JSON-able dict: kind, start/end, from/target/reached, peak rate, 10-90 %
        time (of the full move, as planned)."""
        out = []
        for i, (m, (t0, t1)) in enumerate(zip(self.moves, self.move_windows(), strict=True)):
            p0 = self.from_deg[i]
            reached = float(self._move_value(i, p0, np.array(t1))[()])
            travel = m.to_deg - p0
            if m.kind == "step":
                peak = abs(travel) / m.tau_s
                t1090 = m.tau_s * math.log(9.0)
            else:
                peak = abs(travel) / m.duration_s
                t1090 = 0.8 * m.duration_s
            out.append(
                {
                    "kind": m.kind,
                    "t_start_s": t0,
                    "t_end_s": t1,
                    "from_deg": self.static_deg + p0,
                    "target_deg": self.static_deg + m.to_deg,
                    "to_deg": self.static_deg + reached,
                    "travel_deg": reached - p0,
                    "peak_rate_deg_s": peak,
                    "t10_90_s": t1090,
                    "tau_s": m.tau_s if m.kind == "step" else None,
                    "index": i,
                }
            )
        return out

    def trajectory(self, t_end: float, points_per_move: int = 64) -> list[list[float]]:
        """[time_s, phase_deg] pairs that draw phi(t) over [0, t_end]: the ends, and dense points
        during each move (holds are straight lines between them)."""
        ts = {0.0, float(t_end)}
        if self._valve is not None:
            ts.update(float(x) for x in np.arange(0.0, t_end, 0.005))
        for t0, t1 in self.move_windows():
            for t in np.linspace(t0, t1, points_per_move):
                if 0.0 <= t <= t_end:
                    ts.add(float(t))
        tt = np.array(sorted(ts))
        return [[float(a), float(b)] for a, b in zip(tt, self.value(tt), strict=True)]
