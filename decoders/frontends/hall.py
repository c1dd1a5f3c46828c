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
from typing import Any

import numpy as np

from ..model import ChannelLevels, Edges
from .base import despike, has_spikes, linear_crossing

#: time a Hall output needs to switch, covered by the step window W (seconds)
# common practice, no source: sensor output rise/fall times of a few microseconds plus an
# instrument's anti-alias response fit well inside 25 us
TRANSITION_S = 25e-6


def _runs(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Start and end (inclusive) indices of the runs of True in ``mask``."""
    m = np.concatenate(([False], mask, [False]))
    dm = np.diff(m.astype(np.int8))
    starts = np.flatnonzero(dm == 1)
    ends = np.flatnonzero(dm == -1) - 1
    return starts, ends


class HallFrontEnd:
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
        window = default_window(sample_rate)
        # A slower instrument (a scope's bandwidth limit) spreads a flank over more samples:
        # widen the window until the step heights stop growing.
        best: tuple[int, Edges] | None = None
        for _ in range(6):
            first = cls(sample_rate, levels, window=window, plateau=1)
            edges = Edges.concat([first.process(probe, 0), first.finish()])
            if len(edges) >= 4:
                if best is not None and np.median(edges.strength) < 1.1 * np.median(
                    best[1].strength
                ):
                    break
                best = (window, edges)
            elif best is not None:
                break
            window *= 2
        opts: dict[str, Any] = {"window": default_window(sample_rate)}
        if best is not None:
            window, edges = best
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

    def process(self, samples: np.ndarray, start: int) -> Edges:
        samples = np.asarray(samples, dtype=float)
        if len(self._buf) == 0:
            self._buf_start = start
        buf = np.concatenate((self._buf, samples)) if len(self._buf) else samples
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
        return self._buf_start / self.sample_rate

    def finish(self) -> Edges:
        out = self._scan(self._buf, final=True) if len(self._buf) else Edges.empty()
        self._buf = np.empty(0)
        return out

    # -- internals -------------------------------------------------------------------------

    def _scan(self, raw: np.ndarray, final: bool) -> Edges:
        W, w, half = self.window, self.plateau, self._half
        n = len(raw)
        if n <= W + 2 * w + 1 + 2 * half:
            return Edges.empty()
        buf = despike(raw, self.despike)
        d = buf[W:] - buf[:-W]  # d[i] belongs to buf index i + W
        parts = []
        for sign in (1, -1):
            s, e = _runs(sign * d > self.threshold)
            s = s + W
            e = e + W
            parts.append((s, e, np.full(len(s), sign, dtype=np.int8)))
        s = np.concatenate([p[0] for p in parts])
        e = np.concatenate([p[1] for p in parts])
        sign = np.concatenate([p[2] for p in parts])
        order = np.argsort(s, kind="stable")
        s, e, sign = s[order], e[order], sign[order]
        g = self._buf_start
        # a run is complete when the sample after it and the post-flank plateau are here
        P = self.persist
        complete = (e + w + half + P < n - 1) | final
        fresh = s + g >= self._done
        enough = (s - W - w - half - P >= 0) & (e + w + P < n)
        sel = complete & fresh & enough
        # runs that are complete but lack history (start of capture) are given up for good
        if np.any(complete & fresh):
            last = int(np.max(np.flatnonzero(complete & fresh)))
            self._done = max(self._done, int(e[last]) + g + 1)
        s, e, sign = s[sel], e[sel], sign[sel]
        ok = (e - s + 1) <= self.max_run
        s, e, sign = s[ok], e[ok], sign[ok]
        if len(s) == 0:
            return Edges.empty()
        ar = np.arange(w)
        pre_i = (s - W - w + 1)[:, None] + ar[None, :]
        post_i = (e + 1)[:, None] + ar[None, :]
        level = _median if w >= 3 else _mean
        lo, hi = level(buf[pre_i]), level(buf[post_i])
        step = (hi - lo) * sign
        keep = step > self.threshold
        s, e, sign, lo, hi, step = s[keep], e[keep], sign[keep], lo[keep], hi[keep], step[keep]
        pre_i, post_i = pre_i[keep], post_i[keep]
        if len(s) == 0:
            return Edges.empty()
        if P > 0:
            # the new level must still hold later on (a spike's tail has gone by then)
            # ... and the old one must have held before it (a spike's tail, seen as a step
            # down, starts from a level that was not there a moment earlier): the samples (up
            # to 64 spread over the span) stay on their side of the midpoint, but for a few
            # (another spike may fall in the span)
            mid0 = 0.5 * (lo + hi)[:, None]
            reach = np.unique(np.linspace(1, P, min(P, 64)).round().astype(int))
            after = buf[post_i[:, -1:] + reach[None, :]]
            before = buf[pre_i[:, :1] - reach[None, :]]
            held = (np.mean((after - mid0) * sign[:, None] > 0, axis=1) >= 0.8) & (
                np.mean((before - mid0) * sign[:, None] < 0, axis=1) >= 0.8
            )
            for d in (1, -1):
                self.rejected[d] += int(np.count_nonzero(~held & (sign == d)))
            s, e, sign, lo, hi, step = s[held], e[held], sign[held], lo[held], hi[held], step[held]
            pre_i, post_i = pre_i[held], post_i[held]
            if len(s) == 0:
                return Edges.empty()
        # levels as recorded, unless a spike sits in them (then the cleaned ones)
        lo_raw, hi_raw = level(raw[pre_i]), level(raw[post_i])
        clean = (np.abs(lo_raw - lo) < 0.1 * step) & (np.abs(hi_raw - hi) < 0.1 * step)
        lo = np.where(clean, lo_raw, lo)
        hi = np.where(clean, hi_raw, hi)
        mid = 0.5 * (lo + hi)
        # the flank: last crossing of the midpoint inside [s - W, e + 1]
        span = int(np.max(e - s)) + W + 2
        idx = (s - W)[:, None] + np.arange(span)[None, :]
        inside = idx <= (e + 1)[:, None]
        idx = np.minimum(idx, n - 1)
        # the time comes from the samples as recorded (the running median only found the flank
        # and measured the levels); where a spike sits right on the flank, from the cleaned ones
        k_raw, ok_raw = _last_crossing(raw, idx, inside, mid, sign, s, W)
        k_med, _ = _last_crossing(buf, idx, inside, mid, sign, s, W)
        pos_raw = (k_raw + g) + linear_crossing(raw, k_raw, mid)
        pos_med = (k_med + g) + linear_crossing(buf, k_med, mid)
        pos = np.where(ok_raw, pos_raw, pos_med)
        pos, sign, step = self._ordered(pos, sign, step)
        return Edges(pos / self.sample_rate, sign, step)


def _ordered_edges(
    last: tuple[float, int] | None,
    pos: np.ndarray,
    sign: np.ndarray,
    step: np.ndarray,
    min_gap: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, tuple[float, int] | None]:
    """Drop flanks that do not come strictly after the previous one, or that repeat its
    direction within ``min_gap`` samples (the same flank found twice)."""
    keep = np.ones(len(pos), dtype=bool)
    for i in range(len(pos)):
        if last is not None and (
            pos[i] <= last[0] or (sign[i] == last[1] and pos[i] - last[0] < min_gap)
        ):
            keep[i] = False
            continue
        last = (float(pos[i]), int(sign[i]))
    return pos[keep], sign[keep], step[keep], last


def _median(x: np.ndarray) -> np.ndarray:
    return np.median(x, axis=1)


def _mean(x: np.ndarray) -> np.ndarray:
    return x.mean(axis=1)


def _last_crossing(
    x: np.ndarray,
    idx: np.ndarray,
    inside: np.ndarray,
    mid: np.ndarray,
    sign: np.ndarray,
    s: np.ndarray,
    W: int,
) -> tuple[np.ndarray, np.ndarray]:
    """Per flank: the sample after which ``x`` last crosses ``mid`` in the flank's direction
    inside its search region, and whether there was such a crossing."""
    above = (x[idx] - mid[:, None]) * sign[:, None] >= 0
    cross = ~above[:, :-1] & above[:, 1:] & inside[:, 1:]
    has = cross.any(axis=1)
    span = idx.shape[1]
    last = span - 2 - np.argmax(cross[:, ::-1], axis=1)
    k = np.where(has, (s - W) + last, s - 1)
    return k, has


def default_window(sample_rate: float) -> int:
    """Samples the step window spans at ``sample_rate``: at least 2, else 25 us worth.

    >>> default_window(48000), default_window(1e6)
    (2, 25)
    """
    return max(2, math.ceil(TRANSITION_S * sample_rate))
