"""Hall (and any digital, two-level) sensor front end.

A Hall sensor switches between two levels as tooth flanks pass. What reaches the instrument may
be a clean square wave (scope, DC-coupled), a square wave with droop and overshoot (sound card:
AC coupling and anti-alias filtering), or, for a slow cam at cranking speed through a sound card,
a positive spike at one flank and a negative one at the other. All of these share one feature:
at a flank the level *steps* within a few microseconds and then *stays* stepped for much longer.

The detector therefore looks for steps, not for absolute levels:

1. ``d[n] = x[n] - x[n - W]`` over a window ``W`` that spans the sensor's transition; runs of
   ``|d| > threshold`` are flank candidates (positive runs rising, negative runs falling).
2. The level before (``w`` samples ending where the run begins, less ``W``) and after (``w``
   samples after the run) are measured; a candidate whose new level does not persist (an
   ignition spike that comes back) is dropped.
3. The flank time is where the samples cross the midpoint of those two levels, interpolated
   linearly between the two samples around it: sub-sample, never on the sample grid. Because
   the midpoint is local, droop from AC coupling and a DC offset do not bias the time.

Thresholds are placed from the channel's own levels and refined on the first part of the
capture (:meth:`HallFrontEnd.calibrate`). Nothing is filtered, so no filter delay can move an
edge.
"""

from __future__ import annotations

import math
from typing import Any, NamedTuple

import numpy as np

from ..model import ChannelLevels, Edges
from .base import SampleFeed, despike, has_spikes

#: flank candidates gathered (over as many blocks as it takes) before they are judged and timed
#: together: the per-flank work is done in few, long numpy passes
FLANKS_PER_TIMING = 512
#: time a Hall output needs to switch, covered by the step window W (seconds)
# common practice, no source: sensor output rise/fall times of a few microseconds plus an
# instrument's anti-alias response fit well inside 25 us
TRANSITION_S = 25e-6
#: flanks (of a first detection) on which :meth:`HallFrontEnd.calibrate` chooses its window
# common practice, no source: the median step height of a few hundred flanks moves by well
# under the 10 % the window search looks for
CALIBRATION_FLANKS = 512


class HallFrontEnd(SampleFeed):
    """Edges of a two-level (Hall or digital) signal, streaming, with sub-sample timing.

    >>> fs = 48000.0
    >>> t = np.arange(4800) / fs
    >>> x = 2.5 + 2.5 * np.clip(200 * np.sin(2 * np.pi * 100 * t), -1, 1)  # 0/5 V, 100 Hz
    >>> lv = ChannelLevels("ch0", 4800, 0.0, 5.0, 2.5, 2.5, (0, 0, 0, 0, 2.5, 5, 5, 5, 5), 0.0, 0.0)
    >>> fe = HallFrontEnd(fs, lv)
    >>> e = Edges.concat([fe.process(x, 0), fe.finish()])
    >>> [int(d) for d in e.direction[:3]], round(float(e.times[0]) * 1e3, 4)
    ([-1, 1, -1], 5.0)
    """

    name = "hall"
    handles = "Hall and other two-level (digital) sensors: flank times"

    def __init__(
        self,
        sample_rate: float,
        levels: ChannelLevels,
        *,
        threshold: float | None = None,
        window: int | None = None,
        plateau: int = 3,
        max_run: int | None = None,
        despike: int = 1,
        persist: int = 0,
    ) -> None:
        self.sample_rate = float(sample_rate)
        #: step height (channel units) a flank must exceed
        self.threshold = float(threshold) if threshold is not None else 0.35 * levels.span
        #: samples spanned by a transition
        self.window = int(window) if window is not None else default_window(sample_rate)
        #: samples averaged on each side to measure the levels before and after a flank
        self.plateau = max(1, int(plateau))
        #: a candidate run longer than this is a slow swing, not a flank
        self.max_run = int(max_run) if max_run is not None else 4 * self.window + 16
        #: running-median length that removes spikes before detection (1: none)
        self.despike = int(despike) | 1
        self._half = self.despike // 2
        #: samples after a flank at which the new level must still hold (a spike's decay
        #: does not); 0 checks only right after the flank
        self.persist = max(0, int(persist))
        #: samples after (before) a flank at which the new (old) level must still hold
        self._reach = np.unique(
            np.linspace(1, self.persist, min(self.persist, 64)).round().astype(int)
        )[None, :]
        #: the reach is every sample 1..persist (then the samples are taken as rows)
        self._reach_run = bool(np.array_equal(self._reach[0], np.arange(1, self.persist + 1)))
        #: flanks waiting to be timed, per block: first sample of the run, run length - 1,
        #: direction, step height, midpoint level, [its stretch as recorded (, cleaned)]
        self._pend: list[tuple[np.ndarray, ...]] = []
        self._waiting = 0
        self._keep = (
            self.window + self.plateau + self.max_run + 4 + 2 * self._half + 2 * self.persist
        )
        self._last: tuple[float, int] | None = None  # (position, direction) of the last edge
        #: flank candidates that looked like steps but did not hold (spikes, runt pulses), by
        #: direction (+1 rising, -1 falling)
        self.rejected = {1: 0, -1: 0}
        self._buf = np.empty(0)
        self._buf_start = 0
        self._done = 0  # runs starting before this global index have been handled
        #: value of one unit of the samples fed (1.0 for floats; a PCM code's value), set by the
        #: first block; the thresholds in those units
        self._unit: float | None = None
        self._ints = False
        self._thr = self.threshold
        self._thr_steps: float = self.threshold
        self._dense = False  # whether the last search found steps in most stretches

    @classmethod
    def calibrate(
        cls, probe: np.ndarray, sample_rate: float, levels: ChannelLevels
    ) -> dict[str, Any]:
        """Threshold and plateau length from the first part of the channel.

        A first detection with a threshold from the level span gives the typical step height;
        the threshold is then placed at 40 % of it, and the plateau window is kept shorter than
        half the shortest level between flanks.
        """
        probe = np.asarray(probe, dtype=float)

        def detect(x: np.ndarray, window: int) -> Edges:
            first = cls(sample_rate, levels, window=window, plateau=1)
            return Edges.concat([first.process(x, 0), first.finish()])

        start = default_window(sample_rate)
        whole = detect(probe, start)
        # the window is chosen on the stretch holding the first CALIBRATION_FLANKS flanks (the
        # whole probe when it holds fewer): the medians compared are as steady on them, and a
        # VR channel's wide windows cost a pass over a stretch, not over the whole probe
        stretch = probe
        if len(whole) > CALIBRATION_FLANKS:
            stretch = probe[: int(whole.times[CALIBRATION_FLANKS] * sample_rate)]
        # A slower instrument (a scope's bandwidth limit) spreads a flank over more samples:
        # widen the window until the step heights stop growing.
        window = start
        best: tuple[int, Edges] | None = None
        for _ in range(6):
            edges = whole if stretch is probe and window == start else detect(stretch, window)
            if len(edges) >= 4:
                if best is not None and np.median(edges.strength) < 1.1 * np.median(
                    best[1].strength
                ):
                    break
                best = (window, edges)
            elif best is not None:
                break
            window *= 2
        opts: dict[str, Any] = {"window": start}
        if best is not None:
            window, edges = best
            if stretch is not probe:  # the chosen window's flanks over the whole probe
                edges = whole if window == start else detect(probe, window)
            opts["window"] = window
            opts["threshold"] = 0.4 * float(np.median(edges.strength))
            # the shortest level between real flanks (pairs closer than two windows are the two
            # halves of a spike) bounds how many samples can be averaged on each side
            gaps = np.diff(edges.times) * sample_rate
            gaps = gaps[gaps > 2 * window]
            shortest = float(np.percentile(gaps, 10)) if len(gaps) else 0.0
            opts["plateau"] = int(np.clip((shortest - window) // 3, 1, 3))
            # a real level lasts at least the shortest gap between flanks; a spike's tail
            # does not: check the level again halfway through that time, but no later than
            # 1 ms on (ignition spikes last tens of microseconds; AC-coupling droop is slow)
            opts["persist"] = int(np.clip(min(0.5 * shortest - 3, 1e-3 * sample_rate), 0, None))
            # a running median removes ignition spikes (only where there are any); it must be
            # shorter than any real level
            if has_spikes(probe, 0.3 * float(np.median(edges.strength))):
                opts["despike"] = 5 if shortest >= 10 else 3 if shortest >= 5 else 1
        return opts

    def _carry(self) -> np.ndarray:
        return self._buf

    def _process(
        self, samples: np.ndarray, start: int, unit: float, joined: bool = False
    ) -> Edges:
        ints = samples.dtype.kind in "iu"
        if self._unit is None:
            self._unit = unit
            self._ints = ints
            #: the step threshold in the units of the samples; integer steps exceed it exactly
            #: when they exceed its floor
            self._thr = self.threshold / unit
            self._thr_steps = min(math.floor(self._thr), 2**31 - 1) if ints else self._thr
        elif unit != self._unit or ints != self._ints:
            raise ValueError("a front end is fed floats or codes of one scale, not both")
        if len(self._buf) == 0:
            self._buf_start = start
        buf = np.concatenate((self._buf, samples)) if len(self._buf) and not joined else samples
        out = self._scan(buf, final=False)
        keep = min(len(buf), self._keep)
        self._buf = buf[len(buf) - keep :].copy()
        self._buf_start += len(buf) - keep
        return out

    def _ordered(
        self, pos: np.ndarray, sign: np.ndarray, step: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        pos, sign, step, self._last = _ordered_edges(self._last, pos, sign, step, self.window)
        return pos, sign, step

    @property
    def settled_s(self) -> float:
        """No edge earlier than this time (s) will come out of later calls."""
        first = self._buf_start
        if self._pend:
            first = min(first, int(self._pend[0][0][0]) - self.window)
        return first / self.sample_rate

    def _release(self) -> Edges:
        return self._time_pending()

    def _finish(self) -> Edges:
        out = self._scan(self._buf, final=True)
        self._buf = np.empty(0)
        return out

    # -- internals -------------------------------------------------------------------------

    def _scan(self, raw: np.ndarray, final: bool) -> Edges:
        """Find the flanks of ``raw`` (samples from :attr:`_buf_start`) and keep the stretch of
        samples each is timed in; they are timed by :meth:`_time_pending`, several blocks at
        once (once :data:`FLANKS_PER_TIMING` wait, or at the end)."""
        W, w, half = self.window, self.plateau, self._half
        n = len(raw)
        if n > W + 2 * w + 1 + 2 * half:
            self._find(raw, final, n)
        if self._waiting < FLANKS_PER_TIMING and not final:
            return Edges.empty()
        return self._time_pending()

    def _find(self, raw: np.ndarray, final: bool, n: int) -> None:
        W, w, half = self.window, self.plateau, self._half
        buf = despike(raw, self.despike)
        # where the last search found flanks several to a stretch (a crank), integer codes are
        # searched by bins (_bin_moves); where the bins moved also bounds, for the persistence
        # check below, the stretches where levels must hold
        moves = None
        tried = self._dense and buf.dtype.kind in "iu"
        if tried:
            moves = _bin_moves(buf, W, self._thr_steps)
        if moves is not None:
            s, e, sign = _steps_binned(buf, W, self._thr_steps, moves)
        else:
            # (the bins, once they declined, are not looked at again)
            s, e, sign = _steps(buf, W, self._thr_steps, binned=not tried)
        # a crank's flanks come several to a stretch: its next search goes straight to them
        self._dense = len(s) * STRETCH > n
        g = self._buf_start
        # a run is complete when the sample after it and the post-flank plateau are here
        P = self.persist
        complete = (e + w + half + P < n - 1) | final
        fresh = s + g >= self._done
        # runs that are complete but lack history (start of capture) are given up for good
        done = np.flatnonzero(complete & fresh)
        if len(done):
            self._done = max(self._done, int(e[done[-1]]) + g + 1)
        enough = (s - W - w - half - P >= 0) & (e + w + P < n)
        sel = complete & fresh & enough & ((e - s + 1) <= self.max_run)
        if not sel.any():
            return
        s, e, sign = s[sel], e[sel], sign[sel]
        # the first sample of the level windows before and after each flank
        pre, post = s - W - w + 1, e + 1
        lo, hi = _plateau_level(buf, pre, w), _plateau_level(buf, post, w)
        step = (hi - lo) * sign
        keep = step > self._thr
        if not keep.all():
            s, e, sign, lo, hi, step = s[keep], e[keep], sign[keep], lo[keep], hi[keep], step[keep]
            pre, post = pre[keep], post[keep]
            if len(s) == 0:
                return
        if P > 0:
            # the new level must still hold later on (a spike's tail has gone by then)
            # ... and the old one must have held before it (a spike's tail, seen as a step
            # down, starts from a level that was not there a moment earlier): the samples (up
            # to 64 spread over the span) stay on their side of the midpoint, but for a few
            # (another spike may fall in the span)
            mid0 = 0.5 * (lo + hi)
            reach = self._reach
            nr = reach.shape[1]
            if self._reach_run:
                held = self._held(buf, post + w, pre - nr, mid0, sign, moves)
            else:
                after = _beyond(buf[(post + w - 1)[:, None] + reach], mid0, sign)
                before = _beyond(buf[pre[:, None] - reach], mid0, -sign)
                held = (after / nr >= 0.8) & (before / nr >= 0.8)
            if not held.all():
                for d in (1, -1):
                    self.rejected[d] += int(np.count_nonzero(~held & (sign == d)))
                s, e, sign, lo, hi, step = (
                    s[held], e[held], sign[held], lo[held], hi[held], step[held]
                )
                pre, post = pre[held], post[held]
                if len(s) == 0:
                    return
        spiky = buf is not raw
        if spiky:
            # levels as recorded, unless a spike sits in them (then the cleaned ones)
            lo_raw, hi_raw = _plateau_level(raw, pre, w), _plateau_level(raw, post, w)
            clean = (np.abs(lo_raw - lo) < 0.1 * step) & (np.abs(hi_raw - hi) < 0.1 * step)
            lo = np.where(clean, lo_raw, lo)
            hi = np.where(clean, hi_raw, hi)
        # the stretch the flank crosses its midpoint in, [s - W, e + 1] (and on, to the
        # longest one's length); the time comes from the samples as recorded (the running median
        # only found the flank and measured the levels), from the cleaned ones where a spike sits
        # on it
        span = int(np.max(e - s)) + W + 2
        # (integer codes stay codes: _last_crossing_within and _linear_at compare them
        # exactly)
        stretch = [_rows(raw, s - W, span, clip=True)]
        if spiky:
            stretch.append(_rows(buf, s - W, span, clip=True))
        self._pend.append((s + g, e - s, sign, step, 0.5 * (lo + hi), stretch))
        self._waiting += len(s)

    def _held(
        self, buf: np.ndarray, after: np.ndarray, before: np.ndarray, mid: np.ndarray,
        sign: np.ndarray, moves: BinMoves | None = None,
    ) -> np.ndarray:
        """Per flank: whether the new level holds over the ``P`` samples from ``after`` on and
        the old one held over the ``P`` samples from ``before`` on (``P`` = :attr:`persist`;
        at least 80 % of them beyond the midpoint ``mid`` on their side). Where every sample of
        both stretches lies on its side (a clean flank) it holds; the others are counted sample
        by sample. Clean stretches are told by where the bins of integer codes moved
        (``moves``, :func:`_bin_moves`) when the caller has them, else by the lowest or highest
        sample of each stretch (one pass over the stretches)."""
        P = self.persist
        if max(int(after.max()), int(before.max())) + P >= len(buf):
            # a stretch reaches the end of the samples: count them all
            doubt = np.arange(len(mid))
            held = np.zeros(len(mid), dtype=bool)
        else:
            # the stretches on the high side (after a rising flank, before a falling one) must
            # lie above the midpoint, the others below
            up = sign > 0
            high_side = np.where(up, after, before)
            low_side = np.where(up, before, after)
            held = None if moves is None else self._held_by_bins(
                buf, high_side, low_side, mid, moves
            )
            if held is None:
                # the lowest sample of the first kind, the highest of the second (flanks
                # alternate, so the stretches of each kind come in order and each reduction
                # runs about once over the samples)
                low = np.minimum.reduceat(
                    buf, np.stack((high_side, high_side + P), axis=1).ravel()
                )
                high = np.maximum.reduceat(
                    buf, np.stack((low_side, low_side + P), axis=1).ravel()
                )
                held = (low[::2] > mid) & (high[::2] < mid)
            doubt = np.flatnonzero(~held)
            if len(doubt) == 0:
                return held
        m, sg = mid[doubt], sign[doubt]
        n_after = _beyond(_rows(buf, after[doubt], P), m, sg)
        n_before = _beyond(_rows(buf, before[doubt], P), m, -sg)
        held[doubt] = (n_after / P >= 0.8) & (n_before / P >= 0.8)
        return held

    def _held_by_bins(
        self, buf: np.ndarray, high_side: np.ndarray, low_side: np.ndarray, mid: np.ndarray,
        moves: BinMoves,
    ) -> np.ndarray | None:
        """Per flank: True where every sample of its high-side stretch is certainly above
        ``mid`` and every one of its low-side stretch below, from the bins of integer codes
        alone; None when too few are (the reductions then cost less than counting the rest).

        No bin moves inside a stretch after its first W samples (``moves``) means every sample
        there lies in the bin of one of those W; a bin ``b`` holds the codes ``b * 2**shift``
        to ``(b + 1) * 2**shift - 1``, so the whole stretch lies above ``mid`` when the lowest
        of those bins starts above it (below, when the highest ends below it)."""
        P, W = self.persist, self.window
        head = min(W, P)
        unit = 2.0**moves.shift
        clean = np.ones(len(mid), dtype=bool)
        # the moves as runs of consecutive samples (a flank moves a few in a row)
        at = moves.at
        brk = np.flatnonzero(np.diff(at) != 1)
        run_last = np.concatenate((at[brk], at[-1:]))
        # the first sample of each run, and past the last one a run that never comes
        run_first = np.concatenate((at[:1], at[brk + 1], [np.iinfo(np.int64).max]))
        for starts, high in ((high_side, True), (low_side, False)):
            # no move from sample start + W to the end of the stretch: the first run that ends
            # at or after start + W begins after the stretch (or there is none)
            nxt = run_first[np.searchsorted(run_last, starts + W)]
            clean &= nxt >= starts + max(P, W)
            # the lowest (highest) bin of the first W samples
            pick = np.minimum if high else np.maximum
            edge = buf[starts]
            for k in range(1, head):
                edge = pick(edge, buf[starts + k])
            edge = np.right_shift(edge, moves.shift)
            if high:
                clean &= edge * unit > mid
            else:
                clean &= (edge + 1.0) * unit - 1 < mid
        if np.count_nonzero(~clean) > len(mid) // 4:
            return None
        return clean

    def _time_pending(self) -> Edges:
        """Time the flanks found so far: where each crosses the midpoint of its two levels."""
        if not self._pend:
            return Edges.empty()
        W = self.window
        cols = list(zip(*self._pend, strict=True))
        s, width, sign, step, mid = (np.concatenate(c) for c in cols[:5])
        span = max(x[0].shape[1] for x in cols[5])
        stretch = [
            np.concatenate([_pad_right(x, span) for x in parts])
            for parts in zip(*cols[5], strict=True)
        ]
        self._pend, self._waiting = [], 0
        # the last crossing of the midpoint inside [s - W, e + 1]
        k, ok = _last_crossing_within(stretch[0], width + W + 1, mid, sign, W)
        pos = (s - W + k) + _linear_at(stretch[0], k, mid)
        if len(stretch) > 1 and not ok.all():
            k_med, _ = _last_crossing_within(stretch[1], width + W + 1, mid, sign, W)
            pos_med = (s - W + k_med) + _linear_at(stretch[1], k_med, mid)
            pos = np.where(ok, pos, pos_med)
        pos, sign, step = self._ordered(pos, sign, step)
        return Edges(pos / self.sample_rate, sign, step * self._unit)


def _step_runs(d: np.ndarray, threshold: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Runs of ``d > threshold`` (rising, +1) and of ``-d > threshold`` (falling, -1): first and
    last index (inclusive) and direction of each, in order. Steps are rare, so the samples are
    looked at in three passes and only the few indices over the threshold are grouped.

    >>> s, e, sign = _step_runs(np.array([0, 3, 3, 0, -3, 3, 0.0]), 1.0)
    >>> s.tolist(), e.tolist(), sign.tolist()
    ([1, 4, 5], [2, 4, 5], [1, -1, 1])
    """
    idx = np.flatnonzero(np.abs(d) > threshold)
    return _runs(idx, d[idx] > 0)


#: samples per stretch whose range :func:`_steps` looks at before it looks for steps in them
STRETCH = 1024
#: samples :func:`_steps_dense` subtracts and compares at a time (its arrays stay in cache)
DENSE_PIECE = 1 << 16


def _steps(
    x: np.ndarray, W: int, threshold: float, binned: bool = True
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Runs of steps ``|x[i] - x[i - W]| > threshold`` (``_step_runs`` of those differences):
    the index in ``x`` of the first and last sample of each run, and its direction.

    A stretch of :data:`STRETCH` samples whose range, together with the stretch before it, is
    within the threshold holds no step (no difference of two samples exceeds their range, and a
    correctly rounded subtraction keeps that order), so only the other stretches are looked at:
    a channel with few flanks (a cam) costs little more than two reductions per sample. Integer
    codes are subtracted in the narrowest type that cannot wrap around. Where steps are dense
    (a crank: several in every stretch), integer codes are searched by :func:`_steps_binned`,
    unless ``binned`` is False (the caller found that it declines).

    >>> x = np.r_[np.zeros(5000), np.ones(5000)]
    >>> [a.tolist() for a in _steps(x, 2, 0.5)]
    [[5000], [5001], [1]]
    >>> [a.tolist() for a in _steps(np.array([0, 0, 9, 9, 9, 0], np.int16), 2, 5)]
    [[2, 5], [3, 5], [1, -1]]
    """
    n = len(x)
    if n <= W:
        return _runs(np.empty(0, dtype=np.intp), np.empty(0, dtype=bool))
    ints = x.dtype.kind in "iu"
    C = STRETCH
    m = n // C
    if threshold < 0 or W > C or m < 4:
        return _steps_dense(x, W, threshold, _difference_type(x, x.max(), x.min()))
    # the highest and lowest sample of each stretch (NaN ignored: no step is found on one),
    # the last, shorter stretch included
    top, bottom = (np.maximum, np.minimum) if ints else (np.fmax, np.fmin)
    rows = x[: m * C].reshape(m, C)
    hi = top.reduce(rows, axis=1)
    lo = bottom.reduce(rows, axis=1)
    if m * C < n:
        hi = np.append(hi, top.reduce(x[m * C :]))
        lo = np.append(lo, bottom.reduce(x[m * C :]))
    if ints:
        hi, lo = hi.astype(np.int64), lo.astype(np.int64)
    # a step ending in stretch j starts there or in stretch j - 1 (W <= C)
    hi2 = top(hi, np.concatenate((hi[:1], hi[:-1])))
    lo2 = bottom(lo, np.concatenate((lo[:1], lo[:-1])))
    active = (hi2 - lo2) > threshold
    j = np.flatnonzero(active)
    if len(j) == 0:
        return _runs(np.empty(0, dtype=np.intp), np.empty(0, dtype=bool))
    wide = _difference_type(x, hi.max(), lo.min()) if ints else x.dtype
    if 4 * len(j) > len(active):
        if ints and binned and (found := _steps_binned(x, W, threshold)) is not None:
            return found
        return _steps_dense(x, W, threshold, wide)
    tail = len(j) and j[-1] == m  # the shorter last stretch
    j = j[:-1] if tail else j
    idx: list[np.ndarray] = []
    up: list[np.ndarray] = []
    if len(j):
        # each stretch with the W samples before it (the first one: its own first W samples,
        # which give differences of zero)
        before = np.where(j[:, None] > 0, rows[j - 1, C - W :], rows[j, :W])
        piece = np.concatenate((before, rows[j]), axis=1)
        d = np.subtract(piece[:, W:], piece[:, :-W], dtype=wide).ravel()
        k = np.flatnonzero(np.abs(d) > threshold)
        idx.append(j[k // C] * C + k % C)
        up.append(d[k] > 0)
    if tail:
        d = np.subtract(x[m * C :], x[m * C - W : n - W], dtype=wide)
        k = np.flatnonzero(np.abs(d) > threshold)
        idx.append(k + m * C)
        up.append(d[k] > 0)
    if len(idx) == 1:
        return _runs(idx[0], up[0])
    return _runs(np.concatenate(idx), np.concatenate(up))


#: :func:`_steps_binned` gives up (for :func:`_steps_dense`) when more than this share of the
#: samples are candidates (a level sitting on a bin edge)
BINNED_SHARE = 1 / 8


class BinMoves(NamedTuple):
    """Where integer codes change bin: with bins of ``2**shift`` codes (``x >> shift``),
    ``at`` holds, in order, every sample index i (i >= W) whose bin differs from that of the
    sample W before it. Between two such indices every sample lies in the bin of one of the W
    samples before the stretch (bin(x[i]) = bin(x[i - W]) = ...): :meth:`HallFrontEnd._held`
    bounds a stretch with a handful of samples instead of reading them all."""

    shift: int
    at: np.ndarray


def _bin_moves(x: np.ndarray, W: int, threshold: float) -> BinMoves | None:
    """The :class:`BinMoves` of integer codes ``x`` for bins of the largest power of two not
    above ``threshold`` (and less than the codes' own range); None when the threshold is below
    one code or more than :data:`BINNED_SHARE` of the samples move (a level on a bin edge).

    >>> m = _bin_moves(np.r_[np.zeros(50, np.int16), np.full(50, 9, np.int16)], 2, 5)
    >>> m.shift, m.at.tolist()
    (2, [50, 51])
    """
    if not threshold >= 1 or len(x) <= W:
        return None
    # 2**shift <= threshold, and less than the codes' own range
    shift = min(math.floor(min(threshold, 2.0**62)).bit_length(), 8 * x.dtype.itemsize) - 1
    bins = np.right_shift(x, shift)
    at = np.flatnonzero(bins[W:] != bins[:-W])
    if len(at) > BINNED_SHARE * (len(x) - W):
        return None
    at += W
    return BinMoves(shift, at)


def _steps_binned(
    x: np.ndarray, W: int, threshold: float, moves: BinMoves | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """:func:`_steps` on integer codes with many steps, by bins: with ``B`` the largest power of
    two not above the threshold, two codes more than the threshold apart lie in different bins
    of ``B`` codes (``x >> log2(B)``), so only the samples whose bin differs from the one ``W``
    samples before can start or continue a step; only those few are subtracted and compared
    (exactly, in 64 bits). One shift and one comparison per sample instead of a subtraction and
    two comparisons in a wider type. None when the threshold is below one code or too many
    samples are candidates (then :func:`_steps_dense` is the faster). ``moves``: the
    :func:`_bin_moves` of ``x``, when the caller has them.

    >>> x = np.r_[np.zeros(50, np.int16), np.full(50, 9, np.int16)]
    >>> [a.tolist() for a in _steps_binned(x, 2, 5)]
    [[50], [51], [1]]
    """
    if moves is None:
        moves = _bin_moves(x, W, threshold)
    if moves is None:
        return None
    at = moves.at
    d = np.subtract(x[at], x[at - W], dtype=np.int64)
    k = np.flatnonzero(np.abs(d) > threshold)
    return _runs(at[k], d[k] > 0)


def _difference_type(x: np.ndarray, high: Any, low: Any) -> np.dtype:
    """The type in which samples of ``x`` between ``low`` and ``high`` are subtracted without
    wrapping around: their own, or a wider integer (a signed one: a difference of unsigned
    codes may be negative).

    >>> [str(_difference_type(np.zeros(1, t), 200, 10)) for t in (np.int16, np.uint8)]
    ['int16', 'int32']
    """
    if x.dtype.kind not in "iu":
        return x.dtype
    span = int(high) - int(low)
    for t in (x.dtype, np.dtype(np.int32), np.dtype(np.int64)):
        if t.kind == "i" and np.can_cast(x.dtype, t) and span <= np.iinfo(t).max:
            return t
    return np.dtype(np.int64)


def _steps_dense(
    x: np.ndarray, W: int, threshold: float, wide: np.dtype
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`_steps` on every sample: the runs are where the step's sign over the threshold
    changes, found in one pass rather than by gathering every index over the threshold."""
    if threshold < 0:
        d = np.subtract(x[W:], x[:-W], dtype=wide)
        idx = np.flatnonzero(np.abs(d) > threshold)
        return _runs(idx + W, d[idx] > 0)
    # +1 where a step up exceeds the threshold, -1 where a step down does, else 0; worked out
    # in pieces that stay in the processor's cache
    n = len(x) - W
    c = np.empty(n, dtype=np.int8)
    flag = c.view(bool)
    # where c changes (from the sample before; the first sample counts as a change when a run
    # starts there)
    changes = []
    for i in range(0, n, DENSE_PIECE):
        j = min(i + DENSE_PIECE, n)
        part = x[i : j + W]
        if wide != x.dtype:
            part = part.astype(wide)  # converted once: faster than inside the subtraction
        d = np.subtract(part[W:], part[:-W])
        np.greater(d, threshold, out=flag[i:j])
        c[i:j] -= np.less(d, -threshold).view(np.int8)
        lo = max(i, 1)
        changes.append(np.flatnonzero(c[lo:j] != c[lo - 1 : j - 1]) + lo)
    at = np.concatenate(changes)
    if c[0]:
        at = np.concatenate(([0], at))
    first = at[c[at] != 0]
    inner = at[at > 0]
    ends = inner[c[inner - 1] != 0] - 1
    if c[-1]:
        ends = np.append(ends, len(c) - 1)
    return first + W, ends + W, c[first].astype(np.int8)


def _runs(idx: np.ndarray, up: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Runs of consecutive indices ``idx`` of the same direction ``up``: first and last index
    and direction (+1 up, -1 down) of each."""
    if len(idx) == 0:
        empty = np.empty(0, dtype=np.intp)
        return empty, empty, np.empty(0, dtype=np.int8)
    # a run ends where the next index over the threshold is not the next sample, or steps the
    # other way
    brk = (np.diff(idx) != 1) | (up[1:] != up[:-1])
    first = np.concatenate(([0], np.flatnonzero(brk) + 1))
    last = np.concatenate((first[1:] - 1, [len(idx) - 1]))
    return idx[first], idx[last], np.where(up[first], 1, -1).astype(np.int8)


def _ordered_edges(
    last: tuple[float, int] | None,
    pos: np.ndarray,
    sign: np.ndarray,
    step: np.ndarray,
    min_gap: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, tuple[float, int] | None]:
    """Drop flanks that do not come strictly after the previous one, or that repeat its
    direction within ``min_gap`` samples (the same flank found twice)."""
    if len(pos) == 0:
        return pos, sign, step, last
    # the usual case: every flank comes after the one before it (then all are kept)
    prev_pos = np.concatenate(([last[0] if last is not None else -np.inf], pos[:-1]))
    prev_sign = np.concatenate(([last[1] if last is not None else 0], sign[:-1]))
    if np.all((pos > prev_pos) & ~((sign == prev_sign) & (pos - prev_pos < min_gap))):
        return pos, sign, step, (float(pos[-1]), int(sign[-1]))
    keep = np.ones(len(pos), dtype=bool)
    for i in range(len(pos)):
        if last is not None and (
            pos[i] <= last[0] or (sign[i] == last[1] and pos[i] - last[0] < min_gap)
        ):
            keep[i] = False
            continue
        last = (float(pos[i]), int(sign[i]))
    return pos[keep], sign[keep], step[keep], last


def _beyond(x: np.ndarray, level: np.ndarray, sign: np.ndarray) -> np.ndarray:
    """Per row of samples ``x``: how many lie beyond its ``level`` on the side of its ``sign``
    (``(x - level) * sign > 0``, counted without making those arrays; integer codes are compared
    with the level as they are, which is exact).

    >>> _beyond(np.array([[1, 5, 7], [1, 5, 7]]), np.array([4.5, 4.5]), np.array([1, -1]))
    array([2, 1])
    """
    if x.dtype.kind in "iu" and len(level):
        # an integer lies above a level exactly when it lies above the level's floor, below it
        # exactly when it does not lie above its ceiling less one: one comparison per sample,
        # integers with integers
        up = sign > 0
        t = np.where(up, np.floor(level), np.ceil(level) - 1)
        info = np.iinfo(x.dtype)
        if info.min <= t.min() and t.max() <= info.max:
            c = np.count_nonzero(x > t.astype(x.dtype)[:, None], axis=1)
            return np.where(up, c, x.shape[1] - c)
    m = level[:, None]
    return np.where(sign > 0, np.count_nonzero(x > m, axis=1), np.count_nonzero(x < m, axis=1))


def _rows(x: np.ndarray, starts: np.ndarray, length: int, clip: bool = False) -> np.ndarray:
    """``x[starts[i] : starts[i] + length]`` for every i, as rows of a new array (copied row by
    row, not gathered sample by sample). With ``clip``, indices past the end of ``x`` take its
    last sample; otherwise every row must lie inside ``x``.

    >>> _rows(np.arange(10), np.array([0, 7]), 4, clip=True).tolist()
    [[0, 1, 2, 3], [7, 8, 9, 9]]
    """
    n = len(x)
    if length > n:
        return x[np.minimum(starts[:, None] + np.arange(length), n - 1)]
    step = x.strides[0]
    windows = np.lib.stride_tricks.as_strided(
        x, shape=(n - length + 1, length), strides=(step, step), writeable=False
    )
    if not clip:
        return windows[starts]
    inside = starts <= n - length
    if inside.all():
        return windows[starts]
    out = np.empty((len(starts), length), dtype=x.dtype)
    out[inside] = windows[starts[inside]]
    late = starts[~inside]
    out[~inside] = x[np.minimum(late[:, None] + np.arange(length), n - 1)]
    return out


def _floats(x: np.ndarray) -> np.ndarray:
    """Gathered samples as float64 (integer codes turned into floats only where looked at)."""
    return np.asarray(x, dtype=np.float64)


def _median3(x: np.ndarray) -> np.ndarray:
    """Median of each row of three: the same value as ``np.median(x, axis=1)``, in four
    elementwise passes instead of a sort.

    >>> _median3(np.array([[3.0, 1.0, 2.0], [5.0, 5.0, -1.0]])).tolist()
    [2.0, 5.0]
    """
    a, b, c = x[:, 0], x[:, 1], x[:, 2]
    return np.maximum(np.minimum(a, b), np.minimum(np.maximum(a, b), c))


def _mean(x: np.ndarray) -> np.ndarray:
    return x.mean(axis=1)


def _plateau_level(x: np.ndarray, first: np.ndarray, w: int) -> np.ndarray:
    """The level of the ``w`` samples of ``x`` from each of ``first`` on, as float64: the
    median of the first three (``w >= 3``; picked among the samples as they are, then made a
    float, which is exact) or the mean of all ``w``. The value ``_median3`` / ``_mean`` give
    on the gathered rows, from three (or ``w``) gathers of one sample per flank.

    >>> _plateau_level(np.array([5, 1, 3, 9, 9], np.int16), np.array([0, 2]), 3).tolist()
    [3.0, 9.0]
    >>> _plateau_level(np.array([1.0, 2.0, 4.0]), np.array([0, 1]), 2).tolist()
    [1.5, 3.0]
    """
    if w >= 3:
        a, b, c = x[first], x[first + 1], x[first + 2]
        return _floats(np.maximum(np.minimum(a, b), np.minimum(np.maximum(a, b), c)))
    return _mean(_floats(x[first[:, None] + np.arange(w)]))


#: columns :func:`_last_crossing_within` handles as the bits of one number (exact in float64;
#: a multiple of 8)
BIT_COLUMNS = 48
#: times 8 bytes of 0 or 1 (byte i the lowest-but-i): their bits, byte i at bit 56 + i
# source: the multiply-and-shift bit gather of H. S. Warren, "Hacker's Delight" (2nd ed.,
# 2012), section 7-9; each byte lands on its own bit, and no two products overlap
_GATHER_BITS = np.uint64(0x0102040810204080)


def _last_crossing_within(
    stretch: np.ndarray, limit: np.ndarray, mid: np.ndarray, sign: np.ndarray, W: int
) -> tuple[np.ndarray, np.ndarray]:
    """Per flank: the sample (counted from the start of its stretch, s - W) after which the
    ``stretch`` of samples last crosses ``mid`` in the flank's direction (from short of it to
    at or beyond it) with the sample after the crossing no later than column ``limit``, and
    whether there was such a crossing (if not: the sample before the run, s - 1, at W - 1).

    The rows are turned into numbers, a bit per sample on the far side of the midpoint,
    :data:`BIT_COLUMNS` columns to a number (longer rows in overlapping pieces), and the
    crossings found on those numbers: a few passes over the flanks instead of a few over every
    sample of every stretch, and exactly what the definition gives.

    >>> k, has = _last_crossing_within(np.array([[0.0, 0, 1, 0, 1, 1]]), np.array([5]),
    ...                                np.array([0.5]), np.array([1]), 2)
    >>> k.tolist(), has.tolist()
    ([3], [True])
    """
    n, span = stretch.shape
    if n == 0:
        return np.full(0, W - 1), np.zeros(0, dtype=bool)
    width = -(-span // 8) * 8
    above = np.zeros((n, width), dtype=bool)
    if stretch.dtype.kind in "iu":
        # integer codes: at or beyond the midpoint is above ceil(mid) - 1 for a rising flank,
        # not above floor(mid) for a falling one (exactly what the float test gives; for a
        # falling flank the bits are turned over below)
        up = sign > 0
        t = np.where(up, np.ceil(mid) - 1, np.floor(mid))
        info = np.iinfo(stretch.dtype)
        kind = stretch.dtype if info.min <= t.min() and t.max() <= info.max else np.int64
        np.greater(stretch, t.astype(kind)[:, None], out=above[:, :span])
    else:
        up = None
        # (x - mid) * sign >= 0 is x * sign >= mid * sign: a sign change and a subtraction
        # are exact in the comparison's terms (finite samples)
        s = sign.astype(stretch.dtype)[:, None]
        np.greater_equal(stretch * s, mid[:, None] * s, out=above[:, :span])
    words = above.view("<u8")
    limit = np.asarray(limit, dtype=np.int64)
    last = np.full(n, W - 1, dtype=np.int64)
    has = np.zeros(n, dtype=bool)
    # pieces of BIT_COLUMNS columns starting every BIT_COLUMNS - 8 (whole words): a crossing
    # from column j to j + 1 lies inside the piece that starts at or before j and reaches past
    # j + 1, and the last piece holding any crossing holds the last one
    for c0 in range(0, max(span - 1, 1), BIT_COLUMNS - 8):
        q0 = c0 // 8
        cols = min(BIT_COLUMNS, width - c0)
        bits = (words[:, q0] * _GATHER_BITS) >> np.uint64(56)
        for q in range(1, cols // 8):
            bits |= ((words[:, q0 + q] * _GATHER_BITS) >> np.uint64(56)) << np.uint64(8 * q)
        if up is not None:
            turn = np.uint64((1 << min(cols, span - c0)) - 1)
            bits ^= np.where(up, np.uint64(0), turn)
        # bit j: below the midpoint at column c0 + j, at or beyond it at c0 + j + 1, and
        # c0 + j + 1 inside
        reach = np.clip(limit - c0, 0, cols - 1).astype(np.uint64)
        inside = (np.uint64(1) << reach) - np.uint64(1)
        cross = ~bits & (bits >> np.uint64(1)) & inside
        found = cross != 0
        top = np.frexp(cross.astype(np.float64))[1] - 1  # the highest bit set
        last = np.where(found, top + c0, last)
        has |= found
    return last, has


def _pad_right(x: np.ndarray, width: int) -> np.ndarray:
    """``x`` (rows of samples) made ``width`` columns wide by repeating its last column.

    >>> _pad_right(np.array([[1.0, 2.0]]), 4).tolist()
    [[1.0, 2.0, 2.0, 2.0]]
    """
    if x.shape[1] >= width:
        return x
    return np.concatenate((x, np.repeat(x[:, -1:], width - x.shape[1], axis=1)), axis=1)


def _linear_at(stretch: np.ndarray, k: np.ndarray, level: np.ndarray) -> np.ndarray:
    """Per row of ``stretch``: the fraction of a sample after ``k`` where it crosses ``level``
    (linear interpolation, as :func:`~toothcomb.decoders.frontends.base.linear_crossing`).

    >>> _linear_at(np.array([[0.0, 1.0, 3.0]]), np.array([1]), np.array([2.0]))
    array([0.5])
    """
    rows = np.arange(len(k))
    y1 = _floats(stretch[rows, k])  # integer codes: no wrap-around in the difference
    y2 = _floats(stretch[rows, k + 1])
    denom = y2 - y1
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(denom != 0, (level - y1) / denom, 0.5)
    return np.clip(frac, 0.0, 1.0)


def default_window(sample_rate: float) -> int:
    """Samples the step window spans at ``sample_rate``: at least 2, else 25 us worth.

    >>> default_window(48000), default_window(1e6)
    (2, 25)
    """
    return max(2, math.ceil(TRANSITION_S * sample_rate))
