"""Sensor physics: the Hall sensor's first-order output and the VR sensor's flux derivative.

Hall: the output holds one of two levels and, at each physical flank ``t_k``, starts towards the
other with ``1 - exp(-(t - t_k)/tau)``. Summing the steps of every flank gives the exact
first-order response at any time, so samples carry the sub-sample flank timing with no grid.

VR: ``v = K * d(flux)/dt = K * d(flux)/d(angle) * d(angle)/dt`` (Faraday's law) with the flux a
sum of bumps ``a_j * b((x - c_j)/h_j)``, ``b(u) = (1 - u**2)**4`` for ``|u| < 1`` (smooth: b, b'
and b'' vanish at the ends).

>>> abs(float(bump_slope(np.array(0.0))))   # a tooth centre: no flux change
0.0
>>> bool(bump_slope(np.array(-0.5)) > 0)   # a tooth approaching: flux rising
True
"""

from __future__ import annotations

import math

import numpy as np

from .wheel import Geometry

#: contributions below this are dropped when summing exponential tails
TAIL_CUTOFF = 1e-18


def bump(u: np.ndarray) -> np.ndarray:
    """Flux bump b(u) = (1 - u**2)**4 on |u| < 1, else 0."""
    u = np.clip(np.asarray(u, dtype=float), -1.0, 1.0)
    return (1.0 - u * u) ** 4


def bump_slope(u: np.ndarray) -> np.ndarray:
    """db/du = -8*u*(1 - u**2)**3 on |u| < 1, else 0."""
    u = np.clip(np.asarray(u, dtype=float), -1.0, 1.0)
    w = 1.0 - u * u
    return -8.0 * u * (w * w * w)


#: largest |db/du|, at u**2 = 1/7: 8/sqrt(7) * (6/7)**3
BUMP_SLOPE_PEAK = 8.0 / math.sqrt(7.0) * (6.0 / 7.0) ** 3


class FluxWheel:
    """d(flux)/d(angle) of a wheel's teeth at any wheel angle (periodic)."""

    def __init__(self, g: Geometry) -> None:
        self.period = p = g.period
        c = np.asarray(g.centre, dtype=float) % p
        order = np.argsort(c)
        c, h, a = c[order], np.asarray(g.vr_half)[order], np.asarray(g.vr_amp)[order]
        n = c.size
        # how many other centres a bump's support holds, at most
        k = 0
        for j in range(n):
            d = np.abs(c - c[j]) % p
            d = np.minimum(d, p - d)
            k = max(k, int(np.count_nonzero(d < h[j] - 1e-9 * p)) - 1)
        self._k = k
        reps = 1 + (k + 1 + n - 1) // n
        shifts = np.arange(-reps, reps + 1)
        self._c = (c[None, :] + p * shifts[:, None]).ravel()
        self._h = np.tile(h, shifts.size)
        self._a = np.tile(a, shifts.size)
        self._ih = 1.0 / self._h
        self._ah = self._a * self._ih

    def slope(self, x: np.ndarray) -> np.ndarray:
        """d(flux)/d(angle) at wheel angles ``x`` (any real values), flux units per deg."""
        x = np.asarray(x, dtype=float) % self.period
        i = np.searchsorted(self._c, x, side="right")
        out = np.zeros_like(x)
        for off in range(-1 - self._k, self._k + 1):
            j = i + off
            out += self._ah[j] * bump_slope((x - self._c[j]) * self._ih[j])
        return out

    def flux(self, x: np.ndarray) -> np.ndarray:
        """The flux itself (for plots and checks)."""
        x = np.asarray(x, dtype=float) % self.period
        i = np.searchsorted(self._c, x, side="right")
        out = np.zeros_like(x)
        for off in range(-1 - self._k, self._k + 1):
            j = i + off
            out += self._a[j] * bump((x - self._c[j]) / self._h[j])
        return out

    def peak_slope(self, lo: float = 0.0, hi: float | None = None, n: int = 200_001) -> float:
        """Largest |d(flux)/d(angle)| over [lo, hi] (default: the whole wheel), on a dense grid."""
        hi = self.period if hi is None else hi
        return float(np.max(np.abs(self.slope(np.linspace(lo, hi, n)))))


def comb_peak_slope(pitch: float, half: float) -> float:
    """Peak |d(flux)/d(angle)| of an endless comb of good teeth at ``pitch`` with bump
    half-width ``half``: what a regular tooth of the wheel gives, away from the gap."""
    x = np.linspace(0.0, pitch, 100_001)
    s = np.zeros_like(x)
    reach = math.ceil(half / pitch) + 1
    for j in range(-reach, reach + 1):
        s += bump_slope((x - j * pitch) / half) / half
    return float(np.max(np.abs(s)))


def clamp_voltage(v: np.ndarray, clamp_v: float | None, how: str) -> np.ndarray:
    """Input-protection clamp: ``hard`` clips at +-clamp_v, ``soft`` is clamp_v*tanh(v/clamp_v)."""
    if clamp_v is None:
        return v
    if how == "soft":
        return clamp_v * np.tanh(v / clamp_v)
    return np.clip(v, -clamp_v, clamp_v)


def step_response(
    t: np.ndarray,
    flank_t: np.ndarray,
    level_after: np.ndarray,
    level0: float,
    tau: float,
) -> np.ndarray:
    """Output of a first-order system (time constant ``tau``) driven by level steps.

    The input is ``level0`` until ``flank_t[0]`` and ``level_after[k]`` from ``flank_t[k]`` on
    (the output is taken as settled at ``level0`` well before the first flank). With
    ``tau = 0`` the output is the input. ``t`` and ``flank_t`` must be sorted.

    >>> y = step_response(np.array([0.0, 1.0, 2.0]), np.array([1.0]), np.array([5.0]), 0.0, 1.0)
    >>> [round(float(v), 6) for v in y]   # 5 * (1 - exp(-1)) one tau after the step
    [0.0, 0.0, 3.160603]
    """
    t = np.asarray(t, dtype=float)
    n = flank_t.size
    i = np.searchsorted(flank_t, t, side="right") - 1
    if n == 0:
        return np.full_like(t, level0)
    y = np.where(i >= 0, level_after[np.clip(i, 0, n - 1)], level0)
    if tau <= 0:
        return y
    before = np.concatenate(([level0], level_after[:-1]))
    delta = before - level_after
    for m in range(n):
        j = i - m
        ok = j >= 0
        if not np.any(ok):
            break
        jj = np.clip(j, 0, n - 1)
        e = np.exp(np.where(ok, (flank_t[jj] - t) / tau, -np.inf))
        if float(np.max(e)) < TAIL_CUTOFF:
            break
        y = y + delta[jj] * e
    return y
