"""Jitter of crank teeth and cam edges, named as in IEEE Std 2414-2020.

- **Time interval error (TIE)**: each event's deviation from its ideal time.
- **Period jitter**: each period's deviation from its ideal period (the difference of
  successive TIE values).
- **Cycle-to-cycle jitter**: the difference between successive periods (the difference of
  successive period-jitter values).

Each is given as rms and peak-to-peak. The *ideal* times come from the events themselves with the
slow trends removed first -- the engine speeding up, cranking compression ripple, a phaser moving --
because those are the engine's motion, not jitter. The trend is a local cubic (Savitzky-Golay)
fit over a few neighbouring events; the rms of the residuals is divided by sqrt(1 - h0), h0 being
the fit's own weight at the centre point, so that independent event noise of rms sigma reads as
sigma rather than the smaller residual a local fit leaves.
"""

from __future__ import annotations

import numpy as np

from ..result import JitterStats
from ..savgol import savgol_coeffs, savgol_filter
from ..wheels.base import ToothTrack
from .timeline import local_cubic


def _rms_pp(x: np.ndarray) -> tuple[float, float]:
    x = np.asarray(x, dtype=float)
    x = x[np.isfinite(x)]
    if len(x) == 0:
        return float("nan"), float("nan")
    return float(np.sqrt(np.mean(x * x))), float(np.max(x) - np.min(x))


def jitter_from_tie(
    tie_s: np.ndarray,
    deg_per_s: np.ndarray | float,
    consecutive: np.ndarray | None = None,
    rms_scale: float = 1.0,
    detrend: str = "",
) -> JitterStats:
    """Jitter figures from a sequence of time interval errors.

    ``consecutive[k]`` says whether event k follows event k-1 directly (one period later); periods
    across a break are left out. ``deg_per_s`` converts seconds to crank degrees.
    ``rms_scale`` multiplies the rms figures (see the module docstring).

    A sinusoidal TIE of amplitude A has an rms of A/sqrt(2) and a peak-to-peak of 2A:

    >>> k = np.arange(4000)
    >>> s = jitter_from_tie(1e-6 * np.sin(2 * np.pi * k / 40), 6000.0)
    >>> round(s.tie_rms_s * 1e6, 4), round(s.tie_pp_s * 1e6, 4), round(s.tie_pp_deg, 4)
    (0.7071, 2.0, 0.012)
    """
    tie = np.asarray(tie_s, dtype=float)
    n = len(tie)
    speed = np.broadcast_to(np.asarray(deg_per_s, dtype=float), (n,))
    if consecutive is None:
        consecutive = np.ones(n, dtype=bool)
        if n:
            consecutive[0] = False
    per = np.full(n, np.nan)
    if n > 1:
        per[1:] = np.where(consecutive[1:], np.diff(tie), np.nan)
    c2c = np.full(n, np.nan)
    if n > 2:
        both = consecutive[1:] & np.concatenate(([False], consecutive[1:-1]))
        c2c[2:] = np.where(both[1:], np.diff(per[1:]), np.nan)
    out = []
    for series in (tie, per, c2c):
        rms_s, pp_s = _rms_pp(series)
        rms_d, pp_d = _rms_pp(series * speed)
        out.append((rms_s * rms_scale, pp_s, rms_d * rms_scale, pp_d))
    (tr, tp, tdr, tdp), (pr, pp, pdr, pdp), (cr, cp, cdr, cdp) = out
    return JitterStats(n, tr, tp, pr, pp, cr, cp, tdr, tdp, pdr, pdp, cdr, cdp, detrend)


def _window(n_available: int, half: int) -> int:
    w = 2 * half + 1
    if n_available < w:
        w = n_available if n_available % 2 else n_available - 1
    return w


class _Moments:
    """Running rms and range of a series (seconds and degrees side by side).

    Sums are taken over fixed groups of values, in order, so the figures come out bit for bit the
    same however the series was handed in.
    """

    GROUP = 1024

    def __init__(self) -> None:
        self.n = 0
        self.sq_s = self.sq_d = 0.0
        self.lo_s = self.lo_d = np.inf
        self.hi_s = self.hi_d = -np.inf
        self._s = np.empty(0)
        self._d = np.empty(0)

    def add(self, s: np.ndarray, d: np.ndarray) -> None:
        ok = np.isfinite(s) & np.isfinite(d)
        s, d = s[ok], d[ok]
        if len(s) == 0:
            return
        self.n += len(s)
        self.lo_s, self.hi_s = min(self.lo_s, float(s.min())), max(self.hi_s, float(s.max()))
        self.lo_d, self.hi_d = min(self.lo_d, float(d.min())), max(self.hi_d, float(d.max()))
        self._s = np.concatenate((self._s, s))
        self._d = np.concatenate((self._d, d))
        m = len(self._s) // self.GROUP
        if m:
            self._commit(m)

    def _commit(self, m: int) -> None:
        """Add the squares of the first ``m`` whole groups, group by group (each group's sum
        is the same whatever batches the values came in, so the figures are too)."""
        k = m * self.GROUP
        a = self._s[:k].reshape(m, self.GROUP)
        b = self._d[:k].reshape(m, self.GROUP)
        for v in np.sum(a * a, axis=1).tolist():
            self.sq_s += v
        for v in np.sum(b * b, axis=1).tolist():
            self.sq_d += v
        self._s, self._d = self._s[k:], self._d[k:]

    def figures(self, scale: float) -> tuple[float, float, float, float]:
        if self.n == 0:
            nan = float("nan")
            return nan, nan, nan, nan
        sq_s, sq_d = self.sq_s, self.sq_d
        if len(self._s):
            sq_s += float(np.sum(self._s * self._s))
            sq_d += float(np.sum(self._d * self._d))
        return (
            float(np.sqrt(sq_s / self.n)) * scale,
            self.hi_s - self.lo_s,
            float(np.sqrt(sq_d / self.n)) * scale,
            self.hi_d - self.lo_d,
        )


class CrankJitter:
    """Jitter of crank tooth events, gathered while the teeth stream in.

    Per sync run the tooth times are put on the wheel's regular angle grid (positions without an
    event -- the gap, missing teeth -- filled by the local cubic through the neighbouring teeth),
    a local cubic over ``2 * half_window + 1`` positions (Savitzky-Golay) gives each position's
    ideal time and speed, and the TIE of each seen tooth with a whole window around it is its time
    minus the ideal one. Only a few dozen teeth are held at any time.
    """

    def __init__(self, pitch_deg: float, half_window: int | None = None) -> None:
        positions = round(360.0 / pitch_deg)
        self.pitch = float(pitch_deg)
        self.half = half_window if half_window is not None else max(3, round(positions / 12))
        w = 2 * self.half + 1
        self._c = savgol_coeffs(w, 3, use="dot")
        self._d = savgol_coeffs(w, 3, deriv=1, use="dot")
        self._scale = 1.0 / float(np.sqrt(1.0 - self._c[self.half]))
        self._run = -1
        self._g = np.empty(0, dtype=int)  # grid position of each buffered tooth
        self._t = np.empty(0)
        self._done = -(10**9)  # last grid position whose TIE was taken
        self._last: tuple[int, float, float] | None = None  # (grid, tie, period jitter)
        self._tie, self._per, self._c2c = _Moments(), _Moments(), _Moments()

    def add(self, track: ToothTrack) -> None:
        """Take newly decided teeth (in order)."""
        if len(track) == 0:
            return
        cuts = np.flatnonzero(np.diff(track.run)) + 1
        for idx in np.split(np.arange(len(track)), cuts):
            r = int(track.run[idx[0]])
            if r != self._run:
                self.flush()
                self._run = r
                self._g = np.empty(0, dtype=int)
                self._t = np.empty(0)
                self._done = -(10**9)
                self._last = None
            g = np.rint(track.angles[idx] / self.pitch).astype(int)
            self._g = np.concatenate((self._g, g))
            self._t = np.concatenate((self._t, track.times[idx]))
            self._take(final=False)

    def flush(self) -> None:
        """The current run has ended: take the teeth at its end too."""
        self._take(final=True)

    def _take(self, final: bool) -> None:
        h = self.half
        g, t = self._g, self._t
        if len(g) < 4:
            return
        full = np.arange(g[0], g[-1] + 1)
        if len(full) < 2 * h + 1:
            return
        # a position with a tooth has its time; only the others (the gap, missing teeth) are
        # filled by the local cubic
        tf = np.empty(len(full))
        tf[g - g[0]] = t
        empty = np.ones(len(full), dtype=bool)
        empty[g - g[0]] = False
        if np.any(empty):
            q = full[empty]
            k = np.clip(np.searchsorted(g, q, side="right") - 1, 0, len(g) - 2)
            tf[empty], _ = local_cubic(q.astype(float), g.astype(float), t, k)
        ideal = np.correlate(tf, self._c, "valid")  # positions full[h : len - h]
        deriv = np.correlate(tf, self._d, "valid")
        centre = full[h : len(full) - h]
        # until the run ends, a window must stay clear of the last two teeth, whose fill can
        # still change as teeth arrive
        last_ok = centre[-1] if final else g[-2] - h - 1
        # (centre is a run of consecutive positions: "in it" is a range check)
        seen = (g >= centre[0]) & (g <= centre[-1]) & (g > self._done) & (g <= last_ok)
        if np.any(seen):
            j = g[seen] - centre[0]
            tie = t[seen] - ideal[j]
            speed = self.pitch / deriv[j]
            gs = g[seen]
            prev_g = np.concatenate(([self._last[0] if self._last else -(10**9)], gs[:-1]))
            prev_tie = np.concatenate(([self._last[1] if self._last else np.nan], tie[:-1]))
            cons = gs - prev_g == 1
            per = np.where(cons, tie - prev_tie, np.nan)
            prev_per = np.concatenate(([self._last[2] if self._last else np.nan], per[:-1]))
            c2c = np.where(cons, per - prev_per, np.nan)
            self._tie.add(tie, tie * speed)
            self._per.add(per, per * speed)
            self._c2c.add(c2c, c2c * speed)
            self._last = (int(gs[-1]), float(tie[-1]), float(per[-1]))
            self._done = int(gs[-1])
        # keep the teeth the next window's fill needs: from the tooth before the last one at or
        # before the next window's first position
        first_needed = max(self._done, int(g[0]) + h - 1) + 1 - h
        i0 = int(np.searchsorted(g, first_needed, side="right")) - 2
        if i0 > 0:
            self._g, self._t = g[i0:], t[i0:]

    def result(self) -> JitterStats | None:
        if self._tie.n == 0:
            return None
        tr, tp, tdr, tdp = self._tie.figures(self._scale)
        pr, pp, pdr, pdp = self._per.figures(self._scale)
        cr, cp, cdr, cdp = self._c2c.figures(self._scale)
        return JitterStats(
            self._tie.n, tr, tp, pr, pp, cr, cp, tdr, tdp, pdr, pdp, cdr, cdp,
            detrend=f"local cubic over {2 * self.half + 1} tooth positions",
        )


def crank_jitter(track: ToothTrack, half_window: int | None = None) -> JitterStats | None:
    """Jitter of the crank tooth events of a whole track (see :class:`CrankJitter`)."""
    acc = CrankJitter(track.pitch_deg, half_window)
    acc.add(track)
    acc.flush()
    return acc.result()


def edge_jitter(
    times: np.ndarray, angles: np.ndarray, deg_per_s: np.ndarray, half_window: int = 4
) -> JitterStats | None:
    """Jitter of one cam edge from its successive angles (deg) and times.

    The angle trend (a phaser moving, slow drift) is a local quadratic over
    ``2 * half_window + 1`` occurrences; TIE in degrees is the angle minus the trend, converted to
    seconds with the crank speed at each event.
    """
    angles = np.asarray(angles, dtype=float)
    n = len(angles)
    if n < 3:
        return None
    w = _window(n, half_window)
    if w >= 5:
        trend = savgol_filter(angles, w, 2)
        h0 = savgol_coeffs(w, 2)[w // 2]
        scale = 1.0 / np.sqrt(1.0 - h0)
        how = f"local quadratic over {w} occurrences"
    else:
        trend = np.full(n, angles.mean())
        scale = np.sqrt(n / (n - 1.0))
        how = "mean"
    tie_deg = angles - trend
    speed = np.asarray(deg_per_s, dtype=float)
    return jitter_from_tie(tie_deg / speed, speed, rms_scale=float(scale), detrend=how)


def tooth_offsets(
    track: ToothTrack, half_window: int | None = None, exclude: frozenset[int] = frozenset()
) -> dict[int, tuple[float, float, int]]:
    """How far each tooth of the wheel sits from its nominal position, from the teeth of a
    decoded stretch: per tooth number, (mean offset in deg CA, its standard error, count).

    The ideal time of every tooth is the local cubic through its neighbours (as for jitter); a
    tooth that is wider, narrower or bent shows the same time error revolution after revolution,
    which, at the local speed, is its offset from the nominal angle (+ = later). Teeth in
    ``exclude`` (already known to be out of place) are left out of the fits, so they do not
    drag their neighbours' figures.
    """
    pitch = track.pitch_deg
    positions = round(360.0 / pitch)
    half = half_window if half_window is not None else max(3, round(positions / 12))
    w = 2 * half + 1
    coeffs = savgol_coeffs(w, 3, use="dot")
    dcoef = savgol_coeffs(w, 3, deriv=1, use="dot")
    per: dict[int, list[float]] = {}
    for idx in track.runs:
        g = np.rint(track.angles[idx] / pitch).astype(int)
        t = track.times[idx]
        if len(g) < 4 or g[-1] - g[0] + 1 < w:
            continue
        use = ~np.isin(track.tooth[idx], list(exclude)) if exclude else np.ones(len(g), bool)
        gu, tu = g[use], t[use]
        full = np.arange(g[0], g[-1] + 1)
        k = np.clip(np.searchsorted(gu, full, side="right") - 1, 0, len(gu) - 2)
        tf, _ = local_cubic(full.astype(float), gu.astype(float), tu, k)
        ideal = np.correlate(tf, coeffs, "valid")
        deriv = np.correlate(tf, dcoef, "valid")
        centre = full[half : len(full) - half]
        seen = np.isin(g, centre)
        j = g[seen] - centre[0]
        # leave-one-out: the tooth's own weight in the fit would pull its residual towards 0
        # (an excluded tooth had no weight in it)
        own = np.where(np.isin(track.tooth[idx][seen], list(exclude)), 0.0, coeffs[half])
        deg = (t[seen] - ideal[j]) * pitch / deriv[j] / (1.0 - own)
        for tooth, d in zip(track.tooth[idx][seen], deg, strict=True):
            per.setdefault(int(tooth), []).append(float(d))
    out = {}
    for tooth, v in per.items():
        a = np.asarray(v)
        sem = float(a.std(ddof=1) / np.sqrt(len(a))) if len(a) > 1 else float("inf")
        out[tooth] = (float(a.mean()), sem, len(a))
    return out
