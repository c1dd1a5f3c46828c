"""Cam events in crank degrees: cycle phase, distinct edges, per-edge statistics.

Each cam event time is turned into a crank angle by the :class:`CrankTimeline`; that gives the
angle after the most recent crank reference event (0..360) and a revolution count. The camshaft
turns once per 720 deg cycle, so the revolution count's parity is the cycle phase -- but which
parity is "revolution 0" is something only the cam pattern can tell:

- A cam whose pattern differs between the two revolutions (a single tooth, a half-moon, an N+1
  pattern) fixes the cycle phase. By toothcomb's convention revolution 0 is the one holding more
  of the cam's leading flanks (then: more events; then: the earlier first leading flank; then:
  the wider teeth, for teeth at the same places in both revolutions).
- A pattern that repeats every 360 deg (four equal teeth) cannot: its edges are reported with
  ``revolution = None`` unless another cam of the same capture fixed the phase.

Events are grouped into the distinct edges of the pattern by direction and position on the
cycle (720 deg when the phase is known, else 360), splitting the circle at its widest empty
stretches -- as many as the pattern has edges of that direction per cycle. When the cam phase
moves during the capture (a phaser) by more than the gaps between edges, the clouds of
neighbouring edges overlap on the circle; the events are then followed in time instead
(:func:`_tracked_clusters`), so each edge keeps its identity through the move.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..model import Edges
from ..result import CamEdge, CamResult, Finding, Sensor
from .jitter import edge_jitter
from .stats import angle_stats, signed_difference
from .timeline import CrankTimeline

#: widest empty stretch (deg) that can still lie inside one edge's cloud of events; used only
#: when too few whole cycles were captured to count the edges per cycle
SPLIT_DEG = 20.0


def _floats(x: np.ndarray) -> list[float]:
    """``x`` as Python floats (the values ``float()`` gives one by one, in one call)."""
    return np.asarray(x, dtype=float).tolist()


def run_shift(run: np.ndarray, shift: dict[int, int]) -> np.ndarray:
    """Each event's revolution shift, by its sync run (0 for a run ``shift`` does not name).

    >>> run_shift(np.array([0, 0, 1, 2]), {1: 1, 2: 0}).tolist()
    [0, 0, 1, 0]
    """
    s = np.zeros(len(run), dtype=int)
    for r, v in shift.items():
        if v:
            s[run == r] = v
    return s


@dataclass(frozen=True)
class CamEvents:
    """Cam events that have a crank angle."""

    times: np.ndarray
    #: +1 rising / -1 falling
    direction: np.ndarray
    #: crank angle within the sync run (deg since the run's first reference event)
    crank_angle: np.ndarray
    run: np.ndarray
    #: crank speed at each event (deg/s)
    speed: np.ndarray

    @property
    def angle(self) -> np.ndarray:
        """Angle after the most recent crank reference event, 0 <= a < 360."""
        return np.mod(self.crank_angle, 360.0)

    @property
    def rev(self) -> np.ndarray:
        """Revolutions since the run's first reference event."""
        return np.floor(self.crank_angle / 360.0).astype(int)

    def cycle_angle(self, shift: dict[int, int]) -> np.ndarray:
        """Angle in the 720 deg cycle, with each run's revolution parity shifted by ``shift``."""
        s = run_shift(self.run, shift)
        return np.mod((self.rev + s) % 2 * 360.0 + self.angle, 720.0)

    def select(self, mask: np.ndarray) -> CamEvents:
        return CamEvents(
            self.times[mask],
            self.direction[mask],
            self.crank_angle[mask],
            self.run[mask],
            self.speed[mask],
        )

    @classmethod
    def empty(cls) -> CamEvents:
        e = np.empty(0)
        return cls(e, e.astype(int), e, e.astype(int), e)


def locate(edges: Edges, timeline: CrankTimeline) -> tuple[CamEvents, int]:
    """Crank angles of cam edges; also how many had no trustworthy crank angle."""
    look = timeline.angle_at(edges.times)
    ok = look.valid
    ev = CamEvents(
        edges.times[ok], edges.direction[ok].astype(int), look.angle[ok], look.run[ok],
        look.speed[ok],
    )
    return ev, int(np.count_nonzero(~ok))


def tooth_level_direction(edges: Edges) -> tuple[int, float]:
    """For a two-level cam signal: the direction in which a tooth/window arrives, and the share
    of time the signal spends at the tooth level.

    The tooth/window level is taken to be the one held for less of the time (cam windows are
    usually narrower than the spaces between them); for a half-moon (about 50 %) it cannot be
    told and the high level is assumed.
    """
    t, d = edges.times, edges.direction
    if len(t) < 2:
        return 1, float("nan")
    dur = np.diff(t)
    return tooth_level_from_times(float(np.sum(dur[d[:-1] > 0])), float(np.sum(dur)))


def tooth_level_from_times(high_s: float, total_s: float) -> tuple[int, float]:
    """:func:`tooth_level_direction` from the time spent high and the time in all.

    >>> tooth_level_from_times(0.2, 1.0), tooth_level_from_times(0.8, 1.0)
    ((1, 0.2), (-1, 0.19999999999999996))
    """
    share_high = high_s / total_s if total_s > 0 else 0.5
    if share_high > 0.55:
        return -1, 1.0 - share_high
    return 1, share_high


def vr_centre_direction(edges: Edges) -> int:
    """For a VR cam: the crossing direction at tooth centres.

    A tooth's two lobes follow each other closely and the space after a tooth is long, so the
    centre crossing is the one that comes soon after the crossing before it.
    """
    t, d = edges.times, edges.direction
    if len(t) < 4:
        return -1
    before = np.diff(t)
    after_dir = d[1:]
    med = {
        s: np.median(before[after_dir == s]) if np.any(after_dir == s) else np.inf
        for s in (1, -1)
    }
    return 1 if med[1] < med[-1] else -1


def _split_circle(values: np.ndarray, k: int, period: float) -> np.ndarray:
    """Labels 0..k-1 for ``values`` on a circle, split at the ``k`` widest empty stretches."""
    n = len(values)
    if n == 0:
        return np.empty(0, dtype=int)
    order = np.argsort(values)
    v = values[order]
    gaps = np.diff(np.concatenate((v, [v[0] + period])))
    k = max(1, min(k, n))
    cuts = np.sort(np.argsort(gaps)[::-1][:k])  # a cut after sorted position c
    labels_sorted = np.searchsorted(cuts, np.arange(n), side="left")
    labels_sorted = np.mod(labels_sorted, k)
    labels = np.empty(n, dtype=int)
    labels[order] = labels_sorted
    return labels


def _edges_per_cycle(values: np.ndarray, cycle_index: np.ndarray, full: np.ndarray) -> int | None:
    """Most common number of events per whole cycle (None when no whole cycle was seen)."""
    cyc = cycle_index[np.isin(cycle_index, full)]
    if len(full) == 0:
        return None
    # events per whole cycle (cycles without any event do not count)
    _cycles_seen, counts = np.unique(cyc, return_counts=True)
    if len(counts) == 0:
        return None
    vals, cnt = np.unique(counts, return_counts=True)
    return int(vals[np.argmax(cnt)])


#: a cloud of one edge's events wider than this (deg) means the cam phase moved: the events
#: are then grouped by following them in time
TRACK_SPREAD_DEG = 5.0
#: whole cycles at the start of the capture whose events give the pattern to follow
TEMPLATE_CYCLES = 6
#: share of each event's offset from its template edge taken into the running phase estimate
TRACK_GAIN = 0.5


@dataclass(frozen=True)
class _Cluster:
    direction: int
    centre: float  # on the circle used (720 or 360)
    members: np.ndarray  # indices into the events


def _clusters(ev: CamEvents, position: np.ndarray, period: float, cycles: np.ndarray,
              full_cycles: np.ndarray) -> list[_Cluster]:
    out = []
    for d in (1, -1):
        idx = np.flatnonzero(ev.direction == d)
        if len(idx) == 0:
            continue
        pos = position[idx]
        k = _edges_per_cycle(pos, cycles[idx], full_cycles)
        if k is None:
            # count the clouds directly: split wherever the circle is empty for SPLIT_DEG
            v = np.sort(pos)
            gaps = np.diff(np.concatenate((v, [v[0] + period])))
            k = max(1, int(np.count_nonzero(gaps > SPLIT_DEG)))
        labels = _split_circle(pos, k, period)
        for lab in range(k):
            members = idx[labels == lab]
            if len(members) == 0:
                continue
            centre = angle_stats(position[members], period).mean
            out.append(_Cluster(d, centre, members))
    return out


def _spread(values: np.ndarray, period: float) -> float:
    """Width of the smallest arc holding all ``values`` (deg)."""
    if len(values) < 2:
        return 0.0
    v = np.sort(np.mod(values, period))
    gaps = np.diff(np.concatenate((v, [v[0] + period])))
    return float(period - np.max(gaps))


def _tracked_clusters(ev: CamEvents, position: np.ndarray, period: float, cycles: np.ndarray,
                      full_cycles: np.ndarray) -> list[_Cluster] | None:
    """Group events by following the cam phase in time.

    The pattern (edge positions per direction) is taken from the first
    :data:`TEMPLATE_CYCLES` whole cycles; then each event, in time order, is given to the
    template edge nearest to it once the running phase estimate is added, and the estimate moves
    by :data:`TRACK_GAIN` of the event's offset. A phaser that moves less than half the spacing
    between neighbouring edges per event keeps every edge's identity. None when too few whole
    cycles were seen to make a template.

    >>> t = np.arange(40) * 0.05
    >>> phase = np.clip((t - 0.5) * 100.0, 0.0, 40.0)   # a 40 deg move, 100 deg/s
    >>> pos = np.concatenate([np.mod(c + phase, 360.0) for c in (100.0, 130.0)])
    >>> ev = CamEvents(np.concatenate([t, t + 0.001]), np.ones(80, dtype=int), pos,
    ...                np.zeros(80, dtype=int), np.full(80, 6000.0))
    >>> cyc = np.concatenate([np.arange(40), np.arange(40)])
    >>> cl = _tracked_clusters(ev, pos, 360.0, cyc, np.arange(1, 39))
    >>> [len(c.members) for c in cl], sorted(int(m) for m in cl[0].members)[:3]
    ([40, 40], [0, 1, 2])
    """
    if len(full_cycles) == 0:
        return None
    first = np.sort(np.unique(full_cycles))[:TEMPLATE_CYCLES]
    centres: dict[int, np.ndarray] = {}
    for d in (1, -1):
        idx = np.flatnonzero(ev.direction == d)
        if len(idx) == 0:
            continue
        k = _edges_per_cycle(position[idx], cycles[idx], full_cycles)
        pick = idx[np.isin(cycles[idx], first)]
        if k is None or len(pick) < k:
            return None
        labels = _split_circle(position[pick], k, period)
        centres[d] = np.array(
            [angle_stats(position[pick[labels == j]], period).mean for j in range(k)]
        )
    order = np.argsort(ev.times, kind="stable")
    label = np.empty(len(order), dtype=int)
    phase = 0.0
    for i in order:
        c = centres[int(ev.direction[i])]
        off = signed_difference(position[i], c + phase, period)
        j = int(np.argmin(np.abs(off)))
        label[i] = j
        phase += TRACK_GAIN * float(off[j])
    out = []
    for d, cs in centres.items():
        for j in range(len(cs)):
            members = np.flatnonzero((ev.direction == d) & (label == j))
            if len(members):
                out.append(_Cluster(d, angle_stats(position[members], period).mean, members))
    return out


def _cycles(ev: CamEvents, shift: dict[int, int], period: float) -> tuple[np.ndarray, np.ndarray]:
    """Cycle (or revolution) index of each event and the indices that were seen whole."""
    s = run_shift(ev.run, shift)
    revs = ev.rev + s
    per = 2 if period == 720.0 else 1
    cyc = (revs // per) + ev.run * 1_000_000
    full = []
    for r in np.unique(ev.run):
        sel = ev.run == r
        c = cyc[sel]
        # cycles strictly inside the run's span are whole
        full.extend(np.unique(c)[1:-1].tolist())
    return cyc, np.asarray(full, dtype=int)


def is_symmetric(ev: CamEvents, tol_deg: float = 4.0) -> bool:
    """True when the cam pattern repeats every revolution (it cannot fix the cycle phase)."""
    if len(ev.times) == 0:
        return True
    runs, counts = np.unique(ev.run, return_counts=True)
    ev = ev.select(ev.run == runs[np.argmax(counts)])
    shift: dict[int, int] = {}
    cyc, full = _cycles(ev, shift, 720.0)
    cl = _clusters(ev, ev.cycle_angle(shift), 720.0, cyc, full)
    for c in cl:
        twin = [o for o in cl if o.direction == c.direction
                and abs(signed_difference(o.centre, c.centre + 360.0, 720.0)) < tol_deg]
        if not twin:
            return False
    return True


def choose_phase(ev: CamEvents, leading: int) -> dict[int, int]:
    """Revolution parity shift per sync run that puts the pattern in toothcomb's convention."""
    runs = np.unique(ev.run)
    if len(runs) == 0:
        return {}
    biggest = int(max(runs, key=lambda r: np.count_nonzero(ev.run == r)))
    sel = ev.run == biggest
    sub = ev.select(sel)
    patterns = {}
    keys = {}
    for s in (0, 1):
        cyc, full = _cycles(sub, {biggest: s}, 720.0)
        cl = _clusters(sub, sub.cycle_angle({biggest: s}), 720.0, cyc, full)
        patterns[s] = cl
        rev0 = [c for c in cl if c.centre < 360.0]
        lead0 = [c for c in rev0 if c.direction == leading]
        first_lead = min((c.centre for c in lead0), default=720.0)
        keys[s] = (len(lead0), len(rev0), first_lead, _tooth_deg(cl, leading))
    best_shift = _pick_revolution_0(keys[0], keys[1])
    shift = {biggest: best_shift}
    ref = patterns[best_shift]
    for r in runs:
        r = int(r)
        if r == biggest:
            continue
        other = ev.select(ev.run == r)
        costs = []
        for s in (0, 1):
            pos = other.cycle_angle({r: s})
            cost = 0.0
            for d in (1, -1):
                centres = np.array([c.centre for c in ref if c.direction == d])
                p = pos[other.direction == d]
                if len(centres) and len(p):
                    dist = np.abs(signed_difference(p[:, None], centres[None, :], 720.0))
                    cost += float(np.sum(np.min(dist, axis=1)))
            costs.append(cost)
        shift[r] = int(np.argmin(costs))
    return shift


#: two angles closer than this (deg) are taken as equal when the cycle phase is chosen
PHASE_TIE_DEG = 2.0


def _tooth_deg(clusters: list[_Cluster], leading: int) -> float:
    """Degrees of tooth (from each leading flank to the next trailing one) that start in
    revolution 0 (0..360) of a cycle-angle layout."""
    lead = [c.centre for c in clusters if c.direction == leading and c.centre < 360.0]
    trail = [c.centre for c in clusters if c.direction != leading]
    if not trail:
        return 0.0
    return float(sum(min((t - a) % 720.0 for t in trail) for a in lead))


def _pick_revolution_0(
    a: tuple[int, int, float, float], b: tuple[int, int, float, float]
) -> int:
    """0 or 1: which of two layouts (leading flanks, events, first leading flank, tooth degrees
    in revolution 0) follows the convention: more leading flanks, then more events, then the
    earlier first leading flank, then more tooth -- angles within PHASE_TIE_DEG count as equal,
    so measurement noise never decides.

    >>> _pick_revolution_0((2, 4, 10.0, 30.0), (2, 4, 10.5, 90.0))   # wider teeth in b
    1
    >>> _pick_revolution_0((1, 2, 40.0, 30.0), (1, 2, 120.0, 70.0))  # a's flank comes first
    0
    """
    if a[:2] != b[:2]:
        return 0 if a[:2] > b[:2] else 1
    if abs(a[2] - b[2]) > PHASE_TIE_DEG:
        return 0 if a[2] < b[2] else 1
    if abs(a[3] - b[3]) > PHASE_TIE_DEG:
        return 0 if a[3] > b[3] else 1
    return 0


def build_cam_result(
    channel: str,
    sensor: Sensor,
    ev: CamEvents,
    shift: dict[int, int] | None,
    leading: int,
    findings: list[Finding],
    phase_source: bool = False,
) -> CamResult:
    """Group located events into the pattern's distinct edges and measure each."""
    period = 720.0 if shift is not None else 360.0
    position = ev.cycle_angle(shift) if shift is not None else ev.angle
    cyc, full = _cycles(ev, shift or {}, period)
    clusters = _clusters(ev, position, period, cyc, full)
    if any(_spread(position[c.members], period) > TRACK_SPREAD_DEG for c in clusters):
        clusters = _tracked_clusters(ev, position, period, cyc, full) or clusters
    clusters.sort(key=lambda c: c.centre)
    speed = ev.speed
    lead_centres = sorted(c.centre for c in clusters if c.direction == leading)

    edges: list[CamEdge] = []
    windows: list[tuple[float, float]] = []
    for c in clusters:
        m = np.sort(c.members)
        a = ev.angle[m]
        stats = angle_stats(a)
        if sensor == "vr":
            flank = "centre"
        else:
            flank = "leading" if c.direction == leading else "trailing"
        revolution = int(c.centre // 360.0) if shift is not None else None
        # window index: the leading flank at or before this edge on the cycle
        window = None
        if lead_centres:
            before = [i for i, lc in enumerate(lead_centres) if lc <= c.centre + 1e-9]
            window = before[-1] if before else len(lead_centres) - 1
        jit = edge_jitter(ev.times[m], a + 0.0, speed[m]) if len(m) >= 3 else None
        if jit is not None:
            # unwrap around the mean so an edge near 0/360 has no false jumps
            dev = signed_difference(a, stats.mean)
            jit = edge_jitter(ev.times[m], stats.mean + dev, speed[m])
        edges.append(
            CamEdge(
                flank=flank,
                direction="rising" if c.direction > 0 else "falling",
                angle=stats,
                revolution=revolution,
                events=tuple(zip(_floats(ev.times[m]), _floats(a), strict=True)),
                jitter=jit,
                window=window,
            )
        )
    if sensor == "hall":
        for i, lc in enumerate(lead_centres):
            trail = [c.centre for c in clusters if c.direction != leading]
            if not trail:
                break
            after = [(tc - lc) % period for tc in trail]
            windows.append((lc, lc + min(after)))
            _ = i
    return CamResult(
        channel=channel,
        sensor=sensor,
        edges=tuple(edges),
        pattern=tuple(windows),
        phase_source=phase_source,
        findings=tuple(findings),
    )
