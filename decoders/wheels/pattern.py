"""Crank wheels of any tooth layout, read from the pattern library: several gaps, extra teeth.

A wheel is a cycle of *steps*: the teeth sit on a grid of ``positions`` equally spaced places
per revolution, and step k is the number of grid pitches from tooth k to tooth k + 1 (the last
step closes the revolution back to tooth 1). An N-M wheel is the special case of N - M - 1 steps
of 1 and one of M + 1; three gaps of two teeth on 36 positions are steps of 1 and three of 3;
twelve teeth with one extra tooth half a pitch before tooth 1 are eleven steps of 2 and two of 1
on a 24-position grid.

Sync (finding tooth 1) compares the ratios of consecutive tooth intervals with the ratios of
consecutive steps. A ratio of neighbouring intervals hardly depends on the engine speed (it
changes only as much as the speed changes from one tooth to the next), so the match holds while
cranking. The wheel's *window* is the fewest intervals before tooth 1 whose step ratios (with the
interval after tooth 1) occur nowhere else on the wheel by a clear margin; a wheel where no
window is unique repeats itself within a revolution, cannot show where a revolution starts, and
is refused when its file is read. After sync, the wheel is followed tooth by tooth exactly as an
N-M wheel is (:class:`~toothcomb.decoders.wheels.missing_tooth.ToothTracker`): the tracker
predicts each interval from the step the wheel says comes next.

Library files (``decoders/patterns/crank/*.toml``, or any file given by path) describe a wheel in
one of three ways::

    notation = "60-2"                                 # an N-M wheel (the N-M decoder runs)
    positions = 36                                    # a grid and the places without a tooth,
    missing_positions = [16, 17, 22, 23, 34, 35]      # counted from tooth 1 = position 0
    teeth_deg = [0, 30, 60, ..., 330, 345]            # tooth angles after tooth 1, first 0

>>> w = PatternSpec("two-gaps", 12, (1, 1, 1, 1, 3, 1, 1, 3))
>>> w.teeth, w.missing, w.pitch_deg, w.window
(8, 4, 30.0, 4)
>>> w.span(5, 2), w.teeth_deg[:6]
(4, (0.0, 30.0, 60.0, 90.0, 120.0, 210.0))
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from ..errors import UsageError
from ..patterns import PatternFile, find
from .base import ToothTrack
from .missing_tooth import MissingToothSpec, MissingToothWheel, ToothTracker, _Out, span_of

#: largest grid a library wheel may use (0.5 deg)
MAX_POSITIONS = 720
#: the tolerance on each interval ratio at sync, at most this (log units)
# common practice, no source: +-30 % from one interval to the next covers cranking swings
SYNC_TOL_MAX = math.log(1.3)
#: grid fit of a listed tooth angle (deg)
GRID_TOL_DEG = 0.01


def _log_ratios(seq: np.ndarray) -> np.ndarray:
    return np.log(seq[1:] / seq[:-1])


@dataclass(frozen=True)
class PatternSpec:
    """A crank wheel as a cycle of steps on a grid (see the module docstring)."""

    name: str
    #: grid places per revolution
    positions: int
    #: pitches from tooth k to tooth k + 1, tooth 1 first
    steps: tuple[int, ...]
    description: str = ""
    #: the file it came from
    source: str = ""
    #: intervals before tooth 1 that identify it (worked out from the steps)
    window: int = field(default=0, compare=False)
    #: tolerance on each interval ratio at sync (log units)
    tolerance: float = field(default=0.0, compare=False)

    def __post_init__(self) -> None:
        where = f"wheel {self.name!r}" + (f" ({self.source})" if self.source else "")
        if not 3 <= self.positions <= MAX_POSITIONS:
            raise UsageError(
                f"{where} has {self.positions} grid positions; use 3 to {MAX_POSITIONS}"
            )
        if len(self.steps) < 2 or any(int(s) != s or s < 1 for s in self.steps):
            raise UsageError(
                f"{where}: steps {list(self.steps)!r} must be 2 or more whole numbers >= 1"
            )
        if sum(self.steps) != self.positions:
            raise UsageError(
                f"{where}: its teeth span {sum(self.steps)} grid positions, not {self.positions}"
            )
        window, tol = _unique_window(np.asarray(self.steps, dtype=float))
        if window == 0:
            raise UsageError(
                f"{where} repeats itself within a revolution, so no tooth can be told to be "
                "tooth 1; a wheel needs one place that differs from every other"
            )
        object.__setattr__(self, "window", window)
        object.__setattr__(self, "tolerance", tol)

    @property
    def pitch_deg(self) -> float:
        return 360.0 / self.positions

    @property
    def teeth(self) -> int:
        return len(self.steps)

    @property
    def missing(self) -> int:
        """Grid positions without a tooth."""
        return self.positions - self.teeth

    @property
    def max_step(self) -> int:
        return max(self.steps)

    @property
    def gap_deg(self) -> float:
        """The widest space between two neighbouring teeth (deg)."""
        return self.max_step * self.pitch_deg

    @property
    def teeth_deg(self) -> tuple[float, ...]:
        """Angle of every tooth after tooth 1 (deg)."""
        return tuple(float(v) for v in np.concatenate(([0], np.cumsum(self.steps[:-1]))) *
                     self.pitch_deg)

    def step(self, tooth: int) -> int:
        """Pitches from ``tooth`` (1-based) to the next tooth on the wheel."""
        return self.steps[tooth - 1]

    def span(self, tooth: int, n: int) -> int:
        """Pitches from ``tooth`` to the tooth ``n`` teeth later."""
        return span_of(self, tooth, n)

    def signature(self) -> np.ndarray:
        """Log ratios of the window's intervals: ``window`` before tooth 1 and the one after."""
        s = np.asarray(self.steps, dtype=float)
        seq = np.concatenate((s[self.teeth - self.window :], s[:1]))
        return _log_ratios(seq)


def _unique_window(steps: np.ndarray) -> tuple[int, float]:
    """(fewest intervals before tooth 1 that identify it, ratio tolerance); (0, 0) when none.

    The tolerance is the smaller of SYNC_TOL_MAX and 40 % of the smallest ratio between two
    different step sizes (so two different steps never pass for each other), and another
    position only counts as different when it misses by more than twice the tolerance."""
    K = len(steps)
    sizes = np.unique(steps)
    if len(sizes) < 2:
        return 0, 0.0
    smallest = float(np.min(np.diff(np.log(sizes))))
    tol = min(SYNC_TOL_MAX, 0.4 * smallest)
    for w in range(1, K + 1):
        rows = []
        for r in range(K):  # intervals before tooth r + 1 and the one after it
            idx = np.arange(r - w, r + 1) % K
            rows.append(_log_ratios(steps[idx]))
        sig = np.array(rows)
        dist = np.max(np.abs(sig[1:] - sig[0]), axis=1)
        if np.all(dist > 2.0 * tol):
            return max(w, 2) if K > 2 else w, tol
    return 0, 0.0


def sync_matches(times: np.ndarray, spec: PatternSpec, lo: int = 0, hi: int | None = None
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Indices g in [lo, hi] where ``times[g]`` fits tooth 1: the ``window`` intervals before
    it and the one after it have the wheel's step ratios, each within the tolerance. Returns
    (indices, largest ratio misfit of each).

    >>> w = PatternSpec("x", 12, (1, 1, 1, 1, 3, 1, 1, 3))
    >>> t = np.concatenate(([0.0], np.cumsum(np.tile(w.steps, 3)))) * 0.01
    >>> sync_matches(t, w)[0].tolist()
    [8, 16]
    """
    t = np.asarray(times, dtype=float)
    W = spec.window
    n = len(t)
    hi = n - 2 if hi is None else min(hi, n - 2)
    lo = max(lo, W)
    if hi < lo:
        return np.empty(0, dtype=int), np.empty(0)
    seg = t[lo - W : hi + 2]
    T = np.diff(seg)
    with np.errstate(divide="ignore", invalid="ignore"):
        R = np.log(T[1:] / T[:-1])
    win = np.lib.stride_tricks.sliding_window_view(R, W)  # row j: ratios around g = lo + j
    with np.errstate(invalid="ignore"):
        err = np.max(np.abs(win - spec.signature()), axis=1)
    ok = np.isfinite(err) & (err < spec.tolerance)
    idx = np.flatnonzero(ok)
    return idx + lo, err[idx]


@dataclass(frozen=True)
class PatternScore:
    """How well event times show a library wheel."""

    spec: PatternSpec
    #: tooth-1 matches found
    matches: int
    #: share of neighbouring matches one revolution (``teeth`` events, give or take a tenth)
    #: apart
    confidence: float
    #: median ratio misfit of the matches (log units)
    misfit: float


def score(times: np.ndarray, spec: PatternSpec) -> PatternScore:
    """Look for ``spec`` in event times of one direction.

    >>> w = PatternSpec("x", 12, (1, 1, 1, 1, 3, 1, 1, 3))
    >>> t = np.concatenate(([0.0], np.cumsum(np.tile(w.steps, 4)))) * 0.01
    >>> s = score(t, w)
    >>> s.matches, s.confidence
    (3, 1.0)
    """
    g, err = sync_matches(times, spec)
    if len(g) < 2:
        return PatternScore(spec, len(g), 0.0, float(np.median(err)) if len(g) else math.inf)
    # one revolution apart, give or take a few teeth lost (dropouts) or edges gained (runts)
    spacing = np.diff(g)
    slack = max(1, spec.teeth // 10)
    conf = float(np.mean(np.abs(spacing - spec.teeth) <= slack))
    return PatternScore(spec, len(g), conf, float(np.median(err)))


class PatternTracker(ToothTracker):
    """Follows a library wheel through event times that arrive in pieces (see ToothTracker)."""

    def __init__(self, spec: PatternSpec, offsets: dict[int, float] | None = None) -> None:
        super().__init__(spec, offsets)  # type: ignore[arg-type]
        self._behind = spec.window + 2

    def _sync(self, t: np.ndarray, i: int, n: int, final: bool, out: _Out) -> tuple[int, bool]:
        spec: PatternSpec = self.spec  # type: ignore[assignment]
        hi = n - 2
        g, _err = sync_matches(t, spec, lo=i, hi=hi)
        if len(g) == 0:
            return max(i, hi + 1), False
        i = int(g[0])  # tooth 1
        K = spec.teeth
        s = spec.steps
        self._run += 1
        self._synced = True
        self._tooth = 1
        self._angle = 0.0
        self._p_last = self._p_prev = float((t[i + 1] - t[i]) / s[0])
        x1 = -float(s[K - 1])
        x2 = x1 - float(s[K - 2])
        self._hist = [(x2, x1, float(t[i - 1] - t[i - 2])), (x1, 0.0, float(t[i] - t[i - 1]))]
        pitches = self._backfill(t, i, out)
        out.tooth(t[i], self._angle, self._run, 1, pitches)
        out.refs.append(float(t[i]))
        return i, True


def decode_pattern(times: np.ndarray, spec: PatternSpec) -> ToothTrack:
    """Follow a library wheel through event times of one direction.

    >>> w = PatternSpec("x", 12, (1, 1, 1, 1, 3, 1, 1, 3))
    >>> t = np.concatenate(([0.0], np.cumsum(np.tile(w.steps, 3)))) * 0.01
    >>> tr = decode_pattern(t, w)
    >>> tr.reference_times.round(2).tolist(), tr.angles[:6].tolist(), tr.sync_losses
    ([0.0, 0.12, 0.24, 0.36], [0.0, 30.0, 60.0, 90.0, 120.0, 210.0], 0)
    """
    tracker = PatternTracker(spec)
    return ToothTrack.concat([tracker.feed(times), tracker.finish()], spec.pitch_deg)


def make_tracker(spec: object, offsets: dict[int, float] | None = None) -> ToothTracker:
    """The streaming tracker for either kind of wheel spec."""
    if isinstance(spec, PatternSpec):
        return PatternTracker(spec, offsets)
    if isinstance(spec, MissingToothSpec):
        return ToothTracker(spec, offsets)
    raise TypeError(f"no tracker for wheel spec {spec!r}")


def decode_any(times: np.ndarray, spec: object) -> ToothTrack:
    """Decode event times with the tracker of ``spec``'s kind."""
    tracker = make_tracker(spec)
    pitch = spec.pitch_deg  # type: ignore[attr-defined]
    return ToothTrack.concat([tracker.feed(times), tracker.finish()], pitch)


# -- reading library files ---------------------------------------------------------------------


def _number_list(pf: PatternFile, key: str) -> list[float]:
    v = pf.data.get(key)
    if not isinstance(v, list) or not v or not all(
        isinstance(x, int | float) and not isinstance(x, bool) and math.isfinite(x) for x in v
    ):
        raise UsageError(f"pattern file {pf.source!r}: {key} {v!r} is not a list of numbers")
    return [float(x) for x in v]


def steps_from_teeth(angles: Sequence[float], where: str = "wheel") -> tuple[int, tuple[int, ...]]:
    """(grid positions, steps) of tooth angles after tooth 1 (first 0): the coarsest grid of
    whole degrees' fractions on which every tooth sits within GRID_TOL_DEG.

    >>> steps_from_teeth([0, 30, 60, 90, 120, 150, 180, 210, 240, 270, 300, 330, 345])
    (24, (2, 2, 2, 2, 2, 2, 2, 2, 2, 2, 2, 1, 1))
    """
    a = np.asarray(angles, dtype=float)
    if a[0] != 0.0 or np.any(np.diff(a) <= 0) or a[-1] >= 360.0 or len(a) < 2:
        raise UsageError(
            f"{where}: teeth_deg must start at 0 and rise strictly below 360, with 2 or more teeth"
        )
    for p in range(len(a), MAX_POSITIONS + 1):
        x = a * p / 360.0
        if np.all(np.abs(x - np.rint(x)) * 360.0 / p < GRID_TOL_DEG):
            pos = np.rint(np.concatenate((x, [p]))).astype(int)
            return p, tuple(int(v) for v in np.diff(pos))
    raise UsageError(
        f"{where}: the teeth do not sit on any grid of up to {MAX_POSITIONS} equal places; give "
        "angles that are multiples of a common pitch"
    )


_BUILT_IN_SPECS: dict[str, MissingToothSpec | PatternSpec] = {}


def spec_from_file(pf: PatternFile) -> MissingToothSpec | PatternSpec:
    """The wheel a crank pattern file describes (a built-in one is worked out once)."""
    if pf.origin == "built-in":
        spec = _BUILT_IN_SPECS.get(pf.source)
        if spec is None:
            spec = _BUILT_IN_SPECS[pf.source] = _spec_from_file(pf)
        return spec
    return _spec_from_file(pf)


def _spec_from_file(pf: PatternFile) -> MissingToothSpec | PatternSpec:
    d = pf.data
    keys = [k for k in ("notation", "teeth_deg", "missing_positions") if k in d]
    if len(keys) != 1:
        raise UsageError(
            f"pattern file {pf.source!r} must give exactly one of notation, teeth_deg or "
            f"positions with missing_positions; it gives {keys or 'none'}"
        )
    if keys[0] == "notation":
        spec = MissingToothWheel.parse(str(d["notation"]))
        if spec is None:
            raise UsageError(
                f"pattern file {pf.source!r}: notation {d['notation']!r} is not N-M (e.g. 60-2)"
            )
        return spec
    if keys[0] == "teeth_deg":
        positions, steps = steps_from_teeth(_number_list(pf, "teeth_deg"), f"pattern file "
                                            f"{pf.source!r}")
    else:
        positions = d.get("positions")
        if not isinstance(positions, int) or isinstance(positions, bool):
            raise UsageError(
                f"pattern file {pf.source!r}: positions {positions!r} is not a whole number"
            )
        gone = _number_list(pf, "missing_positions")
        if any(int(g) != g or not 0 < g < positions for g in gone) or len(set(gone)) != len(gone):
            raise UsageError(
                f"pattern file {pf.source!r}: missing_positions must be distinct whole numbers "
                f"from 1 to {positions - 1} (position 0 is tooth 1)"
            )
        there = sorted(set(range(positions)) - {int(g) for g in gone})
        steps = tuple(int(v) for v in np.diff([*there, positions]))
    return PatternSpec(pf.name, positions, steps, pf.description, pf.source)


def library_wheels() -> dict[str, MissingToothSpec | PatternSpec]:
    """Every crank wheel in the library (built-in and user folders), by name."""
    from ..patterns import entries

    return {name: spec_from_file(pf) for name, pf in entries("crank").items()}


class PatternWheel:
    """The ``toothcomb.wheels`` plugin for wheels from the pattern library or a pattern file."""

    name = "pattern"
    handles = ("library wheels by name (several gaps, extra teeth, any tooth list) or a "
               "pattern file's path; see `toothcomb patterns`")

    @staticmethod
    def parse(text: str) -> MissingToothSpec | PatternSpec | None:
        """A library name or a .toml path -> its spec; None for other text.

        >>> PatternWheel.parse("tri-gap-36").steps[14:18]
        (1, 3, 1, 1)
        >>> PatternWheel.parse("no-such-wheel") is None
        True
        """
        pf = find("crank", text)
        return None if pf is None else spec_from_file(pf)

    @staticmethod
    def decoder(spec: MissingToothSpec | PatternSpec):
        return lambda times: decode_any(times, spec)

