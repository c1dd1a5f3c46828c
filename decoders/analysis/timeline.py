"""Crank angle at any time, interpolated from the decoded teeth.

Within a sync run every accepted tooth gives an exact (time, crank angle) pair. Between them the
angle follows a cubic spline through those pairs (scipy.interpolate.CubicSpline), so speed
changes within a few teeth -- cranking compression ripple, a throttle snap -- are followed
instead of being averaged away as a straight line between two teeth would.

An angle is only given where it is trustworthy: inside a sync run, after its first reference
event, and between teeth that are no further apart than the wheel's own gap.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.interpolate import CubicSpline

from ..wheels.base import ToothTrack


@dataclass(frozen=True)
class AngleLookup:
    """Crank angles of a set of times."""

    #: crank angle within the sync run (deg since its first reference event), nan where invalid
    angle: np.ndarray
    #: sync run index, -1 where invalid
    run: np.ndarray

    @property
    def valid(self) -> np.ndarray:
        return self.run >= 0


class CrankTimeline:
    """Crank angle as a function of time, from a :class:`ToothTrack`.

    >>> from toothcomb.decoders.wheels.missing_tooth import MissingToothSpec, decode_teeth
    >>> t = np.array([r * 360 + k * 10.0 for r in range(3) for k in range(35)]) / 9000.0
    >>> tl = CrankTimeline(decode_teeth(t, MissingToothSpec(36, 1)), max_pitches=2)
    >>> look = tl.angle_at(np.array([400.0 / 9000.0, 0.001]))
    >>> look.angle.round(6).tolist(), look.run.tolist()     # 0.001 s is before the first reference
    ([40.0, nan], [0, -1])
    """

    def __init__(self, track: ToothTrack, max_pitches: int) -> None:
        self.track = track
        #: widest tooth spacing (in pitches) across which an angle is still interpolated
        self.max_pitches = int(max_pitches)
        self._runs: list[tuple[np.ndarray, np.ndarray, np.ndarray, object]] = []
        for idx in track.runs:
            t = track.times[idx]
            a = track.angles[idx]
            p = track.pitches[idx]
            if len(t) >= 4:
                fn: object = CubicSpline(t, a, bc_type="not-a-knot", extrapolate=False)
            else:
                fn = None
            self._runs.append((t, a, p, fn))

    def angle_at(self, times: np.ndarray) -> AngleLookup:
        times = np.asarray(times, dtype=float)
        angle = np.full(len(times), np.nan)
        run = np.full(len(times), -1, dtype=int)
        for r, (t, a, p, fn) in enumerate(self._runs):
            if len(t) < 2:
                continue
            inside = (times >= t[0]) & (times <= t[-1])
            if not np.any(inside):
                continue
            q = times[inside]
            k = np.clip(np.searchsorted(t, q, side="right"), 1, len(t) - 1)
            ok = p[k] <= self.max_pitches
            if fn is not None:
                val = fn(q)
            else:
                val = np.interp(q, t, a)
            ok &= val >= 0.0
            sel = np.flatnonzero(inside)[ok]
            angle[sel] = val[ok]
            run[sel] = r
        return AngleLookup(angle, run)

    def speed_at(self, times: np.ndarray) -> np.ndarray:
        """Crank speed in deg/s at ``times`` (nan outside the runs)."""
        times = np.asarray(times, dtype=float)
        out = np.full(len(times), np.nan)
        for t, a, _p, fn in self._runs:
            if len(t) < 2:
                continue
            inside = (times >= t[0]) & (times <= t[-1])
            if not np.any(inside):
                continue
            if fn is not None:
                out[inside] = fn(times[inside], 1)
            else:
                k = np.clip(np.searchsorted(t, times[inside]), 1, len(t) - 1)
                out[inside] = (a[k] - a[k - 1]) / (t[k] - t[k - 1])
        return out
