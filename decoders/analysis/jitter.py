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
from scipy.interpolate import CubicSpline
from scipy.signal import savgol_coeffs, savgol_filter

from ..result import JitterStats
from ..wheels.base import ToothTrack


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


def crank_jitter(track: ToothTrack, half_window: int | None = None) -> JitterStats | None:
    """Jitter of the crank tooth events of every sync run.

    Per run, the tooth times are put on the wheel's regular angle grid (positions without an
    event -- the gap, missing teeth -- filled by interpolation), a local cubic over
    ``2 * half_window + 1`` positions gives the ideal times, and the TIE of each seen tooth is
    its time minus the ideal one.
    """
    pitch = track.pitch_deg
    positions = round(360.0 / pitch)
    half = half_window if half_window is not None else max(3, round(positions / 12))
    ties, speeds, cons = [], [], []
    scale = []
    for idx in track.runs:
        if len(idx) < 8:
            continue
        t = track.times[idx]
        grid_i = np.rint(track.angles[idx] / pitch).astype(int)
        grid_i -= grid_i[0]
        full = np.arange(grid_i[-1] + 1)
        # positions with no event (the gap, missing teeth) are filled smoothly, so the fill
        # does not look like jitter to the local fit
        tf = CubicSpline(grid_i, t)(full)
        w = _window(len(full), half)
        if w < 5:
            continue
        ideal_full = savgol_filter(tf, w, 3)
        deriv = savgol_filter(tf, w, 3, deriv=1)  # seconds per pitch
        ideal = ideal_full[grid_i]
        ties.append(t - ideal)
        speeds.append(pitch / deriv[grid_i])
        c = np.concatenate(([False], np.diff(grid_i) == 1))
        cons.append(c)
        h0 = savgol_coeffs(w, 3)[w // 2]
        scale.append(1.0 / np.sqrt(1.0 - h0))
    if not ties:
        return None
    return jitter_from_tie(
        np.concatenate(ties),
        np.concatenate(speeds),
        np.concatenate(cons),
        rms_scale=float(np.mean(scale)),
        detrend=f"local cubic over {2 * half + 1} tooth positions",
    )


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
