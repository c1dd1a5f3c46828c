"""PWM actuator channels: the oil control valve of a cam phaser, switched by the engine computer.

A solenoid driven by pulse-width modulation is on for a share of every period (the duty). The
recorded voltage shows it two ways, depending on which side the driver switches:

- **low-side** drive (the driver switches the solenoid's ground, the usual case): the recorded
  low side sits near 0 V while the solenoid is on and at battery voltage while it is off; at
  each turn-off the solenoid's inductance kicks the voltage *above* battery (the flyback spike);
- **high-side** drive (the driver switches the supply): battery while on, 0 V while off, the
  flyback spike going *below* ground at each turn-off.

So the side is told by where the spikes go, beyond which plateau; then "on" is the low level
(low-side) or the high level (high-side). Edges come from the Hall front end (a flank's
midpoint, interpolated), which stands the spike: it sits on the flank's far side. Battery
ripple moves a plateau, not the midpoint crossing much.

>>> t_on = np.arange(20) * 0.004                    # 250 Hz
>>> times = np.sort(np.concatenate((t_on, t_on + 0.001)))
>>> d = np.tile([-1, 1], 20)                          # low-side: on = falling
>>> trace = pwm_trace(times, d, on_direction=-1)
>>> round(trace.hz, 6), round(float(np.median(trace.duty_pct)), 6)
(250.0, 25.0)
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from ..model import ChannelLevels, Edges

Drive = Literal["low-side", "high-side"]

#: a spike must reach this share of the plateau-to-plateau step beyond a plateau to tell the
#: drive side (a diode-clamped flyback shows none)
SPIKE_SHARE = 0.25
#: a period longer than this many median periods is a stretch without switching
LONG_PERIOD = 1.5


@dataclass(frozen=True)
class PwmTrace:
    """Every PWM period of a channel: when it began (turn-on), how long, how long on."""

    t_on_s: np.ndarray
    period_s: np.ndarray
    on_s: np.ndarray
    #: frequency from the regular periods, Hz (nan when too few)
    hz: float

    @property
    def duty_pct(self) -> np.ndarray:
        return 100.0 * self.on_s / self.period_s

    def __len__(self) -> int:
        return len(self.t_on_s)


def drive_side(levels: ChannelLevels) -> tuple[Drive | None, str]:
    """Which side the driver switches, told from the flyback spikes beyond the plateaus; None
    when no spike stands out (e.g. a clamped flyback). Also a sentence saying why.

    >>> lv = ChannelLevels("ocv", 1000, 0.2, 43.0, 7.0, 6.0, (0.2, 0.2, 0.3, 0.3, 6.0, 13.8,
    ...                    13.9, 14.5, 30.0), 0.05, 0.0)
    >>> drive_side(lv)[0]
    'low-side'
    """
    lo = levels.percentile(5)
    hi = levels.percentile(95)
    step = hi - lo
    if not step > 0:
        return None, "the channel does not switch between two levels"
    above = levels.maximum - hi
    below = lo - levels.minimum
    if above > SPIKE_SHARE * step and above > 2.0 * below:
        return "low-side", (
            f"spikes reach {above:.1f} above the high level at turn-off: the driver switches "
            "the solenoid's ground (low-side)"
        )
    if below > SPIKE_SHARE * step and below > 2.0 * above:
        return "high-side", (
            f"spikes reach {below:.1f} below the low level at turn-off: the driver switches "
            "the solenoid's supply (high-side)"
        )
    return None, "no flyback spike stands out beyond either level (clamped?)"


def pwm_trace(times: np.ndarray, direction: np.ndarray, on_direction: int) -> PwmTrace:
    """Periods from the edge times of a PWM channel: each period runs from one turn-on to the
    next; its on-time lasts to the turn-off between them (the whole period when none)."""
    times = np.asarray(times, dtype=float)
    direction = np.asarray(direction)
    ons = times[direction == on_direction]
    offs = times[direction == -on_direction]
    if len(ons) < 2:
        e = np.empty(0)
        return PwmTrace(e, e, e, float("nan"))
    start, nxt = ons[:-1], ons[1:]
    period = nxt - start
    k = np.searchsorted(offs, start, side="right")
    has_off = k < len(offs)
    off_t = np.where(has_off, offs[np.minimum(k, len(offs) - 1)], np.inf)
    on = np.where(off_t < nxt, off_t - start, period)
    med = float(np.median(period))
    regular = np.abs(period - med) < 0.05 * med
    hz = 1.0 / float(np.mean(period[regular])) if np.count_nonzero(regular) >= 2 else float("nan")
    return PwmTrace(start, period, on, hz)


class PwmActuator:
    """Plugin: a PWM valve or solenoid command (frequency and duty per period, drive side).

    Streaming: :meth:`add` takes the channel's edges block by block (kept: they are per edge,
    not per sample); :meth:`finish` turns them into periods once the drive side is known.
    """

    name = "pwm"
    handles = "PWM valve/solenoid command: frequency and duty per period, low- or high-side drive"

    def __init__(self) -> None:
        self._t: list[np.ndarray] = []
        self._d: list[np.ndarray] = []

    @staticmethod
    def on_direction_for(drive: Drive | None) -> int:
        """Signal direction of a turn-on: falling for low-side (and when unknown), rising for
        high-side."""
        return 1 if drive == "high-side" else -1

    def add(self, edges: Edges) -> None:
        """Take the next edges of the channel (in time order)."""
        if len(edges):
            self._t.append(np.asarray(edges.times, dtype=float))
            self._d.append(np.asarray(edges.direction))

    def edges(self) -> tuple[np.ndarray, np.ndarray]:
        """All edges taken so far: (times, directions)."""
        if not self._t:
            return np.empty(0), np.empty(0, dtype=int)
        return np.concatenate(self._t), np.concatenate(self._d)

    def finish(self, drive: Drive | None) -> PwmTrace:
        t, d = self.edges()
        return pwm_trace(t, d, self.on_direction_for(drive))


def steady_share(times: np.ndarray, tol: float = 0.003) -> float:
    """Share of the intervals between ``times`` within ``tol`` (relative) of their median.

    >>> steady_share(np.arange(10) * 0.004), steady_share(np.cumsum([1.0, 1.1, 0.9, 1.0]))
    (1.0, 0.3333333333333333)
    """
    if len(times) < 3:
        return 0.0
    iv = np.diff(times)
    med = float(np.median(iv))
    if med <= 0:
        return 0.0
    return float(np.mean(np.abs(iv - med) <= tol * med))


def long_periods(trace: PwmTrace) -> np.ndarray:
    """Mask of periods that are stretches without switching (0 % or 100 % for a while)."""
    if len(trace) == 0:
        return np.zeros(0, dtype=bool)
    return trace.period_s > LONG_PERIOD * float(np.median(trace.period_s))
