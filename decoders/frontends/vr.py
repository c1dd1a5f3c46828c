"""Variable-reluctance (VR) sensor front end.

A VR sensor's voltage is proportional to the rate of change of the magnetic flux through its
coil (Faraday's law), so its amplitude grows roughly in proportion to speed, and at the centre of
a tooth, where the flux peaks, the voltage crosses zero. toothcomb times VR events on those zero
crossings, interpolated between samples with a cubic through the four samples around the
crossing.

Noise near zero must not count as a crossing, so a crossing is only accepted when the half-wave
that follows it is *significant*: its peak exceeds an arming threshold. The threshold follows the
signal's amplitude (a fraction of a running envelope of recent significant peaks, decaying when
the signal shrinks), with a floor set from the channel's noise. This is a Schmitt trigger whose
hysteresis adapts to speed, applied to the crossing that precedes each armed half-wave.

Both crossing directions are reported: which one is the tooth centre (the flux maximum) depends
on how the leads are wired and is worked out later from the gap signature of the wheel.
"""

from __future__ import annotations

import functools
import itertools
import math
import sys
from typing import Any

import numpy as np

from ..model import ChannelLevels, Edges
from .base import (
    NEIGHBOURS,
    PERIODOGRAM_SAMPLES,
    Periodogram,
    SampleFeed,
    cubic_fraction,
    despike,
    has_spikes,
    periodogram,
)


class VrFrontEnd(SampleFeed):
    """Zero crossings of a VR signal with an amplitude-following arming threshold.

    >>> fs = 50000.0
    >>> t = np.arange(5000) / fs
    >>> x = np.sin(2 * np.pi * 100 * t + 0.3)             # 100 Hz, starts positive
    >>> lv = ChannelLevels("ch0", 5000, -1, 1, 0, 0.7, (-1, -1, -1, -.7, 0, .7, 1, 1, 1), 1e-3, 0)
    >>> fe = VrFrontEnd(fs, lv)
    >>> e = Edges.concat([fe.process(x, 0), fe.finish()])
    >>> int(e.direction[0]), round(float(e.times[0]) * 1e6, 2)   # falling at (pi - 0.3) / (200 pi)
    (-1, 4522.54)
    """

    name = "vr"
    handles = "variable-reluctance (VR, inductive) sensors: tooth-centre zero crossings"

    def __init__(
        self,
        sample_rate: float,
        levels: ChannelLevels,
        *,
        offset: float | None = None,
        floor: float | None = None,
        fraction: float = 0.2,
        envelope: float | None = None,
        decay: float = 0.8,
        despike: int = 1,
    ) -> None:
        self.sample_rate = float(sample_rate)
        #: the signal's zero (a DC-coupled instrument may add an offset)
        self.offset = float(levels.mean if offset is None else offset)
        # common practice, no source: an arming level several noise sigmas above zero keeps
        # noise from re-triggering (calibrate() measures the noise far better than this)
        self.floor = float(floor) if floor is not None else max(5.0 * levels.noise, 1e-12)
        #: arming threshold as a fraction of the envelope
        # common practice, no source: a weak tooth's half-waves come out smaller than its flux
        # swing, as its neighbours' flanks overlap them (a quarter of theirs at 40 % of the
        # flux, simulated); 0.2 still arms on them, and the noise floor, not this fraction,
        # keeps noise out. Missed every revolution on an N-1 wheel, such a tooth would make a
        # second gap and leave the wheel unidentifiable.
        self.fraction = float(fraction)
        half_span = 0.5 * (levels.percentile(99.9) - levels.percentile(0.1))
        self.envelope = float(envelope) if envelope is not None else max(half_span, self.floor)
        #: envelope factor per insignificant half-wave
        self.decay = float(decay)
        #: running-median length that removes spikes before detection (1: none)
        self.despike = int(despike) | 1
        self._half = self.despike // 2
        self._tail = np.empty(0)
        self._tail_start = 0
        self._next_k = 0  # first global crossing index not yet handled
        self._scanned = 0  # first global sample index not yet folded into a half-wave peak
        self._open_start: float | None = None  # crossing (samples) that began the open half-wave
        self._open_sign = 0
        self._open_peak = 0.0
        self._state = 0  # sign of the last significant half-wave
        self._last_peak = {1: 0.0, -1: 0.0}
        #: slow average of significant peaks: the threshold never drops below a fraction of it,
        #: so a quiet stretch (the gap, a dropout) cannot arm on noise
        self._slow = self.envelope
        self._width = 0.0  # typical duration of a significant half-wave (samples)
        #: value of one unit of the samples fed (1.0 for floats; a PCM code's value), set by the
        #: first block, with the offset in those units and how to compare samples with it
        self._unit: float | None = None
        self._off = self.offset
        self._above: tuple[str, float] = ("float", self.offset)
        #: crossings found but not yet timed and closed: global sample index, the four samples
        #: around each, whether all four are real, the sign after it, the peak of the stretch
        #: after it (see :meth:`_scan`)
        self._p_k: list[np.ndarray] = []
        self._p_near: list[np.ndarray] = []
        self._p_ok: list[np.ndarray] = []
        self._p_after: list[np.ndarray] = []
        self._p_peak: list[np.ndarray] = []
        self._pending = 0
        self._half_waves = 0  # half-waves closed so far (see before_fork)

    def before_fork(self, samples_left: int) -> None:
        """The front end goes to a worker process for the ``samples_left`` samples still to
        come (an optional front-end method the decode calls before it forks one): when the
        half-waves to come, at the rate met so far, would step more than :data:`FORK_STEPS`
        values in Python, scipy.signal is imported now, so that the worker finds it imported
        and its long runs go to ``lfilter`` (see :func:`_run`); otherwise the worker steps
        them."""
        if self._scanned > 0:
            steps = _RECURSIONS * self._half_waves / self._scanned * samples_left
            if steps > FORK_STEPS:
                _plain()

    @classmethod
    def calibrate(
        cls,
        probe: np.ndarray,
        sample_rate: float,
        levels: ChannelLevels,
        spectrum: Periodogram | None = None,
    ) -> dict[str, Any]:
        """Starting envelope, noise floor and spike removal from the first part of the channel
        (``spectrum``: its periodogram, when the caller has it already).

        The noise floor comes from the spectrum, not from sample differences (which at a few
        samples per tooth measure the signal's own slope): the median periodogram value over
        the upper part of the band, where a tooth train puts only narrow lines, gives the white
        noise level; the floor is also kept above a few quantisation steps.
        """
        probe = np.asarray(probe, dtype=float)
        if len(probe) == 0:
            return {}
        y = probe - levels.mean
        # start from the amplitude at the start: a capture that begins slow (cranking) and
        # speeds up must not have its first teeth judged against the later, larger swings
        head = y[: max(2000, int(0.05 * sample_rate))]
        envelope = float(np.max(np.abs(head)))
        noise = spectral_noise(y, spectrum=spectrum)
        floor = max(4.0 * noise, 3.0 * quantisation_step(probe), 1e-12)
        first = cls(sample_rate, levels, envelope=envelope, floor=floor)
        edges = Edges.concat([first.process(probe, 0), first.finish()])
        opts: dict[str, Any] = {"envelope": envelope, "floor": floor}
        spike = 0.3 * float(np.median(edges.strength)) if len(edges) else 0.0
        if len(edges) >= 4 and has_spikes(y, spike):
            # a running median removes ignition spikes; it must be short against a half-wave
            half_wave = float(np.percentile(np.diff(edges.times), 10)) * sample_rate
            size = 5 if half_wave >= 12 else 3 if half_wave >= 6 else 1
            opts["despike"] = size
            if size > 1:
                # spikes are broadband: measured with them, the noise floor (and the starting
                # envelope, when one falls in the first samples) would arm above weak teeth
                clean = despike(y, size)
                opts["envelope"] = float(np.max(np.abs(clean[: len(head)])))
                noise = spectral_noise(clean)
                opts["floor"] = max(4.0 * noise, 3.0 * quantisation_step(probe), 1e-12)
        return opts

    def _carry(self) -> np.ndarray:
        return self._tail

    def _process(self, x: np.ndarray, start: int, unit: float, joined: bool = False) -> Edges:
        if self._unit is None:
            self._unit = unit
            #: the offset in the units of the samples
            self._off = self.offset / unit
            self._above = _above_level(x.dtype, self._off)
        elif unit != self._unit or (x.dtype.kind in "iu") != (self._above[0] != "float"):
            raise ValueError("a front end is fed floats or codes of one scale, not both")
        if len(self._tail) == 0:
            self._tail_start = start
            self._scanned = max(self._scanned, start)
            self._next_k = max(self._next_k, start)
        buf = np.concatenate((self._tail, x)) if len(self._tail) and not joined else x
        self._scan(buf, final=False)
        keep = min(4 + 2 * self._half, len(buf))
        self._tail = buf[len(buf) - keep :].copy()
        self._tail_start += len(buf) - keep
        if self._pending < CROSSINGS_PER_CLOSE:
            return Edges.empty()
        return self._edges(*self._close_pending())

    @property
    def settled_s(self) -> float:
        """No edge earlier than this time (s) will come out of later calls."""
        pending = self._next_k if self._open_start is None else min(self._open_start, self._next_k)
        if self._p_k:
            pending = min(pending, int(self._p_k[0][0]))
        return pending / self.sample_rate

    def _release(self) -> Edges:
        return self._edges(*self._close_pending())

    def _finish(self) -> Edges:
        if len(self._tail):
            self._scan(self._tail, final=True)
        times, dirs, strength = self._close_pending()
        # the last half-wave ends with the capture
        self._close(self._open_start, None, self._open_sign, self._open_peak, times, dirs, strength)
        self._open_start = None
        self._tail = np.empty(0)
        return self._edges(times, dirs, strength)

    # -- internals -------------------------------------------------------------------------

    def _edges(
        self, times: list[np.ndarray], dirs: list[np.ndarray], strength: list[np.ndarray]
    ) -> Edges:
        if not times:
            return Edges.empty()
        return Edges(
            np.concatenate(times) / self.sample_rate,
            np.concatenate(dirs).astype(np.int8),
            np.concatenate(strength).astype(float),
        )

    def _close(
        self,
        start: float | None,
        end: float | None,
        sign: int,
        peak: float,
        times: list[np.ndarray],
        dirs: list[np.ndarray],
        strength: list[np.ndarray],
    ) -> bool:
        """A half-wave of ``sign`` from crossing ``start`` to ``end`` (samples) has ended.
        Returns whether it was an ordinary one, as :meth:`_close_run` closes many at once."""
        if sign == 0:
            return False
        arm = max(self.floor, self.fraction * self.envelope, 0.12 * self._slow)
        if peak < arm:
            self.envelope = max(self.envelope * self.decay, self.floor)
            return False
        width = (end - start) if (start is not None and end is not None) else None
        if (
            width is not None
            and self._width > 0
            and (
                width < 0.12 * self._width
                or (width < 0.25 * self._width and peak > 2.0 * self.envelope)
            )
        ):
            # far shorter (or shorter and taller) than the teeth around it: an ignition spike
            # that crossed zero, not a tooth
            return False
        ordinary = (
            sign != self._state
            and width is not None
            and self._width > 0
            and peak <= 4.0 * self.envelope
            and peak <= 4.0 * self._slow
        )
        if sign != self._state and start is not None:
            times.append(np.array([start]))
            dirs.append(np.array([sign]))
            strength.append(np.array([peak + self._last_peak[-sign]]))
        self._state = sign
        self._last_peak[sign] = peak
        # a spike that got through must not lift the threshold over the next real teeth (the
        # running averages are the recursions of :data:`_ENVELOPE`, :data:`_SLOW` and
        # :data:`_WIDTH`, computed as in :meth:`_close_run`)
        self.envelope = 0.5 * (self.envelope + min(peak, 4.0 * self.envelope))
        self._slow = _follow(_SLOW, self._slow, min(peak, 4.0 * self._slow))
        if width is not None:
            self._width = width if self._width == 0 else _follow(_WIDTH, self._width, width)
        return ordinary

    def _close_run(
        self,
        start: np.ndarray,
        end: np.ndarray,
        sign: np.ndarray,
        peak: np.ndarray,
        times: list[np.ndarray],
        dirs: list[np.ndarray],
        strength: list[np.ndarray],
    ) -> int:
        """Close consecutive half-waves at once, as :meth:`_close` would one by one, for as long
        as each is an ordinary tooth half-wave (significant, not a spike, not clipped by the
        envelope limits, alternating) or an insignificant one (below the arming level: noise
        about the zero, in the gap); returns how many were closed (0: the first is neither).

        The running averages follow first-order recursions; computed over the run at once
        (:func:`_run`) from the state before it, they are what :meth:`_close` gives one step
        at a time. Which half-waves are insignificant is guessed first, the averages are
        computed for that guess and the guess is then checked half-wave by half-wave against
        them: the run ends at the first half-wave the guess got wrong (it is closed on its own
        by the caller).
        """
        if self._width <= 0 or sign[0] == self._state:
            return 0
        return self._close_mixed(
            start, end, sign, peak, self._quiet_guess(peak), times, dirs, strength
        )

    def _quiet_guess(self, peak: np.ndarray) -> np.ndarray:
        """A guess of which half-waves are insignificant (peak below the arming level), for
        :meth:`_close_mixed` to check: the envelope taken as the halving mean of the last few
        peaks (as it is while teeth pass), the slow average as it stands."""
        k = 6
        ext = np.concatenate((np.full(k, self.envelope), peak[:-1]))
        env = np.full(len(peak), 0.5**k * self.envelope)
        for i in range(1, k + 1):
            env += 0.5**i * ext[k - i : len(ext) - i + 1]
        arm = np.maximum(max(self.floor, 0.12 * self._slow), self.fraction * env)
        return peak < arm

    def _close_mixed(
        self,
        start: np.ndarray,
        end: np.ndarray,
        sign: np.ndarray,
        peak: np.ndarray,
        quiet: np.ndarray,
        times: list[np.ndarray],
        dirs: list[np.ndarray],
        strength: list[np.ndarray],
    ) -> int:
        """:meth:`_close_run` for half-waves of which those marked ``quiet`` are guessed
        insignificant: each of those only lets the envelope decay (:meth:`_close`), the slow
        average, the width and the last significant sign stay as they were. The averages are
        computed for that guess; the run ends where they show it wrong."""
        n = len(peak)
        width = end - start
        loud = np.flatnonzero(~quiet)
        # the slow average and the width follow the significant half-waves only; before
        # half-wave j they hold what the last significant one before it left
        before_j = np.cumsum(~quiet) - ~quiet
        slow_s = _run(_SLOW, self._slow, peak[loud])
        slow_pre = np.concatenate(([self._slow], slow_s))[before_j]
        wid_s = _run(_WIDTH, self._width, width[loud])
        wid_pre = np.concatenate(([self._width], wid_s))[before_j]
        state_pre = np.concatenate(([self._state], sign[loud]))[before_j]
        # the envelope: the mean recursion over each stretch of significant half-waves, a decay
        # step at each insignificant one, in order
        env = _envelope_through(self.envelope, peak, quiet, self.decay, self.floor)
        env_pre = np.concatenate(([self.envelope], env[:-1]))
        arm = np.maximum(np.maximum(self.floor, self.fraction * env_pre), 0.12 * slow_pre)
        below = peak < arm
        spike = (width < 0.12 * wid_pre) | ((width < 0.25 * wid_pre) & (peak > 2.0 * env_pre))
        ordinary = (
            ~below
            & ~spike
            & (peak <= 4.0 * env_pre)
            & (peak <= 4.0 * slow_pre)
            & (sign != state_pre)
        )
        ok = np.where(quiet, below, ordinary)
        f = n if ok.all() else int(np.argmin(ok))
        if f == 0:
            return 0
        teeth = loud[: int(np.searchsorted(loud, f))]
        if len(teeth):
            tp = peak[teeth]
            before = np.concatenate(([self._last_peak[-int(sign[teeth[0]])]], tp[:-1]))
            times.append(start[teeth])
            dirs.append(sign[teeth])
            strength.append(tp + before)
            last = int(sign[teeth[-1]])
            self._state = last
            self._last_peak[last] = float(tp[-1])
            if len(teeth) >= 2:
                self._last_peak[-last] = float(tp[-2])
            self._slow = float(slow_s[len(teeth) - 1])
            self._width = float(wid_s[len(teeth) - 1])
        self.envelope = float(env[f - 1])
        return f

    def _close_all(
        self,
        start: np.ndarray,
        end: np.ndarray,
        sign: np.ndarray,
        peak: np.ndarray,
        times: list[np.ndarray],
        dirs: list[np.ndarray],
        strength: list[np.ndarray],
    ) -> None:
        """Close the half-waves in order: runs of ordinary ones at once, the others (noise
        between teeth, spikes, the first few) one by one."""
        i, m = 0, len(end)
        self._half_waves += m
        span = m  # half-waves tried at once; shorter after a run stopped early
        alone = 0  # half-waves to close one by one before trying a run again
        streak = 0  # ordinary half-waves closed in a row, by runs or one by one
        while i < m:
            if alone > 0:
                # odd half-waves come thick here (noise about the zero between teeth): one by
                # one until a few ordinary ones in a row say a run may pay again
                ordinary = self._close(
                    float(start[i]), float(end[i]), int(sign[i]), float(peak[i]),
                    times, dirs, strength,
                )
                i += 1
                alone = alone - 1 if ordinary else ALONE_AFTER_ODD
                streak = streak + 1 if ordinary else 0
                continue
            if peak[i] > 4.0 * self.envelope and sign[i] != self._state:
                # a tooth the envelope has not caught up with (the first few after a quiet gap,
                # which let it decay): a run would stop at it at once, so it is closed alone
                self._close(
                    float(start[i]), float(end[i]), int(sign[i]), float(peak[i]),
                    times, dirs, strength,
                )
                i += 1
                continue
            done = self._close_run(
                start[i : i + span], end[i : i + span], sign[i : i + span], peak[i : i + span],
                times, dirs, strength,
            )
            i += done
            streak += done
            if done == span:
                span *= 2
                continue
            if i < m:
                ordinary = self._close(
                    float(start[i]), float(end[i]), int(sign[i]), float(peak[i]),
                    times, dirs, strength,
                )
                i += 1
                if ordinary:
                    streak += 1
                    continue
            # after a long streak the odd half-wave was a one-off: try about twice as many at
            # once next (odd ones that come back, such as the tooth after the gap once the
            # envelope has decayed through a quiet gap, then cost a run of twice their spacing,
            # not one of all that is left); after a short one, odd half-waves are frequent:
            # close the next ones one by one
            if streak >= 64:
                span = 2 * streak
            else:
                span, alone = 64, ALONE_AFTER_ODD
            streak = 0

    def _scan(self, raw: np.ndarray, final: bool) -> None:
        """Find the crossings of ``raw`` (samples from :attr:`_tail_start`) and the peak of the
        stretch after each; they wait, with the samples around them, to be timed and closed
        by :meth:`_close_pending` several blocks at once."""
        g = self._tail_start
        n = len(raw)
        if n < 2:
            return
        half = self._half
        o = self._off
        buf = despike(raw, self.despike)
        # above the signal's zero; the same as (x - offset) > 0, without making that array
        positive = _compare(buf, self._above)
        kk = np.flatnonzero(positive[:-1] != positive[1:])
        limit = n - 2 if final else n - 3 - half
        kk = kk[(kk + g >= self._next_k) & (kk <= limit)]
        # samples that can be folded into half-wave peaks now: up to the last one that no
        # pending crossing could still split
        a = self._scanned - g
        b = n if final else n - 1 - half  # exclusive
        # every crossing up to the limit has been looked at, with or without a find
        self._next_k = max(self._next_k, g + limit + 1)
        # peak |x - offset| of each stretch between crossings: the largest of its highest
        # sample's height and its lowest one's depth (0 for an empty stretch)
        length = max(b - a, 0)
        bounds = np.clip(kk - a + 1, 0, length)
        starts = np.concatenate(([0], bounds))
        ends = np.concatenate((bounds, [length]))
        seg = np.zeros(len(starts))
        full = ends > starts
        if np.any(full):
            part = buf[a : a + length]
            at = starts[full]
            if part.dtype.kind == "i" and len(at) > 2:
                seg[full] = self._peaks_by_side(part, positive[a : a + length], at)
            else:
                hi = np.maximum.reduceat(part, at) - o
                lo = o - np.minimum.reduceat(part, at)
                seg[full] = np.maximum(np.maximum(hi, lo), 0.0) * self._unit
        self._scanned = g + b
        if self._open_sign == 0:
            self._open_sign = 1 if positive[0] else -1
        if self._p_peak:
            last = self._p_peak[-1]
            last[-1] = max(last[-1], seg[0])
        else:
            self._open_peak = max(self._open_peak, float(seg[0]))
        if len(kk) == 0:
            return
        # the time comes from the samples as recorded (the running median only found the
        # crossing); where they do not cross there (a spike on it), from the cleaned ones
        near = np.clip(kk[None, :] + NEIGHBOURS[:, None], 0, n - 1)
        around = raw[near]
        if buf is not raw:
            same = _compare(raw[kk], self._above) != _compare(raw[kk + 1], self._above)
            if not same.all():
                around = np.where(same[None, :], around, buf[near])
        self._p_k.append(kk + g)
        self._p_near.append(around)
        self._p_ok.append((kk - 1 >= 0) & (kk + 2 < n))
        self._p_after.append(np.where(positive[kk + 1], 1, -1))
        self._p_peak.append(seg[1:])
        self._pending += len(kk)

    def _peaks_by_side(self, part: np.ndarray, side: np.ndarray, at: np.ndarray) -> np.ndarray:
        """For signed integer codes ``part`` above the offset where ``side``: the peak
        ``max(highest - offset, offset - lowest, 0)`` of each stretch from ``at[j]`` to the
        next (the last to the end), as the two reductions give it, in one: between two
        crossings every sample lies on one side, and flipping the bits of those below (``~x``
        is ``-x - 1``, which turns order round exactly) makes the highest flipped sample the
        lowest one flipped. The first and last stretches may hold crossings not looked at yet
        (before the next one due, after the last one decided): they are reduced both ways.

        >>> fe = VrFrontEnd.__new__(VrFrontEnd); fe._off, fe._unit = 0.5, 1.0
        >>> x = np.array([9, -2, 3, 4, -5, -7, 2, 8], np.int16)
        >>> fe._peaks_by_side(x, x > 0, np.array([0, 2, 4, 6])).tolist()
        [8.5, 3.5, 7.5, 7.5]
        """
        o = self._off
        # all bits set below the offset, none above: an exclusive or flips those below
        flip = np.subtract(side.view(np.int8), np.int8(1))
        top = np.maximum.reduceat(part ^ flip, at)
        peak = np.where(side[at], top - o, o - ~top)
        for j, piece in ((0, part[at[0] : at[1]]), (len(at) - 1, part[at[-1] :])):
            peak[j] = max(piece.max() - o, o - piece.min())
        return np.maximum(peak, 0.0) * self._unit

    def _close_pending(self) -> tuple[list[np.ndarray], list[np.ndarray], list[np.ndarray]]:
        """Time the crossings found so far and close the half-waves they end, in order; the
        edges as lists of arrays of times (samples), directions and strengths."""
        times: list[np.ndarray] = []
        dirs: list[np.ndarray] = []
        strength: list[np.ndarray] = []
        if not self._p_k:
            return times, dirs, strength
        k = np.concatenate(self._p_k)
        near = np.concatenate(self._p_near, axis=1).astype(float) - self._off
        ok = np.concatenate(self._p_ok)
        after = np.concatenate(self._p_after)
        seg = np.concatenate(self._p_peak)  # the peak of the stretch after each crossing
        self._p_k, self._p_near, self._p_ok, self._p_after, self._p_peak = [], [], [], [], []
        self._pending = 0
        pos = k + cubic_fraction(near, ok)
        m = len(pos)
        if self._open_start is None:
            # the half-wave the capture starts in has no start: closed on its own
            self._close(
                None, float(pos[0]), self._open_sign, self._open_peak, times, dirs, strength
            )
            start, end, sign, peak = pos[:-1], pos[1:], after[:-1], seg[: m - 1]
        else:
            start = np.concatenate(([self._open_start], pos[:-1]))
            sign = np.concatenate(([self._open_sign], after[:-1]))
            peak = np.concatenate(([self._open_peak], seg[: m - 1]))
            end = pos
        if len(end):
            self._close_all(start, end, sign, peak, times, dirs, strength)
        self._open_start = float(pos[-1])
        self._open_sign = int(after[-1])
        self._open_peak = float(seg[-1])
        return times, dirs, strength


#: the running averages of :class:`VrFrontEnd` follow first-order recursions
#: ``y[n] = b * x[n] + k * y[n - 1]``, given here as (b, k). They are computed with
#: :func:`scipy.signal.lfilter`, for a run of half-waves at once or for a single one, so that both
#: give the same numbers to the last bit
_ENVELOPE = (0.5, 0.5)  # the envelope: the mean of itself and the new peak
_SLOW = (0.05, 0.95)  # the slow average of significant peaks
_WIDTH = (0.1, 0.9)  # the typical width of a significant half-wave


#: crossings gathered (over as many blocks as it takes) before they are timed and closed
#: together: the per-crossing work is done in few, long numpy passes
CROSSINGS_PER_CLOSE = 4096
#: after an odd half-wave that broke a short run, this many ordinary ones in a row are closed one
#: by one before a run is tried again
ALONE_AFTER_ODD = 16


def _above_level(dtype: np.dtype, level: float) -> tuple[str, float]:
    """How to tell samples of ``dtype`` above ``level`` exactly: ("float", level) compares as
    is; integers are above a level exactly when above its floor, so ("int", floor) compares
    integers with integers; ("all", 0) or ("none", 0) when the level lies outside the type's
    range.

    >>> _above_level(np.dtype(np.int16), -0.5), _above_level(np.dtype(np.int16), 4e4)
    (('int', -1), ('none', 0))
    """
    if dtype.kind not in "iu":
        return ("float", float(level))
    info = np.iinfo(dtype)
    floor = math.floor(level)
    if floor < info.min:
        return ("all", 0)
    if floor >= info.max:
        return ("none", 0)
    return ("int", floor)


def _compare(x: np.ndarray, above: tuple[str, float]) -> np.ndarray:
    """``x`` above the level ``above`` describes (see :func:`_above_level`)."""
    kind, level = above
    if kind == "all":
        return np.ones(np.shape(x), dtype=bool)
    if kind == "none":
        return np.zeros(np.shape(x), dtype=bool)
    return np.asarray(x > level)


def _run(rec: tuple[float, float], y0: float, x: np.ndarray) -> np.ndarray:
    """The recursion ``rec`` over ``x`` from the value ``y0``: y[0], y[1], ..., as
    :func:`_follow` takes each step.

    Computed in Python, or by ``scipy.signal.lfilter`` where that gives the same numbers to the
    last bit (:func:`_plain`): many times faster on a long run, but importing scipy.signal
    costs 0.5-0.8 s, more than all the runs of a capture of a few minutes take in Python. So a
    run longer than :data:`RUN_BY_STEPS` goes to ``lfilter`` once scipy.signal is imported
    (:meth:`VrFrontEnd.before_fork` imports it before a worker process takes the front end of
    a capture long enough to pay for it) or once this process has stepped :data:`PYTHON_STEPS`
    values; the numbers, and so the edges, are the same either way."""
    global _stepped
    if len(x) > RUN_BY_STEPS:
        if _stepped > PYTHON_STEPS or "scipy.signal" in sys.modules:
            if _plain():  # (imports scipy.signal)
                return _lfilter_run(rec, y0, x)
        else:
            _stepped += len(x)
    return _steps_of(rec, y0, x)


#: values the VR front ends of this process have stepped in Python on long runs (see _run)
_stepped = 0


def _envelope_through(
    e: float, peak: np.ndarray, quiet: np.ndarray, decay: float, floor: float
) -> np.ndarray:
    """The envelope after each half-wave, from ``e``: the mean recursion :data:`_ENVELOPE` at a
    significant one (``quiet`` False), a decay step ``max(e * decay, floor)`` at an
    insignificant one -- :meth:`VrFrontEnd._close`'s steps, in order.

    The gap between teeth (and noise about the zero anywhere) brings insignificant half-waves
    by the hundred in a row: each such run is taken at once, the running product of ``decay``
    kept by ``np.multiply.accumulate`` (the same multiplications in the same order) and held at
    ``floor``. With ``decay`` at most 1 that is the step-by-step value: once the product falls
    below ``floor`` it stays below, and the envelope, once at ``floor``, stays there.

    >>> _envelope_through(1.0, np.array([0.0, 0.0, 3.0, 0.0]), np.array([1, 1, 0, 1], bool),
    ...                   0.5, 0.3).tolist()
    [0.5, 0.3, 1.65, 0.825]
    """
    n = len(peak)
    env = np.empty(n)
    if n == 0:
        return env
    if not 0.0 <= decay <= 1.0:
        # (a decay that grows the envelope: step by step)
        for j, (p, q) in enumerate(zip(peak.tolist(), quiet.tolist(), strict=True)):
            e = max(e * decay, floor) if q else _follow(_ENVELOPE, e, p)
            env[j] = e
        return env
    edges = np.flatnonzero(quiet[1:] != quiet[:-1]) + 1
    for a, b in itertools.pairwise([0, *edges.tolist(), n]):
        if quiet[a]:
            steps = np.full(b - a + 1, decay)
            steps[0] = e
            np.maximum(np.multiply.accumulate(steps)[1:], floor, out=env[a:b])
        else:
            env[a:b] = _run(_ENVELOPE, e, peak[a:b])
        e = float(env[b - 1])
    return env


def _lfilter_run(rec: tuple[float, float], y0: float, x: np.ndarray) -> np.ndarray:
    from scipy.signal import lfilter  # see _plain

    b, k = rec
    y, _ = lfilter([b], [1.0, -k], x, zi=[k * y0])
    return y


def _steps_of(rec: tuple[float, float], y0: float, x: np.ndarray) -> np.ndarray:
    """The recursion ``rec`` step by step, as :func:`_follow` takes each step (the same
    numbers as ``lfilter`` when :func:`_plain`)."""
    b, k = rec
    out = []
    y = y0
    for v in x.tolist():
        y = b * v + k * y
        out.append(y)
    return np.array(out, dtype=float)


def _lfilter_is_plain() -> bool:
    """True when :func:`scipy.signal.lfilter` computes a step of a first-order recursion as
    Python does, ``b * x + k * y``, to the last bit (it does unless the compiled library fuses
    multiplies and adds); then :func:`_run` may hand it the long runs."""
    rng = np.random.default_rng(1)
    x = rng.random(512) * 10.0 ** rng.integers(-6, 3, 512)
    for b, k in (_ENVELOPE, _SLOW, _WIDTH):
        prev = 0.3
        for xi, yi in zip(x.tolist(), _lfilter_run((b, k), prev, x).tolist(), strict=True):
            if b * xi + k * prev != yi:
                return False
            prev = yi
    return True


#: runs of at most this many half-waves are computed step by step (see :func:`_run`): a
#: short run costs less than calling ``lfilter``
RUN_BY_STEPS = 96
#: values stepped in Python before ``lfilter`` takes the long runs (about 0.3 s; an idle
#: engine's VR crank gives some 5 000 a second of capture)
PYTHON_STEPS = 4_000_000
#: the running averages each half-wave steps (envelope, slow average, width)
_RECURSIONS = 3
#: values a worker process would step in Python beyond which scipy.signal is imported before
#: it is forked (about 0.06 s): the worker is the slower of the two processes, so its steps
#: lengthen the decode, while the import is made once per process (a batch, or the repeated
#: decodes of the benchmark, pay it once); a 10-minute capture at idle steps some 2.8 million
FORK_STEPS = 1_000_000


@functools.cache
def _plain() -> bool:
    """:func:`_lfilter_is_plain`, found out once, when a VR front end first decides to use
    ``lfilter`` (not on import: scipy.signal costs 0.5-0.8 s to import)"""
    return _lfilter_is_plain()


def _follow(rec: tuple[float, float], y0: float, x: float) -> float:
    """One step of the recursion ``rec`` from ``y0`` with the new value ``x``: the number a
    run (:func:`_run`) gives for it.

    >>> _follow(_SLOW, 1.0, 3.0)
    1.1
    """
    return rec[0] * x + rec[1] * y0


def spectral_noise(
    y: np.ndarray, n_max: int = PERIODOGRAM_SAMPLES, spectrum: Periodogram | None = None
) -> float:
    """Standard deviation of the white noise under a signal, from its spectrum.

    For white noise of variance s^2 the periodogram values |X_k|^2 of an N-point transform are
    exponentially distributed with mean N s^2, so their median is N s^2 ln 2. The median is
    taken over 0.25..0.45 of the sample rate, where a tooth train leaves only narrow lines.
    source: distribution of periodogram ordinates of white Gaussian noise (S. M. Kay, "Modern
    Spectral Estimation", Prentice Hall 1988, ch. 4)

    >>> rng = np.random.default_rng(1)
    >>> x = 0.2 * rng.normal(size=100_000) + np.sin(np.arange(100_000) * 2 * np.pi / 9.0)
    >>> round(spectral_noise(x), 2)
    0.2

    ``spectrum`` is the periodogram of ``y`` when the caller has it already.
    """
    if spectrum is None:
        spectrum = periodogram(y, n_max)
    p, n = spectrum
    if n < 64:
        return 0.0
    band = p[int(0.25 * n) : int(0.45 * n)]
    if len(band) == 0:
        return 0.0
    return float(np.sqrt(np.median(band) / (n * np.log(2.0))))


def quantisation_step(x: np.ndarray, n_max: int = 1 << 18) -> float:
    """Smallest step between distinct sample values (a converter's LSB; tiny for float data).

    >>> quantisation_step(np.round(np.sin(np.arange(1000) / 7.0) * 127) / 128)
    0.0078125
    """
    v = np.unique(np.asarray(x, dtype=float)[:n_max])
    v = v[np.isfinite(v)]
    if len(v) < 2:
        return 0.0
    return float(np.min(np.diff(v)))
