"""N-M missing-tooth crank wheels: N equally spaced tooth positions, M consecutive ones missing.

The gap is found from *ratios* of tooth periods, never from fixed time thresholds: the interval
across the gap spans M + 1 pitches, so it is M + 1 times the mean of its two neighbours even while
the engine speeds up or slows down (the mean of the neighbours follows a linear speed change).

Decoding then follows the wheel tooth by tooth. Each new interval is compared with the interval
the wheel says comes next, scaled by a speed prediction extrapolated from the last two pitch
periods; the cheapest explanation wins among "next tooth", "next tooth after n missing ones"
(dropout, damaged tooth) and "this edge is not a tooth" (runt pulse, spike). When nothing
explains an interval, sync is lost, counted, reported, and found again at the next gap.

A capture that starts inside the gap (or one tooth before it) shows no interval across that gap,
so the first gap found is the next one, a revolution later. The revolution before it is then
counted back from that gap: when the capture holds all of its teeth, evenly spaced, its tooth 1
is the capture's first reference event and the sync run starts there.

Sources for the geometry: an N-M wheel has a pitch of 360/N deg and the interval across its gap
spans M + 1 pitches (60-2: 6 deg pitch, 18 deg across the gap) -- see e.g. Robert Bosch GmbH,
*Automotive Handbook*, engine management / speed sensors.
"""

from __future__ import annotations

import dataclasses
import functools
import itertools
import math
import re
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import UsageError
from ..model import Edges
from ..result import Finding
from ..savgol import savgol_filter
from .base import ToothTrack

_NOTATION = re.compile(r"^\s*(\d+)\s*-\s*(\d+)\s*$")

#: tooth period ratio (interval / mean of its neighbours) above which an interval may be a gap
GAP_RATIO_MIN = 1.6
#: largest |log(measured / predicted)| accepted for an interval before sync is called lost
# common practice, no source: about +-45 % of the predicted interval
ACCEPT_LOG = math.log(1.45)
#: an edge is only considered "not a tooth" when taking it as one misfits by more than this
# common practice, no source: about 30 %, beyond what speed changes give from tooth to tooth
SKIP_ONLY_ABOVE = math.log(1.3)
#: largest |log| of the ratio of one pitch period to the one before it in a revolution taken
#: whole (the fast path, and the revolution counted back at the first sync)
# common practice, no source: about +-25 %, beyond what cranking swings give from tooth to tooth
EVEN_LOG = 0.25
#: accepted intervals the speed prediction is fitted to
HISTORY = 3
#: cost added for calling an edge "not a tooth" or a tooth "missing" (log units)
EXTRA_PENALTY = 0.12
MISSING_PENALTY = 0.15


@dataclass(frozen=True)
class MissingToothSpec:
    """An N-M wheel.

    >>> w = MissingToothSpec(60, 2)
    >>> w.name, w.pitch_deg, w.teeth, w.gap_deg
    ('60-2', 6.0, 58, 18.0)
    """

    #: equally spaced tooth positions (N)
    positions: int
    #: consecutive positions without a tooth (M)
    missing: int

    def __post_init__(self) -> None:
        if not (2 <= self.positions <= 360):
            raise UsageError(f"a wheel needs 2 to 360 tooth positions, not {self.positions}")
        if not (1 <= self.missing < self.positions - 1):
            raise UsageError(
                f"a {self.positions}-position wheel can miss 1 to {self.positions - 2} teeth, "
                f"not {self.missing}"
            )

    @property
    def name(self) -> str:
        return f"{self.positions}-{self.missing}"

    @property
    def pitch_deg(self) -> float:
        return 360.0 / self.positions

    @property
    def teeth(self) -> int:
        """Teeth actually on the wheel (N - M)."""
        return self.positions - self.missing

    @property
    def gap_deg(self) -> float:
        """Angle between the last tooth before the gap and tooth 1."""
        return (self.missing + 1) * self.pitch_deg

    def step(self, tooth: int) -> int:
        """Pitches from ``tooth`` (1-based) to the next tooth on the wheel."""
        return self.missing + 1 if tooth == self.teeth else 1

    @property
    def steps(self) -> tuple[int, ...]:
        """Pitches from each tooth to the next, tooth 1 first (the last one crosses the gap)."""
        return (1,) * (self.teeth - 1) + (self.missing + 1,)

    @property
    def max_step(self) -> int:
        """The most pitches between two neighbouring teeth."""
        return self.missing + 1

    @property
    def teeth_deg(self) -> tuple[float, ...]:
        """Angle of every tooth after tooth 1 (deg)."""
        return tuple(k * self.pitch_deg for k in range(self.teeth))

    def span(self, tooth: int, n: int) -> int:
        """Pitches from ``tooth`` to the tooth ``n`` teeth later."""
        return span_of(self, tooth, n)


def span_of(spec: MissingToothSpec | Any, tooth: int, n: int) -> int:
    """Pitches from ``tooth`` to the tooth ``n`` teeth later on any wheel spec (``teeth``,
    ``positions`` and ``step(tooth)``).

    >>> span_of(MissingToothSpec(12, 1), 10, 3)      # tooth 10 -> 11 -> (gap) 1 -> 2
    4
    """
    full, rest = divmod(n, spec.teeth)
    total = full * spec.positions
    t = tooth
    for _ in range(rest):
        total += spec.step(t)
        t = t % spec.teeth + 1
    return total


class MissingToothWheel:
    """The ``toothcomb.wheels`` plugin for N-M wheels."""

    name = "missing-tooth"
    handles = "N-M missing-tooth crank wheels, e.g. 60-2, 36-1, 24-1"

    @staticmethod
    def parse(text: str) -> MissingToothSpec | None:
        """``"60-2"`` -> MissingToothSpec(60, 2); None for other notations.

        >>> MissingToothWheel.parse("36-1")
        MissingToothSpec(positions=36, missing=1)
        >>> MissingToothWheel.parse("4+1") is None
        True
        """
        m = _NOTATION.match(text)
        if not m:
            return None
        return MissingToothSpec(int(m.group(1)), int(m.group(2)))

    @staticmethod
    def decoder(spec: MissingToothSpec):
        return lambda times: decode_teeth(times, spec)


# -- gap finding and identification -----------------------------------------------------------


def gap_ratios(times: np.ndarray) -> np.ndarray:
    """Ratio of each interval to the mean of its two neighbours (nan at both ends).

    ``r[i]`` belongs to the interval from ``times[i]`` to ``times[i + 1]``.

    >>> t = np.cumsum([0, 1, 1, 1, 3, 1, 1, 1.0])      # a gap of three pitches
    >>> gap_ratios(t).round(2).tolist()
    [nan, 1.0, 0.5, 3.0, 0.5, 1.0, nan]
    """
    T = np.diff(np.asarray(times, dtype=float))
    r = np.full(len(T), np.nan)
    if len(T) >= 3:
        r[1:-1] = T[1:-1] / (0.5 * (T[:-2] + T[2:]))
    return r


#: quadratic through the pitch periods at positions -1.5, -0.5 (before the interval) and
#: m + 1.5, m + 2.5 (after it), integrated over the m + 1 pitches the interval would span if
#: m teeth were missing: weights on (T[i-2], T[i-1], T[i+1], T[i+2]) giving that integral
def _span_weights(m: int) -> np.ndarray:
    x = np.array([-1.5, -0.5, m + 1.5, m + 2.5])
    design = np.vstack([np.ones(4), x, x * x]).T
    coef = np.linalg.pinv(design)  # (3, 4): least-squares a, b, c from the four periods
    L = m + 1.0
    integral = np.array([L, L * L / 2.0, L**3 / 3.0])
    return integral @ coef


_SPAN_WEIGHTS = {m: _span_weights(m) for m in (1, 2, 3)}


def gap_fit(times: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For every interval: how many teeth would be missing in it (0 = none) and how far (|log|
    of measured over expected duration) it is from that.

    The expected duration of an interval spanning m + 1 pitches is the integral, over those
    pitches, of the quadratic through the pitch periods of the two intervals on each side, so a
    gap is recognised even where the speed changes fast and unevenly (cranking swings).
    Where fewer than two intervals lie on a side, the mean of the two direct neighbours is used.

    >>> t = np.cumsum([0, 1, 1, 1, 1, 3, 1, 1, 1, 1.0])      # a gap of three pitches
    >>> m, err = gap_fit(t)
    >>> m.tolist(), bool(err[4] < 1e-9)
    ([0, 0, 0, 0, 2, 0, 0, 0, 0], True)
    """
    T = np.diff(np.asarray(times, dtype=float))
    n = len(T)
    best_m = np.zeros(n, dtype=int)
    best_err = np.full(n, np.inf)
    if n < 3:
        return best_m, best_err
    simple = np.full(n, np.nan)
    simple[1:-1] = T[1:-1] / (0.5 * (T[:-2] + T[2:]))
    with np.errstate(invalid="ignore", divide="ignore"):
        for m in (1, 2, 3):
            if n >= 5:
                nb = np.vstack([T[:-4], T[1:-3], T[3:-1], T[4:]])  # neighbours of T[2:-2]
                expect = _SPAN_WEIGHTS[m] @ nb
                err = np.full(n, np.inf)
                err[2:-2] = np.abs(np.log(T[2:-2] / expect))
            else:
                err = np.full(n, np.inf)
            # next to the ends (or where the quadratic misfires), the plain neighbour mean
            err_simple = np.abs(np.log(simple / (m + 1)))
            err = np.fmin(err, np.where(np.isfinite(err_simple), err_simple, np.inf))
            take = (err < best_err) & (simple > GAP_RATIO_MIN - 0.1)
            best_m = np.where(take, m, best_m)
            best_err = np.where(take, err, best_err)
    return best_m, best_err


def gap_candidates(times: np.ndarray, ratio_min: float = GAP_RATIO_MIN) -> np.ndarray:
    """Intervals that look like a gap (or missing teeth): long against their neighbours and
    within 25 % of a whole number of pitches by :func:`gap_fit`."""
    m, err = gap_fit(times)
    r = gap_ratios(times)
    with np.errstate(invalid="ignore"):
        return np.flatnonzero((m > 0) & (err < math.log(1.25)) & (r > ratio_min - 0.1))


@dataclass(frozen=True)
class WheelGuess:
    """An N-M wheel identified from tooth periods, and how sure the guess is."""

    spec: MissingToothSpec
    #: 0..1: share of revolutions that agree with the guess
    confidence: float
    #: gaps seen
    gaps: int
    #: median ratio of the gap interval to its neighbours
    gap_ratio: float


def local_pitch(times: np.ndarray, exclude: np.ndarray | None = None, half: int = 4) -> np.ndarray:
    """Per interval, the local pitch period: a quadratic fitted over the ``half`` intervals on
    each side (Savitzky-Golay), after the intervals marked in ``exclude`` (gaps) are replaced by
    interpolation from their neighbours, so that a speed swing is followed.

    >>> t = np.cumsum([0, 1, 1, 1, 3, 1, 1, 1.0])
    >>> local_pitch(t, np.array([0, 0, 0, 1, 0, 0, 0], bool)).round(6).tolist()
    [1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0]
    """
    T = np.diff(np.asarray(times, dtype=float))
    n = len(T)
    if n < 3:
        return T.copy()
    bad = np.zeros(n, dtype=bool) if exclude is None else exclude.copy()
    # a running median first: intervals far from it (parts of a runt, a missed tooth) are
    # left out as well, then a quadratic follows the speed through what remains
    pad = np.concatenate((np.full(half, np.nan), np.where(bad, np.nan, T), np.full(half, np.nan)))
    win = np.lib.stride_tricks.sliding_window_view(pad, 2 * half + 1)
    with warnings.catch_warnings():  # all-nan windows give nan, handled below
        warnings.simplefilter("ignore", RuntimeWarning)
        med = np.nanmedian(win, axis=1)
    med = np.where(np.isfinite(med), med, T)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = T / med
        bad |= ~(ratio > 0) | (np.abs(np.log(np.where(ratio > 0, ratio, 1.0))) > math.log(1.3))
    v = T.copy()
    if np.any(bad) and not np.all(bad):
        keep = ~bad
        v[bad] = np.interp(np.flatnonzero(bad), np.flatnonzero(keep), T[keep])
    w = min(2 * half + 1, n if n % 2 else n - 1)
    if w < 3:
        return v
    return savgol_filter(v, w, min(2, w - 1))


def off_grid(times: np.ndarray) -> np.ndarray:
    """Events that do not sit on the wheel's pitch grid: both intervals around them are far from
    a whole number of pitches while together they make one (a runt pulse in a gap, a spike).

    >>> t = np.cumsum([0, 1, 1, 1, 1, 0.4, 0.6, 1, 1, 1.0])
    >>> np.flatnonzero(off_grid(t)).tolist()        # the event at 4.4
    [5]
    """
    times = np.asarray(times, dtype=float)
    out = np.zeros(len(times), dtype=bool)
    if len(times) < 4:
        return out
    T = np.diff(times)
    p = local_pitch(times, exclude=gap_ratios(times) > GAP_RATIO_MIN - 0.1)
    x = T / p
    frac = np.abs(x - np.rint(x))
    both = (frac[:-1] > 0.25) & (frac[1:] > 0.25)
    whole = np.abs((x[:-1] + x[1:]) - np.rint(x[:-1] + x[1:])) < 0.15
    out[1:-1] = both & whole
    return out


def identify(times: np.ndarray, clean: bool = True) -> WheelGuess | None:
    """:func:`identify_wheel`, remembered for the last few event series: a decode asks it about
    the same first seconds while it picks the crank channel, its direction and its wheel."""
    times = np.ascontiguousarray(times, dtype=float)
    return _identify_cached(times.tobytes(), clean)


@functools.lru_cache(maxsize=32)
def _identify_cached(raw: bytes, clean: bool) -> WheelGuess | None:
    return identify_wheel(np.frombuffer(raw, dtype=float), clean)


def identify_wheel(times: np.ndarray, clean: bool = True) -> WheelGuess | None:
    """Identify N and M from event times of one direction (tooth centres or leading flanks).

    Events off the pitch grid (runts) are set aside first. Intervals that span whole extra
    pitches are gap candidates; the gap is the largest class of them (by teeth missed) that
    comes back once per revolution, so a damaged tooth elsewhere shows as a smaller class. N is
    the number of pitches from one gap to the next (the sum of every interval over its local
    pitch period, rounded), and M is N less the teeth seen and the teeth missing elsewhere.
    Returns None when no class recurs. ``clean=False`` keeps off-grid events (to judge which
    crossing direction of a VR signal shows the gap as it is).

    >>> teeth = [k * 6.0 for k in range(58)]                       # a 60-2 wheel, 6 deg pitch
    >>> t = np.array([r * 360 + a for r in range(4) for a in teeth]) / 4800.0   # 800 rpm
    >>> g = identify(t)
    >>> g.spec.name, round(g.confidence, 2), g.gaps
    ('60-2', 1.0, 3)
    """
    times = np.asarray(times, dtype=float)
    if clean:
        times = times[~off_grid(times)]
    cand = gap_candidates(times)
    if len(cand) < 2:
        return None
    m_all, _ = gap_fit(times)
    is_cand = np.zeros(len(times) - 1, dtype=bool)
    is_cand[cand] = True
    T = np.diff(times)
    p = local_pitch(times, exclude=is_cand)
    ratios = gap_ratios(times)
    for m_min in sorted(set(m_all[cand].tolist()), reverse=True):
        idx = cand[m_all[cand] >= m_min]
        if len(idx) < 2:
            continue
        spacing = np.diff(idx)
        values, counts = np.unique(spacing, return_counts=True)
        k = int(values[np.argmax(counts)])
        share = float(np.max(counts)) / len(spacing)
        if share < 0.5:
            continue
        found = []
        for a, b in itertools.pairwise(idx):
            if b - a != k:
                continue
            span = np.arange(a + 1, b + 1)  # the intervals after one gap up to the next one
            # ordinary intervals count by the local pitch, gap candidates by their own fit
            # (the local pitch next to a gap at a speed minimum is too short for the gap)
            plain = span[~is_cand[span]]
            n = int(np.rint(np.sum(T[plain] / p[plain]) + np.sum(m_all[span[is_cand[span]]] + 1)))
            elsewhere = span[is_cand[span] & (span != b)]
            missing = int(np.sum(m_all[elsewhere]))
            found.append((n, n - k - missing))
        if not found:
            continue
        keys, cnt = np.unique(np.array(found), axis=0, return_counts=True)
        n, m = (int(v) for v in keys[np.argmax(cnt)])
        if not (3 <= n <= 360) or not (1 <= m <= 3) or m >= n - 1:
            continue
        conf = share * float(np.max(cnt)) / len(found)
        return WheelGuess(MissingToothSpec(n, m), conf, len(idx), float(np.median(ratios[idx])))
    return None


def long_levels(edges: Edges) -> dict[int, int]:
    """How many levels of a two-level signal last far longer than their neighbours, by the
    direction of the transition that ends them (+1 rising, -1 falling)."""
    t = edges.times
    dur = np.diff(t)
    d = edges.direction[1:]
    score = {}
    for sign in (1, -1):
        durations = dur[d == sign]
        if len(durations) < 9:
            score[sign] = 0
            continue
        # against the median of the 8 nearest levels of the same kind, so that a change of
        # speed over the capture does not look like a long level
        win = np.lib.stride_tricks.sliding_window_view(durations, 9)
        local = np.median(win, axis=1)
        score[sign] = int(np.count_nonzero(durations[4:-4] > 1.8 * local))
    return score


def leading_direction(edges: Edges) -> tuple[int, float]:
    """For a two-level (Hall) crank signal: the direction of the leading flank, and a score.

    The level held through the gap is the "no tooth" level, held far longer than between any
    two teeth; the transition that ends it is tooth 1's leading flank. Returns (+1 or -1, share
    of long levels that end in that direction).
    """
    if len(edges) < 6:
        return 1, 0.0
    score = long_levels(edges)
    total = score[1] + score[-1]
    best = 1 if score[1] >= score[-1] else -1
    return best, (score[best] / total if total else 0.0)


def looks_like_clipped_vr(edges: Edges) -> bool:
    """True when a signal that switches like a Hall output shows its wheel gap the way a VR
    sensor does. A Hall output holds one level through the gap and its flanks alternate rising,
    falling, rising. A VR voltage swings slowly across the gap (the flux falls after the last
    tooth and rises towards tooth 1): clipped into a square wave it has a slow swing there, which
    a flank detector does not see as a step, so the alternation breaks once per revolution."""
    if len(edges) < 40:
        return False
    score = long_levels(edges)
    total = score[1] + score[-1]
    if total < 2 or total > 0.2 * len(edges):
        return False  # no gaps, or long levels everywhere (a cam pattern, not a crank wheel)
    # breaks in the alternation that span a long stretch: the slow swing across the gap (a
    # runt pulse whose first flank was too short to count breaks it over a short stretch)
    same = np.diff(edges.direction.astype(int)) == 0
    dt = np.diff(edges.times)
    long = dt > 1.8 * np.median(dt)
    breaks = int(np.count_nonzero(same & long))
    return breaks >= 0.5 * total


# -- tooth-by-tooth decoding --------------------------------------------------------------------


def decode_teeth(times: np.ndarray, spec: MissingToothSpec) -> ToothTrack:
    """Follow an N-M wheel through event times of one direction; see the module docstring.

    >>> w = MissingToothSpec(36, 1)
    >>> t = np.array([r * 360 + k * 10.0 for r in range(3) for k in range(35)]) / 9000.0
    >>> track = decode_teeth(t, w)
    >>> len(track.reference_times), track.sync_losses, track.angles[:3].tolist()
    (3, 0, [0.0, 10.0, 20.0])
    """
    tracker = ToothTracker(spec)
    return ToothTrack.concat([tracker.feed(times), tracker.finish()], spec.pitch_deg)


class ToothTracker:
    """Follows an N-M wheel through event times that arrive in pieces.

    ``feed(times)`` takes the next events (in time order) and returns the teeth it could decide;
    ``finish()`` decides the rest. A decision waits until the events it looks ahead to have
    arrived, so the teeth do not depend on how the events were cut into pieces.

    >>> w = MissingToothSpec(36, 1)
    >>> t = np.array([r * 360 + k * 10.0 for r in range(4) for k in range(35)]) / 9000.0
    >>> tr = ToothTracker(w)
    >>> parts = [tr.feed(t[i : i + 17]) for i in range(0, len(t), 17)] + [tr.finish()]
    >>> whole = decode_teeth(t, w)
    >>> bool(np.array_equal(ToothTrack.concat(parts, w.pitch_deg).times, whole.times))
    True
    """

    def __init__(self, spec: MissingToothSpec, offsets: dict[int, float] | None = None) -> None:
        self.spec = spec
        #: measured offset (deg) of teeth that sit away from their nominal angle
        self._offset = np.zeros(spec.teeth + 1)
        for tooth, off in (offsets or {}).items():
            if 2 <= tooth <= spec.teeth:  # tooth 1 is the reference event by definition
                self._offset[tooth] = off
        self._t = np.empty(0)  # events not yet behind us
        self._i = 0  # local index: the last accepted tooth (synced) or where to search (not)
        self._synced = False
        self._tooth = 0
        self._angle = 0.0
        self._p_last = 0.0
        self._p_prev = 0.0
        #: the last accepted intervals as (start, end) in pitches from the run's first
        #: reference event, and their durations: the speed prediction follows them
        self._hist: list[tuple[float, float, float]] = []
        self._run = -1
        self._extra = self._missing = self._losses = 0
        #: events before the search position that the search for tooth 1 looks back to
        self._behind = 2

    # -- public ------------------------------------------------------------------------------

    def feed(self, times: np.ndarray) -> ToothTrack:
        times = np.asarray(times, dtype=float)
        if len(times):
            self._t = np.concatenate((self._t, times)) if len(self._t) else times.copy()
        return self._run_until(final=False)

    def finish(self) -> ToothTrack:
        return self._run_until(final=True)

    # -- internals -------------------------------------------------------------------------------

    def _run_until(self, final: bool) -> ToothTrack:
        spec = self.spec
        K = spec.teeth
        t = self._t
        n = len(t)
        out = _Out()
        i = self._i
        while i < n - 1:
            if not self._synced:
                i, found = self._sync(t, i, n, final, out)
                if not found:
                    break
                continue

            # fast path: whole clean revolutions from tooth 1, as many as have arrived
            if self._tooth == 1:
                if i + K >= n and not final:
                    break
                revs = self._clean_revolutions(t, i, (n - 1 - i) // K, out)
                if revs:
                    i += revs * K
                    continue

            if i + 2 >= n and not final:
                break
            if not self._step(t, i, n, out):
                i += 1
                continue
            i = out.last_i

        # keep what later decisions may look back to (a gap is judged with t[g - 1]); before
        # the first sync, a revolution more (see _backfill)
        behind = self._behind if self._run >= 0 else max(self._behind, K + 1)
        drop = max(0, min(i, n) - behind)
        self._t = t[drop:]
        self._i = i - drop
        track = out.track(spec.pitch_deg, self)
        if np.any(self._offset) and len(track):
            track = dataclasses.replace(track, angles=track.angles + self._offset[track.tooth])
        return track

    def _sync(self, t: np.ndarray, i: int, n: int, final: bool, out: _Out) -> tuple[int, bool]:
        """Look for tooth 1 from ``t[i]`` on; when found, start a sync run there (tooth 1
        decided and emitted) and return (its index, True), else (where to look next, False)."""
        spec = self.spec
        # a gap interval g is judged with two intervals on each side: t[g - 2] ..
        # t[g + 3] (at the very end of the capture, with what there is)
        lo = max(i, 1)
        hi = n - 3 if final else n - 4
        if hi < lo:
            return i, False
        first = max(lo - 2, 0)
        seg = t[first : hi + 4]
        cand = gap_candidates(seg) + first
        cand = cand[(cand >= lo) & (cand <= hi)]
        if len(cand):
            m_fit, _ = gap_fit(seg)
            cand = cand[m_fit[cand - first] == spec.missing]
        split = split_gaps(t, lo, hi, spec.missing)
        if len(cand) == 0 and len(split) == 0:
            return max(i, hi + 1), False
        g = int(min(cand.min() if len(cand) else n, split.min() if len(split) else n))
        runt = len(cand) == 0 or g not in set(cand.tolist())
        i = g + 1  # tooth 1
        self._run += 1
        self._synced = True
        self._tooth = 1
        self._angle = 0.0
        gap_t = t[g + 1] - t[g - 1] if runt else t[g + 1] - t[g]
        before = t[g - 1] - t[g - 2] if runt else t[g] - t[g - 1]
        after = t[g + 2] - t[g + 1]
        # the interval after tooth 1 was looked at to judge the gap: start from it
        self._p_last = self._p_prev = float(after)
        gap = spec.missing + 1.0
        self._hist = [(-gap - 1.0, -gap, float(before)), (-gap, 0.0, float(gap_t))]
        if runt:
            self._extra += 1
            out.findings.append(
                Finding(
                    "info",
                    "extra-edge",
                    f"an edge at {t[g]:.4f} s inside the crank gap is not a tooth (a runt "
                    "pulse) and was ignored",
                    float(t[g]),
                )
            )
        pitches = self._backfill(t, i, out) if not runt else 0
        out.tooth(t[i], self._angle, self._run, 1, pitches)
        out.refs.append(float(t[i]))
        return i, True

    def _backfill(self, t: np.ndarray, i: int, out: _Out) -> int:
        """At the first sync, on tooth 1 at ``t[i]``: when the ``K`` events before it are the
        whole revolution before (teeth 1 to K, every pitch period within 25 % of the one before
        it, the gap's counted as its pitches), emit them as the run's first revolution from its
        tooth 1 (a reference event) and move the run on by 360 deg; returns the pitches from
        tooth K to tooth 1 (0 when nothing was emitted: later runs, too few events, uneven
        periods).

        Mostly the capture started too close to that earlier tooth 1 for its gap to be seen
        (inside the gap, or one tooth before it); the same holds when that gap was there but
        not recognised.
        """
        spec = self.spec
        K = spec.teeth
        if self._run != 0 or i < K:
            return 0
        steps = np.asarray(spec.steps, dtype=float)
        T = np.diff(t[i - K : i + 1])
        if not np.all(T > 0):
            return 0
        q = T / steps
        if not np.all(_even(q)):
            return 0
        angles = np.concatenate(([0.0], np.cumsum(steps[:-1]))) * spec.pitch_deg
        teeth = np.arange(1, K + 1)
        pitches = np.concatenate(([0.0], steps[:-1]))
        out.teeth(t[i - K : i], angles, self._run, teeth, pitches)
        out.refs.append(float(t[i - K]))
        self._angle = 360.0
        shift = 360.0 / spec.pitch_deg
        self._hist = [(a + shift, b + shift, d) for a, b, d in self._hist]
        return int(steps[-1])

    def _clean_revolutions(self, t: np.ndarray, i: int, available: int, out: _Out) -> int:
        """Take the whole revolutions that follow tooth 1 at ``t[i]`` while each is clean:
        every pitch period (the gap counted as M + 1 pitches) within 25 % of the one before it.
        Up to ``available`` revolutions are looked at together; returns how many were taken.
        The teeth, angles and speed prediction are those the tooth-by-tooth path would give.
        """
        if available <= 0:
            return 0
        spec = self.spec
        K = spec.teeth
        steps = np.asarray(spec.steps, dtype=float)
        T = np.diff(t[i : i + available * K + 1])
        q = T / np.tile(steps, available)
        if not abs(math.log(q[0] / self._p_last)) < EVEN_LOG:
            return 0
        # the first period of each revolution is compared with the last one of the revolution
        # before, as the one-revolution check compares it with the speed prediction
        ok = np.concatenate(([True], _even(q)))
        clean = ok.reshape(available, K).all(axis=1)
        revs = available if clean.all() else int(np.argmin(clean))
        if revs == 0:
            return 0
        cum = np.cumsum(steps) * spec.pitch_deg
        teeth = np.arange(2, K + 2)
        teeth[-1] = 1
        # one revolution after another, added as the revolution-by-revolution loop adds them
        base = np.cumsum(np.concatenate(([self._angle], np.full(revs, 360.0))))
        out.teeth(
            t[i + 1 : i + revs * K + 1],
            (base[:-1, None] + cum[None, :]).ravel(),
            self._run,
            np.tile(teeth, revs),
            np.tile(steps, revs),
        )
        out.refs.extend(float(x) for x in t[i + K : i + revs * K + 1 : K])
        self._angle = float(base[-1])
        last = (revs - 1) * K
        self._p_prev = float(q[last + K - 2])
        self._p_last = float(q[last + K - 1])
        x = np.concatenate(([0.0], np.cumsum(steps)))
        x += self._angle / spec.pitch_deg - spec.positions
        self._hist = [
            (float(x[j]), float(x[j + 1]), float(T[last + j]))
            for j in range(max(0, K - HISTORY), K)
        ]
        return revs

    def _expected(self, x0: float, c: float, p_pred: float) -> float:
        """Expected duration of the next ``c`` pitches from pitch position ``x0``: the integral
        of the quadratic fitted to the last few pitch periods (so fast, uneven speed changes
        such as cranking swings are followed), kept within reach of the last period."""
        if len(self._hist) < 3:
            return p_pred * c
        xs = np.array([0.5 * (a + b) for a, b, _ in self._hist])
        ps = np.array([d / (b - a) for a, b, d in self._hist])
        try:
            k2, k1, k0 = np.polyfit(xs - x0, ps, 2)
        except (np.linalg.LinAlgError, ValueError):
            return p_pred * c
        integral = k0 * c + k1 * c * c / 2.0 + k2 * c**3 / 3.0
        lo, hi = 0.4 * self._p_last * c, 2.5 * self._p_last * c
        if not math.isfinite(integral):
            return p_pred * c
        return min(max(integral, lo), hi)

    def _step(self, t: np.ndarray, i: int, n: int, out: _Out) -> bool:
        """One tooth-by-tooth decision from the tooth at ``i``; False when sync is lost."""
        spec = self.spec
        K = spec.teeth
        ratio = min(max(self._p_last / self._p_prev, 0.8), 1.25) if self._p_prev > 0 else 1.0
        p_pred = self._p_last * ratio
        x0 = self._angle / spec.pitch_deg
        best = None  # (cost, err, skip, adv, pitches, interval)
        for skip in (0, 1):
            if i + 1 + skip >= n:
                break
            if skip and best is not None and best[1] < SKIP_ONLY_ABOVE:
                break  # the next edge is a plausible tooth: do not look for extra edges
            T = t[i + 1 + skip] - t[i]
            if T <= 0:
                continue
            q = T / p_pred
            for adv in range(1, K + 1):
                c = spec.span(self._tooth, adv)
                if c > q * 1.6 + 1:
                    break
                # two predictions: the quadratic through the last periods follows fast swings,
                # the ratio of the last two is steadier on a noisy signal; the closer one counts
                expect = min(
                    (self._expected(x0, c, p_pred), p_pred * c), key=lambda e: abs(math.log(T / e))
                )
                qc = T / (expect / c)  # pitches, at the predicted speed through the span
                if adv > 1 and abs(qc - c) > 0.3:
                    continue
                err = abs(math.log(T / expect))
                cost = err + skip * EXTRA_PENALTY + (adv - 1) * MISSING_PENALTY
                if best is None or cost < best[0]:
                    best = (cost, err, skip, adv, c, T)
        if best is None or best[1] > ACCEPT_LOG:
            self._synced = False
            self._losses += 1
            out.findings.append(
                Finding(
                    "warning",
                    "sync-lost",
                    f"crank sync lost after tooth {self._tooth} at {t[i]:.4f} s: the next "
                    f"interval does not fit the {spec.name} wheel; found again at the next gap",
                    float(t[i]),
                )
            )
            return False
        _, _, skip, adv, c, T = best
        if skip:
            self._extra += skip
            out.findings.append(
                Finding(
                    "info",
                    "extra-edge",
                    f"an edge at {t[i + 1]:.4f} s between crank teeth is not a tooth "
                    "(runt pulse, spike or noise) and was ignored",
                    float(t[i + 1]),
                )
            )
        if adv > 1:
            self._missing += adv - 1
            out.findings.append(
                Finding(
                    "warning",
                    "missing-teeth",
                    f"{adv - 1} crank tooth event(s) not seen after tooth {self._tooth} at "
                    f"{t[i]:.4f} s (dropout or damaged tooth); counted through",
                    float(t[i]),
                )
            )
        i += 1 + skip
        self._tooth = (self._tooth - 1 + adv) % K + 1
        self._angle += c * spec.pitch_deg
        self._p_prev, self._p_last = self._p_last, float(T / c)
        self._hist = [*self._hist[-(HISTORY - 1) :], (x0, x0 + c, float(T))]
        out.tooth(t[i], self._angle, self._run, self._tooth, c)
        if self._tooth == 1:
            out.refs.append(float(t[i]))
        out.last_i = i
        return True


def _even(q: np.ndarray) -> np.ndarray:
    """For pitch periods ``q``: whether each after the first is within :data:`EVEN_LOG` of the
    one before it.

    >>> _even(np.array([1.0, 1.1, 1.5, 1.4])).tolist()
    [True, False, True]
    """
    return np.abs(np.log(q[1:] / q[:-1])) < EVEN_LOG


def split_gaps(t: np.ndarray, lo: int, hi: int, missing: int) -> np.ndarray:
    """Intervals g in [lo, hi] that, with the interval before them, make up the gap of a wheel
    with ``missing`` teeth missing, split by an edge that is not a tooth (a runt pulse): the
    two add up to missing + 1 pitches, and at least one of them is clearly not a single pitch.
    """
    g = np.arange(max(lo, 3), hi + 1)
    g = g[g + 2 <= len(t) - 2]
    if len(g) == 0:
        return g
    T = np.diff(t)
    p = np.median(np.vstack([T[g - 3], T[g - 2], T[g + 1], T[g + 2]]), axis=0)
    a, b = T[g - 1], T[g]
    with np.errstate(divide="ignore", invalid="ignore"):
        whole = np.abs(np.log((a + b) / ((missing + 1) * p))) < math.log(1.1)
        odd = (np.maximum(a, b) > 1.4 * p) & (np.minimum(a, b) > 0.2 * p)
    return g[whole & odd]


class _Out:
    """Teeth decided in one call, gathered as arrays."""

    def __init__(self) -> None:
        self.parts: list[tuple[np.ndarray, ...]] = []
        self.refs: list[float] = []
        self.findings: list[Finding] = []
        self.last_i = 0

    def tooth(self, t: float, angle: float, run: int, tooth: int, pitches: float) -> None:
        self.parts.append(
            (np.array([t]), np.array([angle]), np.array([run]), np.array([tooth]),
             np.array([pitches]))
        )

    def teeth(self, t, angle, run, tooth, pitches) -> None:
        self.parts.append((t, angle, np.full(len(t), run), tooth, pitches))

    def track(self, pitch_deg: float, tracker: ToothTracker) -> ToothTrack:
        cols = list(zip(*self.parts, strict=True)) if self.parts else [()] * 5
        cat = [np.concatenate(c) if c else np.empty(0) for c in cols]
        return ToothTrack(
            times=cat[0].astype(float),
            angles=cat[1].astype(float),
            run=cat[2].astype(int),
            tooth=cat[3].astype(int),
            pitches=cat[4].astype(int),
            reference_times=np.asarray(self.refs, dtype=float),
            pitch_deg=pitch_deg,
            extra=tracker._extra,
            missing=tracker._missing,
            sync_losses=tracker._losses,
            findings=tuple(self.findings),
        )
