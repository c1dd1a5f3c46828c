"""Variable cam timing: the cam phase over time, its holds and moves, judged against typical
values.

Every event of every edge of one cam says where the cam sat at that moment. Taking each edge's
angle relative to its own base position and merging the edges gives one **phase trace** (deg CA,
positive = retarded = later, like a deviation). The base is the profile's expected angle when one
is known, else the position the cam held first in the capture (at start-up a phaser sits at its
park stop, so that is the park position).

Rules, each a documented default (:class:`PhaserLimits`) that an engine profile can override:

- **Outliers**: an event further than ``max(outlier_min_deg, 6 robust sigma)`` from the median
  of its 7 neighbours in time is set aside and counted (noise on the cam wire, a tooth the crank
  decode placed badly); never silently: the count and the rule are in the result.
- **Moves and holds**: the trace, lightly median-smoothed, is cut into swings at its turning
  points with a hysteresis of ``max(hysteresis_deg, 6 sigma)``; a swing of at least
  ``move_min_deg`` is a move. Three or more swings in a row that alternate in direction, are of
  similar size and follow each other with little dwell are *hunting* (an oscillation while
  holding), not moves. A swing back of less than half a move, soon after it, is that move's
  overshoot. What lies between moves is a hold.
- **Per move**: start and end levels (medians of the settled part of the holds around it),
  travel, 10-90 % response time, mean rate over 10-90 % (0.8 travel / t10-90), peak rate (steepest
  slope over ``rate_span_s``), overshoot past the end level, and settling (from leaving the start
  band to staying inside the end band; band = ``max(settle_band_deg, 3 sigma, 2 % of travel)``).
- **Authority** = the largest travel of a move.

>>> t = np.arange(0.0, 1.5, 0.005)
>>> phase = np.clip((t - 0.5) * 250.0, 0.0, 40.0)          # 40 deg CA at 250 deg CA/s
>>> r = analyse_phase_trace(t, phase, np.zeros(len(t), dtype=int))
>>> m = r.moves[0]
>>> round(m.travel_deg, 2), round(m.mean_rate_deg_s), round(m.t10_90_s, 3), r.authority_deg
(40.0, 250, 0.128, 40.0)
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Sequence
from dataclasses import dataclass, fields, replace
from typing import Any

import numpy as np

from ..result import CamEdge, CamResult, Finding, PhaserHold, PhaserMove, PhaserResult
from .stats import signed_difference


@dataclass(frozen=True)
class PhaserLimits:
    """What a phaser is judged against. Profiles may override any field (``[cams.X.phaser]``)."""

    #: full authority of a typical hydraulic vane cam phaser, deg CA
    #: (45-50 deg CA is usual; common practice, no source)
    typical_authority_deg: float = 45.0
    #: a move over the full authority should take no longer than this (well under 0.2 s is usual
    #: for hydraulic vane phasers; common practice, no source)
    full_range_s_max: float = 0.2
    #: moves smaller than this are not judged for speed (small corrections are slow on purpose;
    #: common practice, no source)
    judge_min_travel_deg: float = 10.0
    #: overshoot allowed past the end level: the larger of this and ``overshoot_max_frac`` of
    #: the travel (common practice, no source)
    overshoot_max_deg: float = 2.0
    overshoot_max_frac: float = 0.10
    #: a hold whose smoothed phase swings more than this peak to peak, back and forth, is hunting
    #: (common practice, no source)
    hold_pp_max_deg: float = 2.0
    #: a parked cam should sit within this of its expected (park) position (the default timing
    #: tolerance, see DESIGN.md)
    park_offset_max_deg: float = 3.0
    #: smallest travel counted as a move, deg CA
    move_min_deg: float = 3.0
    #: smallest turning-point hysteresis, deg CA
    hysteresis_deg: float = 1.0
    #: smallest distance from the local median at which an event is an outlier, deg CA
    outlier_min_deg: float = 1.0
    #: smallest settling band, deg CA
    settle_band_deg: float = 0.3
    #: time span over which the peak rate is measured, s
    rate_span_s: float = 0.01

    @classmethod
    def from_mapping(cls, data: dict[str, Any], where: str = "phaser") -> PhaserLimits:
        """Limits from a profile table; unknown keys and bad values raise ``ValueError``.

        >>> PhaserLimits.from_mapping({"full_range_s_max": 0.3}).full_range_s_max
        0.3
        """
        names = {f.name for f in fields(cls)}
        out: dict[str, float] = {}
        for key, value in data.items():
            if key not in names:
                raise ValueError(
                    f"{where}: unknown key {key!r}; known keys are {', '.join(sorted(names))}"
                )
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not (
                np.isfinite(value) and value > 0
            ):
                raise ValueError(f"{where}.{key} = {value!r}; give a positive number")
            out[key] = float(value)
        return cls(**out)


#: neighbours (either side) of the running median used to find outliers
OUTLIER_HALF = 3
#: a swing back that starts within this many of the move's 10-90 % times after it is overshoot
OVERSHOOT_WINDOW = 3.0
#: smallest band around the start level that a move must leave to have started, deg CA
START_BAND_DEG = 0.1
#: robust sigmas from the local median at which an event is an outlier
OUTLIER_SIGMAS = 6.0


def _running_median(x: np.ndarray, half: int) -> np.ndarray:
    """Centred running median over ``2*half + 1`` points (shorter at the ends)."""
    n = len(x)
    if n == 0 or half <= 0:
        return x.astype(float).copy()
    pad = np.pad(x.astype(float), half, mode="edge")
    win = np.lib.stride_tricks.sliding_window_view(pad, 2 * half + 1)
    return np.median(win, axis=1)


def _robust_sigma(x: np.ndarray) -> float:
    if len(x) == 0:
        return 0.0
    return float(1.4826 * np.median(np.abs(x - np.median(x))))


def _zigzag(s: np.ndarray, h: float) -> list[int]:
    """Indices of the turning points of ``s`` with hysteresis ``h`` (first and last included).

    >>> _zigzag(np.array([0.0, 0.1, 5.0, 5.1, 4.9, 0.2, 0.0]), 1.0)
    [0, 3, 6]
    """
    n = len(s)
    if n == 0:
        return []
    # Python floats: the same sums and comparisons, without a numpy scalar per look
    s = np.asarray(s, dtype=float).tolist()
    pivots = [0]
    direction, ext, i_hi, i_lo = 0, 0, 0, 0
    for i in range(1, n):
        if direction == 0:
            i_hi = i if s[i] > s[i_hi] else i_hi
            i_lo = i if s[i] < s[i_lo] else i_lo
            if s[i_hi] - s[i_lo] >= h:
                turn, direction, ext = (i_lo, 1, i_hi) if i_lo < i_hi else (i_hi, -1, i_lo)
                if turn > 0:
                    pivots.append(turn)
            continue
        if direction > 0:
            if s[i] > s[ext]:
                ext = i
            elif s[ext] - s[i] >= h:
                pivots.append(ext)
                direction, ext = -1, i
        else:
            if s[i] < s[ext]:
                ext = i
            elif s[i] - s[ext] >= h:
                pivots.append(ext)
                direction, ext = 1, i
    if direction != 0 and ext != pivots[-1]:
        pivots.append(ext)
    if pivots[-1] != n - 1:
        pivots.append(n - 1)
    return pivots


def _crossing(t: np.ndarray, s: np.ndarray, i0: int, i1: int, level: float, sign: float) -> float:
    """First time in ``[t[i0], t[i1]]`` where ``sign*(s - level)`` becomes >= 0 (interpolated)."""
    seg = sign * (s[i0 : i1 + 1] - level)
    k = np.flatnonzero(seg >= 0)
    if len(k) == 0:
        return float(t[i1])
    j = i0 + int(k[0])
    if j == i0:
        return float(t[j])
    a, b = sign * (s[j - 1] - level), sign * (s[j] - level)
    f = -a / (b - a) if b != a else 1.0
    return float(t[j - 1] + f * (t[j] - t[j - 1]))


@dataclass
class _Swing:
    i0: int
    i1: int
    travel: float
    t10: float = 0.0
    t50: float = 0.0
    t90: float = 0.0


def _swing_times(t: np.ndarray, s: np.ndarray, sw: _Swing, lo: float, hi: float) -> None:
    sign = 1.0 if hi > lo else -1.0
    d = hi - lo
    sw.t10 = _crossing(t, s, sw.i0, sw.i1, lo + 0.1 * d, sign)
    sw.t50 = _crossing(t, s, sw.i0, sw.i1, lo + 0.5 * d, sign)
    sw.t90 = _crossing(t, s, sw.i0, sw.i1, lo + 0.9 * d, sign)


def _hunting_runs(swings: list[_Swing]) -> list[tuple[int, int]]:
    """Runs (first, last) of >= 3 swings that alternate, are of similar size and barely dwell."""
    runs: list[tuple[int, int]] = []
    k = 0
    while k < len(swings):
        j = k
        while j + 1 < len(swings):
            a, b = swings[j], swings[j + 1]
            alternate = np.sign(a.travel) != np.sign(b.travel)
            ratio = abs(b.travel) / abs(a.travel)
            active = 0.5 * ((a.t90 - a.t10) + (b.t90 - b.t10))
            dwell = b.t10 - a.t90
            if alternate and 0.5 <= ratio <= 2.0 and dwell < 1.5 * max(active, 1e-9):
                j += 1
            else:
                break
        if j - k + 1 >= 3:
            runs.append((k, j))
            k = j + 1
        else:
            k += 1
    return runs


def _peak_rate(t: np.ndarray, s: np.ndarray, t0: float, t1: float, span: float) -> float:
    """Steepest |slope| of ``s`` over at least ``span`` seconds (and two events) in [t0, t1]."""
    i0 = int(np.searchsorted(t, t0, side="left"))
    i1 = int(np.searchsorted(t, t1, side="right"))
    best = 0.0
    for i in range(max(0, i0 - 1), min(len(t), i1)):
        j = int(np.searchsorted(t, t[i] + span, side="left"))
        j = max(j, i + 2)
        if j >= len(t):
            break
        best = max(best, abs(float(s[j] - s[i])) / float(t[j] - t[i]))
    return best


def _pooled_std(p: np.ndarray, edge: np.ndarray) -> float:
    """Standard deviation of each edge's phases around that edge's own mean, pooled over the
    edges (a fixed offset between two edges is not jitter).

    >>> round(_pooled_std(np.array([0.0, 0.2, 5.0, 5.2]), np.array([0, 0, 1, 1])), 4)
    0.1414
    """
    labels, inv = np.unique(edge, return_inverse=True)
    means = np.bincount(inv, weights=p) / np.bincount(inv)
    dof = len(p) - len(labels)
    if dof <= 0:
        return 0.0
    return float(np.sqrt(np.sum((p - means[inv]) ** 2) / dof))


def _hold(t: np.ndarray, p: np.ndarray, s: np.ndarray, edge: np.ndarray, t0: float, t1: float,
          hunting: tuple[float, float, float, float] | None, pp_max: float,
          ) -> PhaserHold | None:
    sel = (t >= t0) & (t <= t1)
    if not np.any(sel):
        return None
    level = float(np.median(p[sel]))
    sm = s[sel]
    pp = float(np.max(sm) - np.min(sm))
    # back and forth: the smoothed phase crosses its level several times
    above = np.sign(sm - level)
    above = above[above != 0]
    crossings = int(np.count_nonzero(np.diff(above))) if len(above) > 1 else 0
    amp = freq = h0 = h1 = None
    if hunting is not None:
        h0, h1, amp, freq = hunting
        h0, h1 = max(h0, t0), min(h1, t1)
    elif pp > pp_max and crossings >= 4:
        amp = pp / 2.0
        freq = crossings / 2.0 / max(t1 - t0, 1e-9)
        h0, h1 = t0, t1
    return PhaserHold(
        t_start_s=float(t0),
        t_end_s=float(t1),
        phase_deg=level,
        jitter_deg=_pooled_std(p[sel], edge[sel]),
        pp_deg=pp,
        n=int(np.count_nonzero(sel)),
        hunting=amp is not None,
        hunting_amplitude_deg=amp,
        hunting_hz=freq,
        hunting_t_start_s=h0,
        hunting_t_end_s=h1,
    )


def analyse_phase_trace(
    t: np.ndarray,
    p: np.ndarray,
    edge: np.ndarray,
    rpm: np.ndarray | None = None,
    limits: PhaserLimits | None = None,
    base: str = "first-hold",
) -> PhaserResult:
    """Holds and moves of a phase trace (times ``t`` s, phases ``p`` deg CA, ``edge`` index of
    the cam edge each event came from). With ``base="first-hold"`` the phases are shifted so
    the first hold sits at 0; with ``base="expected"`` they are kept (deviation from expected).
    """
    lim = limits or PhaserLimits()
    order = np.argsort(t, kind="stable")
    t = np.asarray(t, float)[order]
    p = np.asarray(p, float)[order]
    edge = np.asarray(edge, int)[order]
    rpm = np.asarray(rpm, float)[order] if rpm is not None else np.full(len(t), np.nan)
    if len(t) == 0:
        return PhaserResult(base, 0.0, (), (), (), (), (), (), 0, _outlier_rule(lim), 0.0)

    # outliers against the running median of their neighbours
    med = _running_median(p, OUTLIER_HALF)
    sigma = max(_robust_sigma(p - med), 1e-3)
    keep = np.abs(p - med) <= max(lim.outlier_min_deg, OUTLIER_SIGMAS * sigma)
    dropped = int(np.count_nonzero(~keep))
    t, p, edge, rpm = t[keep], p[keep], edge[keep], rpm[keep]

    # light smoothing: about 20 ms, 1 to 3 neighbours each side
    rate = (len(t) - 1) / (t[-1] - t[0]) if len(t) > 1 and t[-1] > t[0] else 0.0
    half = int(np.clip(round(0.01 * rate), 1, 3))
    s = _running_median(p, half)
    noise = max(_robust_sigma(p - s), 1e-3)

    h = max(lim.hysteresis_deg, 6.0 * noise)
    piv = _zigzag(s, h)
    swings = [
        _Swing(a, b, float(s[b] - s[a]))
        for a, b in itertools.pairwise(piv)
        if abs(s[b] - s[a]) >= lim.move_min_deg
    ]
    for sw in swings:
        _swing_times(t, s, sw, float(s[sw.i0]), float(s[sw.i1]))
    runs = _hunting_runs(swings)
    hunt_idx = {k for a, b in runs for k in range(a, b + 1)}
    hunts: list[tuple[float, float, float, float]] = []  # t0, t1, amplitude, frequency
    for a, b in runs:
        amp = float(np.median([abs(swings[k].travel) for k in range(a, b + 1)])) / 2.0
        mids = np.array([swings[k].t50 for k in range(a, b + 1)])
        freq = 1.0 / (2.0 * float(np.median(np.diff(mids)))) if len(mids) > 1 else float("nan")
        hunts.append((float(t[swings[a].i0]), float(t[swings[b].i1]), amp, freq))
    # a swing back, smaller than half the move before it and soon after it, is that move's
    # overshoot settling, not a move of its own
    moves: list[_Swing] = []
    settle_end = -np.inf
    for k, sw in enumerate(swings):
        if k in hunt_idx:
            continue
        if moves:
            last = moves[-1]
            back = np.sign(sw.travel) != np.sign(last.travel)
            soon = sw.t10 - settle_end < OVERSHOOT_WINDOW * max(last.t90 - last.t10, 0.02)
            if back and abs(sw.travel) < 0.5 * abs(last.travel) and soon:
                settle_end = sw.t90
                continue
        moves.append(sw)
        settle_end = sw.t90

    # hold intervals between the moves' 10 % and 90 % points; levels from the settled half
    bounds = [float(t[0])] + [x for m in moves for x in (m.t10, m.t90)] + [float(t[-1])]
    levels = []
    for k in range(len(moves) + 1):
        a, b = bounds[2 * k], bounds[2 * k + 1]
        mid = a if k == 0 else 0.5 * (a + b)
        sel = (t >= mid) & (t <= b)
        if not np.any(sel):
            sel = (t >= a) & (t <= b)
        levels.append(float(np.median(p[sel])) if np.any(sel) else float("nan"))

    shift = 0.0
    if base == "first-hold":
        shift = levels[0] if np.isfinite(levels[0]) else 0.0
        p, s = p - shift, s - shift
        levels = [v - shift for v in levels]

    # where each move leaves its start band (a tight band: the hold before keeps its jitter)
    spans: list[tuple[float, float, float, float]] = []  # lo, hi, band, t_start
    for k, m in enumerate(moves):
        lo, hi = levels[k], levels[k + 1]
        sign = 1.0 if hi > lo else -1.0
        _swing_times(t, s, m, lo, hi)
        start_band = max(START_BAND_DEG, 4.0 * noise)
        i10 = int(np.searchsorted(t, m.t10))
        inside = np.flatnonzero(sign * (s[:i10] - lo) <= start_band)
        if len(inside) and int(inside[-1]) + 1 < len(t):
            # back from the first event out of the band along the local slope (events are
            # sparse: a straight line between the last one in and the first one out would
            # start the move too early)
            j = int(inside[-1]) + 1
            t_start = _crossing(t, s, j - 1, j, lo + sign * start_band, sign)
            if j + 1 < len(t) and t[j + 1] > t[j]:
                slope = (s[j + 1] - s[j]) / (t[j + 1] - t[j])
                if sign * slope > 0:
                    t_start = float(np.clip(t[j] - (s[j] - lo) / slope, t[j - 1], t[j]))
        else:
            t_start = float(t[int(inside[-1])]) if len(inside) else float(t[0])
        spans.append((lo, hi, max(lim.settle_band_deg, 3.0 * noise, 0.02 * abs(hi - lo)), t_start))

    out_moves: list[PhaserMove] = []
    starts_ends: list[tuple[float, float]] = []
    for k, m in enumerate(moves):
        lo, hi, band, t_start = spans[k]
        travel = hi - lo
        sign = 1.0 if travel > 0 else -1.0
        # end: inside the end band for good (until the next move starts or the capture ends)
        limit_t = spans[k + 1][3] if k + 1 < len(moves) else float(t[-1])
        i90 = int(np.searchsorted(t, m.t90))
        i_lim = max(int(np.searchsorted(t, limit_t, side="left")), i90 + 1)
        out_idx = np.flatnonzero(np.abs(s[i90:i_lim] - hi) > band)
        if len(out_idx) == 0:
            t_end = m.t90
        elif i90 + int(out_idx[-1]) + 1 < i_lim:
            t_end = float(t[i90 + int(out_idx[-1]) + 1])
        else:
            t_end = float(t[min(i_lim, len(t)) - 1])
        overshoot = float(np.max(sign * (s[i90:i_lim] - hi), initial=0.0))
        peak = _peak_rate(t, s, t_start, t_end, lim.rate_span_s)
        t1090 = m.t90 - m.t10
        mean_rate = 0.8 * abs(travel) / t1090 if t1090 > 0 else float("nan")
        sel = (t >= t_start) & (t <= t_end)
        out_moves.append(
            PhaserMove(
                t_start_s=t_start,
                t_end_s=t_end,
                from_deg=lo,
                to_deg=hi,
                travel_deg=travel,
                peak_rate_deg_s=max(peak, mean_rate) if np.isfinite(mean_rate) else peak,
                mean_rate_deg_s=mean_rate,
                t10_90_s=t1090,
                overshoot_deg=overshoot,
                settling_s=t_end - t_start,
                rpm=float(np.nanmean(rpm[sel])) if np.any(sel) and np.any(np.isfinite(rpm[sel]))
                else float("nan"),
            )
        )
        starts_ends.append((t_start, t_end))

    holds: list[PhaserHold] = []
    edges_t = [float(t[0])] + [x for se in starts_ends for x in se] + [float(t[-1])]
    for k in range(len(moves) + 1):
        a, b = edges_t[2 * k], edges_t[2 * k + 1]
        if b <= a:
            continue
        hunt = None
        for h0, h1, amp, freq in hunts:
            if h0 < b and h1 > a:
                hunt = (h0, h1, amp, freq)
        hold = _hold(t, p, s, edge, a, b, hunt, lim.hold_pp_max_deg)
        if hold is not None:
            holds.append(hold)

    authority = max((abs(m.travel_deg) for m in out_moves), default=0.0)
    return PhaserResult(
        base=base,
        base_shift_deg=shift,
        moves=tuple(out_moves),
        holds=tuple(holds),
        time_s=tuple(t.tolist()),
        phase_deg=tuple(p.tolist()),
        rpm=tuple(rpm.tolist()),
        edge=tuple(edge.tolist()),
        dropped=dropped,
        dropped_rule=_outlier_rule(lim),
        authority_deg=authority,
        noise_deg=noise,
    )


def _outlier_rule(lim: PhaserLimits) -> str:
    return (
        f"an event more than max({lim.outlier_min_deg:g} deg CA, {OUTLIER_SIGMAS:g} robust "
        f"sigma) from the median of its {2 * OUTLIER_HALF} nearest events is set aside"
    )


def edge_phases(edges: Sequence[CamEdge], expected: Sequence[float | None] | None = None,
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Merge a cam's edges into one trace (times, phases, edge index).

    Each edge's angles are unwrapped in time; with ``expected`` angles (one per edge, or None)
    the phase is the angle minus the expected one, wrapped to (-180, 180]. Without, each edge is
    referred to the edge with the most events: its offset is the median difference from that
    edge's trace at the same times, so all edges land on one scale (0 = the reference edge's
    first event; :func:`analyse_phase_trace` then moves 0 to the first hold).
    """
    ts, ps, es = [], [], []
    ref = max(range(len(edges)), key=lambda i: len(edges[i].events), default=None)
    if ref is None or not edges[ref].events:
        e = np.empty(0)
        return e, e, e.astype(int)
    use_expected = expected is not None and all(x is not None for x in expected)
    r_t = np.array([x for x, _ in edges[ref].events])
    r_a = np.degrees(np.unwrap(np.radians([a for _, a in edges[ref].events])))
    r_p = r_a - r_a[0]
    for i, e in enumerate(edges):
        if not e.events:
            continue
        tt = np.array([x for x, _ in e.events])
        aa = np.degrees(np.unwrap(np.radians([a for _, a in e.events])))
        if use_expected:
            assert expected is not None
            exp = float(expected[i])  # type: ignore[arg-type]
            first = float(signed_difference(aa[0], exp))
            pp = aa - aa[0] + first
        else:
            off = float(np.median(aa - np.interp(tt, r_t, r_p)))
            pp = aa - off
        ts.append(tt)
        ps.append(pp)
        es.append(np.full(len(tt), i, dtype=int))
    return np.concatenate(ts), np.concatenate(ps), np.concatenate(es)


def analyse_cam(
    edges: Sequence[CamEdge],
    rpm_at: Callable[[np.ndarray], np.ndarray] | None = None,
    limits: PhaserLimits | None = None,
    expected: Sequence[float | None] | None = None,
) -> PhaserResult:
    """The phaser analysis of one cam from its decoded edges.

    >>> from toothcomb.decoders.result import AngleStats
    >>> t = np.arange(0.0, 2.0, 0.01)
    >>> a = 100.0 + np.clip((t - 1.0) * 200.0, 0.0, 30.0)
    >>> e = CamEdge("leading", "rising", AngleStats(0, 0, 0, 0, len(t)), 0,
    ...             tuple(zip(t.tolist(), a.tolist())))
    >>> r = analyse_cam([e])
    >>> round(r.moves[0].travel_deg, 3), round(r.moves[0].from_deg, 3)
    (30.0, 0.0)
    """
    use_expected = expected is not None and all(x is not None for x in expected)
    t, p, e = edge_phases(edges, expected if use_expected else None)
    rpm = rpm_at(t) if rpm_at is not None and len(t) else None
    return analyse_phase_trace(t, p, e, rpm, limits, "expected" if use_expected else "first-hold")


def judge(result: PhaserResult, cam: str, limits: PhaserLimits | None = None,
          parked: bool = False) -> list[Finding]:
    """Plain-words findings on a phaser: parked, slow, overshooting, hunting, moved while it
    should have stayed parked, parked away from its expected position.

    >>> t = np.arange(0.0, 1.0, 0.01)
    >>> r = analyse_phase_trace(t, np.zeros(len(t)), np.zeros(len(t), dtype=int))
    >>> [f.code for f in judge(r, "intake cam")]
    ['phaser-parked']
    """
    lim = limits or PhaserLimits()
    out: list[Finding] = []
    if not result.time_s:
        return out
    first = result.holds[0] if result.holds else None
    if result.dropped:
        out.append(
            Finding(
                "info",
                "phaser-outliers",
                f"{cam}: {result.dropped} event(s) set aside from the phase trace as outliers "
                f"({result.dropped_rule})",
            )
        )
    hunting = any(h.hunting for h in result.holds)
    if not result.moves and not hunting:
        where = ""
        if first is not None and result.base == "expected":
            where = f", {first.phase_deg:+.1f} deg CA from its expected (park) position"
        jit = f"; hold jitter {first.jitter_deg:.2f} deg CA rms" if first is not None else ""
        out.append(
            Finding(
                "info",
                "phaser-parked",
                f"{cam} did not move during the capture: its phaser stayed parked{where}{jit}",
            )
        )
    elif parked and result.moves:
        m = max(result.moves, key=lambda x: abs(x.travel_deg))
        out.append(
            Finding(
                "warning",
                "phaser-moved-while-parked",
                f"{cam} should stay parked but moved {m.travel_deg:+.1f} deg CA at "
                f"{m.t_start_s:.2f} s ({len(result.moves)} move(s) in all); check the valve "
                "command and the phaser's locking pin",
                m.t_start_s,
            )
        )
    if first is not None and result.base == "expected" and (
        abs(first.phase_deg) > lim.park_offset_max_deg
    ):
        out.append(
            Finding(
                "warning",
                "phaser-park-offset",
                f"{cam} first held {first.phase_deg:+.1f} deg CA from its expected (park) "
                f"position, more than the {lim.park_offset_max_deg:g} deg CA allowed",
                first.t_start_s,
            )
        )
    for m in result.moves:
        if abs(m.travel_deg) >= lim.judge_min_travel_deg and np.isfinite(m.mean_rate_deg_s):
            full = lim.typical_authority_deg / m.mean_rate_deg_s
            if full > lim.full_range_s_max:
                out.append(
                    Finding(
                        "warning",
                        "phaser-slow",
                        f"{cam} phaser is slow: {m.travel_deg:+.1f} deg CA at "
                        f"{m.mean_rate_deg_s:.0f} deg CA/s (10-90 % in {m.t10_90_s:.3f} s); a "
                        f"full {lim.typical_authority_deg:g} deg CA range would take {full:.2f} s, "
                        f"more than the {lim.full_range_s_max:g} s usual for a hydraulic vane "
                        "phaser",
                        m.t_start_s,
                    )
                )
        allowed = max(lim.overshoot_max_deg, lim.overshoot_max_frac * abs(m.travel_deg))
        if m.overshoot_deg > allowed:
            out.append(
                Finding(
                    "warning",
                    "phaser-overshoot",
                    f"{cam} phaser overshot by {m.overshoot_deg:.1f} deg CA on its "
                    f"{m.travel_deg:+.1f} deg CA move at {m.t_start_s:.2f} s (more than "
                    f"{allowed:.1f} deg CA) and took {m.settling_s:.2f} s to settle",
                    m.t_start_s,
                )
            )
    for hold in result.holds:
        if hold.hunting:
            amp = hold.hunting_amplitude_deg or 0.0
            hz = hold.hunting_hz
            h0 = hold.hunting_t_start_s if hold.hunting_t_start_s is not None else hold.t_start_s
            h1 = hold.hunting_t_end_s if hold.hunting_t_end_s is not None else hold.t_end_s
            rate = f" at {hz:.1f} Hz" if hz is not None and np.isfinite(hz) else ""
            out.append(
                Finding(
                    "warning",
                    "phaser-hunting",
                    f"{cam} phaser hunts while holding: it swings +-{amp:.1f} deg CA{rate} "
                    f"around {hold.phase_deg + 0.0:+.1f} deg CA from {h0:.2f} to {h1:.2f} s "
                    f"(over {lim.hold_pp_max_deg:g} deg CA peak to peak)",
                    h0,
                )
            )
    return out


def rpm_lookup(
    rpm_trace: Sequence[tuple[float, float]] | np.ndarray,
) -> Callable[[np.ndarray], np.ndarray]:
    """Engine speed at any time from the crank's (time, rpm) trace, pairs or an array of
    (time, rpm) rows (nan without one).

    >>> f = rpm_lookup([(0.0, 800.0), (1.0, 1000.0)])
    >>> f(np.array([0.5])).tolist()
    [900.0]
    """
    if len(rpm_trace) == 0:
        return lambda t: np.full(len(t), np.nan)
    tr = np.asarray(rpm_trace, dtype=float)
    return lambda t: np.interp(t, tr[:, 0], tr[:, 1])


#: finding codes this module gives (replaced as a whole when a cam is analysed again)
CODES = (
    "phaser-outliers", "phaser-parked", "phaser-moved-while-parked", "phaser-park-offset",
    "phaser-slow", "phaser-overshoot", "phaser-hunting",
)


def with_phaser(
    cam: CamResult,
    rpm_trace: Sequence[tuple[float, float]] | np.ndarray = (),
    limits: PhaserLimits | None = None,
    parked: bool = False,
    label: str | None = None,
    expected: Sequence[float | None] | None = None,
) -> CamResult:
    """``cam`` with its phaser analysis and findings (earlier ones replaced).

    ``parked`` says the phaser should stay parked through the capture (any move is a fault);
    ``expected`` gives each edge's expected angle (then the trace is the deviation from it).
    """
    lim = limits or PhaserLimits()
    pr = analyse_cam(cam.edges, rpm_lookup(rpm_trace), lim, expected)
    pr = replace(pr, expect_parked=parked)
    keep = [f for f in cam.findings if f.code not in CODES]
    found = judge(pr, label or f"cam {cam.channel!r}", lim, parked)
    return replace(cam, phaser=pr, findings=tuple(keep + found))
