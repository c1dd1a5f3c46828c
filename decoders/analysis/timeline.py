"""Crank angle at any time, interpolated from the decoded teeth.

Within a sync run every accepted tooth gives an exact (time, crank angle) pair. Between two teeth
the angle follows the cubic through the four nearest teeth (two before, two after; Lagrange form),
so a speed change within a few teeth -- cranking compression ripple, a throttle snap -- is
followed instead of being averaged away as a straight line between two teeth would. Constant
acceleration (angle quadratic in time) is reproduced exactly.

The interpolation is local: an angle depends only on the four teeth around it. That lets a long
capture be located piece by piece (:class:`CamLocator`) with results that do not depend on where
the pieces were cut.

An angle is only given where it is trustworthy: inside a sync run, after its first reference
event, and between teeth that are no further apart than the wheel's own gap.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..wheels.base import ToothTrack


@dataclass(frozen=True)
class AngleLookup:
    """Crank angles of a set of times."""

    #: crank angle within the sync run (deg since its first reference event), nan where invalid
    angle: np.ndarray
    #: sync run index, -1 where invalid
    run: np.ndarray
    #: crank speed (deg/s) at each time, nan where invalid
    speed: np.ndarray

    @property
    def valid(self) -> np.ndarray:
        return self.run >= 0


def local_cubic(
    q: np.ndarray, t: np.ndarray, a: np.ndarray, k: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Value and slope at ``q`` of the cubic through points ``k-1 .. k+2`` of (t, a), where
    ``t[k] <= q <= t[k+1]``; near the ends of the arrays the points used shift inwards (three or
    two points when fewer exist).

    >>> t = np.array([0.0, 1, 2, 3, 4]); a = 3 * t**2 + t
    >>> v, s = local_cubic(np.array([1.5]), t, a, np.array([1]))
    >>> float(v[0]), float(s[0])          # exact for a polynomial of degree <= 3
    (8.25, 10.0)
    """
    n = len(t)
    m = min(4, n)
    first = np.clip(k - 1, 0, n - m)
    idx = first[:, None] + np.arange(m)[None, :]
    tt = t[idx]
    aa = a[idx]
    x = q[:, None]
    val = np.zeros(len(q))
    slope = np.zeros(len(q))
    # Lagrange basis l_j(x) = prod_{i != j} (x - t_i) / (t_j - t_i) and its derivative
    for j in range(m):
        num = np.ones(len(q))
        den = np.ones(len(q))
        dnum = np.zeros(len(q))
        for i in range(m):
            if i == j:
                continue
            dnum = dnum * (x[:, 0] - tt[:, i]) + num
            num = num * (x[:, 0] - tt[:, i])
            den = den * (tt[:, j] - tt[:, i])
        val += aa[:, j] * num / den
        slope += aa[:, j] * dnum / den
    return val, slope


def locate_in_run(
    q: np.ndarray, t: np.ndarray, a: np.ndarray, p: np.ndarray, max_pitches: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Angles and speeds at ``q`` from the teeth (t, a, pitches-before) of one run, and which of
    the queries lie where an angle is trustworthy."""
    ok = (q >= t[0]) & (q <= t[-1]) if len(t) >= 2 else np.zeros(len(q), bool)
    angle = np.full(len(q), np.nan)
    speed = np.full(len(q), np.nan)
    if not np.any(ok):
        return angle, speed, ok
    qq = q[ok]
    k = np.clip(np.searchsorted(t, qq, side="right") - 1, 0, len(t) - 2)
    val, slope = local_cubic(qq, t, a, k)
    good = (p[k + 1] <= max_pitches) & (val >= 0.0)
    sel = np.flatnonzero(ok)
    angle[sel] = np.where(good, val, np.nan)
    speed[sel] = np.where(good, slope, np.nan)
    ok[sel] = good
    return angle, speed, ok


class CrankTimeline:
    """Crank angle as a function of time, from a whole :class:`ToothTrack`.

    >>> from toothcomb.decoders.wheels.missing_tooth import MissingToothSpec, decode_teeth
    >>> t = np.array([r * 360 + k * 10.0 for r in range(3) for k in range(35)])[5:] / 9000.0
    >>> tl = CrankTimeline(decode_teeth(t, MissingToothSpec(36, 1)), max_pitches=2)
    >>> look = tl.angle_at(np.array([400.0 / 9000.0, 0.001]))
    >>> look.angle.round(6).tolist(), look.run.tolist()     # 0.001 s is before the first reference
    ([40.0, nan], [0, -1])
    """

    def __init__(self, track: ToothTrack, max_pitches: int) -> None:
        self.track = track
        #: widest tooth spacing (in pitches) across which an angle is still interpolated
        self.max_pitches = int(max_pitches)

    def angle_at(self, times: np.ndarray) -> AngleLookup:
        times = np.asarray(times, dtype=float)
        angle = np.full(len(times), np.nan)
        speed = np.full(len(times), np.nan)
        run = np.full(len(times), -1, dtype=int)
        tr = self.track
        for idx in tr.runs:
            a, s, ok = locate_in_run(
                times, tr.times[idx], tr.angles[idx], tr.pitches[idx], self.max_pitches
            )
            angle = np.where(ok, a, angle)
            speed = np.where(ok, s, speed)
            run = np.where(ok, int(tr.run[idx[0]]), run)
        return AngleLookup(angle, run, speed)

    def speed_at(self, times: np.ndarray) -> np.ndarray:
        """Crank speed in deg/s at ``times`` (nan where no angle is given)."""
        return self.angle_at(times).speed


class CamLocator:
    """Places cam edges on the crank timeline while the teeth stream in.

    Teeth arrive from a :class:`~toothcomb.decoders.wheels.missing_tooth.ToothTracker`, cam
    edges from the front ends, both in time order. A cam edge is placed as soon as two teeth
    after it are known (the four-tooth cubic needs them) or its sync run has ended. Teeth are
    kept only as far back as a cam edge may still arrive (:meth:`forget_before`).
    """

    def __init__(self, max_pitches: int) -> None:
        self.max_pitches = int(max_pitches)
        self._t = np.empty(0)
        self._a = np.empty(0)
        self._p = np.empty(0, dtype=int)
        self._run = -1
        self._pending: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        #: cam edges per channel that got no crank angle
        self.dropped: dict[int, int] = {}

    def add_teeth(self, track: ToothTrack) -> dict[int, tuple[np.ndarray, ...]]:
        """Take newly decided teeth; return the cam events that can now be placed, per channel:
        (times, directions, crank angles, runs, speeds)."""
        out: dict[int, list[tuple[np.ndarray, ...]]] = {}
        if len(track):
            cuts = np.flatnonzero(np.diff(track.run)) + 1
            for idx in np.split(np.arange(len(track)), cuts):
                r = int(track.run[idx[0]])
                if r != self._run:
                    # the previous run has ended: place what falls within its teeth
                    last = self._t[-1] if len(self._t) else -np.inf
                    self._place(out, last)
                    self._t = np.empty(0)
                    self._a = np.empty(0)
                    self._p = np.empty(0, dtype=int)
                    self._run = r
                self._t = np.concatenate((self._t, track.times[idx]))
                self._a = np.concatenate((self._a, track.angles[idx]))
                self._p = np.concatenate((self._p, track.pitches[idx]))
                self._place(out, self._t[-3] if len(self._t) >= 3 else -np.inf)
        return _joined(out)

    def add_cam(self, channel: int, times: np.ndarray, direction: np.ndarray) -> None:
        """Queue cam edges (in time order) of ``channel``."""
        times = np.asarray(times, dtype=float)
        direction = np.asarray(direction, dtype=int)
        old = self._pending.get(channel)
        if old is not None and len(old[0]):
            times = np.concatenate((old[0], times))
            direction = np.concatenate((old[1], direction))
        self._pending[channel] = (times, direction)

    def forget_before(self, time_s: float) -> None:
        """No cam edge earlier than ``time_s`` will arrive any more: drop the teeth before the
        ones placing an edge at that time would need."""
        # edges already queued but not yet placed need their teeth too
        for times, _dirs in self._pending.values():
            if len(times):
                time_s = min(time_s, float(times[0]))
        j = int(np.searchsorted(self._t, time_s)) - 3
        if j > 0:
            self._t, self._a, self._p = self._t[j:], self._a[j:], self._p[j:]

    def finish(self) -> dict[int, tuple[np.ndarray, ...]]:
        """Place everything still queued (edges after the last tooth get no angle)."""
        out: dict[int, list[tuple[np.ndarray, ...]]] = {}
        self._place(out, np.inf)
        return _joined(out)

    def _place(self, out: dict[int, list[tuple[np.ndarray, ...]]], limit: float) -> None:
        t = self._t
        for c, (times, dirs) in list(self._pending.items()):
            now = times <= limit
            if not np.any(now):
                continue
            qt, qd = times[now], dirs[now]
            self._pending[c] = (times[~now], dirs[~now])
            if len(t) >= 2:
                ang, spd, ok = locate_in_run(qt, t, self._a, self._p, self.max_pitches)
            else:
                ang = spd = np.full(len(qt), np.nan)
                ok = np.zeros(len(qt), bool)
            self.dropped[c] = self.dropped.get(c, 0) + int(np.count_nonzero(~ok))
            n = int(ok.sum())
            if n:
                out.setdefault(c, []).append(
                    (qt[ok], qd[ok], ang[ok], np.full(n, self._run), spd[ok])
                )


def _joined(out: dict[int, list[tuple[np.ndarray, ...]]]) -> dict[int, tuple[np.ndarray, ...]]:
    return {
        c: tuple(np.concatenate(col) for col in zip(*parts, strict=True))
        for c, parts in out.items()
    }
