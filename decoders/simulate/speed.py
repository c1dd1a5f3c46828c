"""Engine motion: the crank angle theta(t) for a speed profile, and the times it crosses angles.

The engine obeys ``d(theta)/dt = 6 * rpm(t, theta)`` (theta in deg CA, t in s) with

    rpm(t, theta) = base(t) * g(theta),   g(theta) = (1 - a*cos(psi)) / sqrt(1 - a**2),
    psi = 2*pi*order*(theta - phase)/360,

a base speed that depends on time (the profile) and a ripple that depends on the angle, so it
stays locked to the compression strokes. The equation separates,
``integral dtheta/g(theta) = 6 * integral base(t) dt``, and both integrals have closed forms:
``H(theta) = integral dtheta/g`` through the half-angle substitution
``integral dpsi/(1 - a*cos(psi)) = 2/sqrt(1-a**2) * atan(sqrt((1+a)/(1-a)) * tan(psi/2))``,
and ``B(t) = 6 * integral base`` piece by piece (constant, linear, smoothstep, exponential, and
the monotone cubic of the idle wander). So ``theta(t) = H^-1(H(theta0) + B(t))`` is evaluated
exactly at any time, with no step-size error and no dependence on how the time axis is cut into
blocks; the times at which theta (or any increasing function of it) crosses given angles come
from a safeguarded Newton iteration to 1 ps.

>>> m = Motion(ConstantSpeed(rpm=600), n_cyl=4, theta0=0.0, seed=0, t_end=1.0)
>>> round(float(m.angle(0.5)), 9)   # 600 rpm = 3600 deg/s
1800.0
>>> round(float(m.times_at([360.0])[0]), 12)
0.1
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence

import numpy as np
from scipy.interpolate import PchipInterpolator
from scipy.signal import lfilter

from ..errors import UsageError
from .scenario import (
    CoastSpeed,
    ConstantSpeed,
    CrankingSpeed,
    IdleSpeed,
    RampSpeed,
    SnapSpeed,
    SpeedProfile,
)

#: Newton iterations stop when the step is below this (seconds)
TIME_TOLERANCE_S = 1e-12

#: how far before t = 0 and after the end the idle wander is drawn (warm-up of filters)
WALK_MARGIN_S = 30.0

ArrayLike = float | Sequence[float] | np.ndarray


class _Piece:
    """One piece of the base speed on [t0, t1): value and integral from t0."""

    def __init__(
        self, t0: float, t1: float, kind: str, v0: float, v1: float, tau: float = 0.0
    ) -> None:
        self.t0, self.t1, self.kind, self.v0, self.v1, self.tau = t0, t1, kind, v0, v1, tau

    def value(self, t: np.ndarray) -> np.ndarray:
        if self.kind == "const":
            return np.full_like(t, self.v0)
        if self.kind == "exp":
            return self.v1 + (self.v0 - self.v1) * np.exp(-(t - self.t0) / self.tau)
        u = (t - self.t0) / (self.t1 - self.t0)
        s = u if self.kind == "linear" else u * u * (3.0 - 2.0 * u)
        return self.v0 + (self.v1 - self.v0) * s

    def integral(self, t: np.ndarray) -> np.ndarray:
        """Integral of the value from t0 to t (rpm * s)."""
        d = t - self.t0
        if self.kind == "const":
            return self.v0 * d
        if self.kind == "exp":
            return self.v1 * d + (self.v0 - self.v1) * self.tau * -np.expm1(-d / self.tau)
        span = self.t1 - self.t0
        u = d / span
        si = u * u / 2.0 if self.kind == "linear" else u**3 - u**4 / 2.0
        return self.v0 * d + (self.v1 - self.v0) * span * si

    def lowest(self) -> float:
        """Lowest value on the piece (every shape is monotone between v0 and v1)."""
        return min(self.v0, self.v1)


def _pieces(sp: SpeedProfile) -> list[_Piece]:
    inf = math.inf
    if isinstance(sp, ConstantSpeed | IdleSpeed | CrankingSpeed):
        return [_Piece(-inf, inf, "const", sp.rpm, sp.rpm)]
    if isinstance(sp, RampSpeed):
        return [
            _Piece(-inf, sp.t_start_s, "const", sp.rpm_start, sp.rpm_start),
            _Piece(sp.t_start_s, sp.t_end_s, "linear", sp.rpm_start, sp.rpm_end),
            _Piece(sp.t_end_s, inf, "const", sp.rpm_end, sp.rpm_end),
        ]
    if isinstance(sp, SnapSpeed):
        t1 = sp.t_start_s + sp.rise_s
        t2 = t1 + sp.hold_s
        out = [
            _Piece(-inf, sp.t_start_s, "const", sp.rpm, sp.rpm),
            _Piece(sp.t_start_s, t1, "smooth", sp.rpm, sp.peak_rpm),
        ]
        if sp.hold_s > 0:
            out.append(_Piece(t1, t2, "const", sp.peak_rpm, sp.peak_rpm))
        out.append(_Piece(t2, t2 + sp.fall_s, "smooth", sp.peak_rpm, sp.rpm))
        out.append(_Piece(t2 + sp.fall_s, inf, "const", sp.rpm, sp.rpm))
        return out
    if isinstance(sp, CoastSpeed):
        return [
            _Piece(-inf, sp.t_off_s, "const", sp.rpm, sp.rpm),
            _Piece(sp.t_off_s, inf, "exp", sp.rpm, 0.0, sp.tau_s),
        ]
    raise TypeError(f"unknown speed profile {sp!r}")  # pragma: no cover - programming error


class Motion:
    """Exact engine angle, speed and crossing times for one speed profile.

    ``theta0`` is the engine angle at t = 0; ``t_end`` bounds the idle wander (drawn from
    ``-WALK_MARGIN_S`` to ``t_end + WALK_MARGIN_S``; outside it the wander holds its end value).
    """

    def __init__(
        self, speed: SpeedProfile, n_cyl: int, theta0: float, seed: int, t_end: float
    ) -> None:
        self.speed = speed
        self.theta0 = float(theta0)
        self.a = float(speed.ripple)
        self.order = float(speed.ripple_order if speed.ripple_order is not None else n_cyl / 2.0)
        self.phase = float(speed.ripple_phase_deg)
        #: angle period of the ripple, deg CA
        self.ripple_period = 360.0 / self.order
        self._s = math.sqrt(1.0 - self.a * self.a)
        self._c = math.sqrt((1.0 + self.a) / (1.0 - self.a))
        self._pieces = _pieces(speed)
        # anchor of the cumulative integral: end of the first (constant) piece, or 0
        first = self._pieces[0]
        self._anchor = first.t1 if math.isfinite(first.t1) else 0.0
        cum = [0.0]
        for p in self._pieces[1:-1]:
            cum.append(cum[-1] + float(p.integral(np.array(p.t1))))
        self._cum = cum
        self._starts = np.array([p.t0 for p in self._pieces[1:]])
        self._walk: PchipInterpolator | None = None
        self._walk_lo = self._walk_hi = 0.0
        if isinstance(speed, IdleSpeed) and speed.walk_rpm > 0:
            self._make_walk(speed, seed, t_end)
        self._i0 = 0.0
        self._i0 = float(self._integral(np.array(0.0)))
        self._h0 = float(self._H(np.array(self.theta0)))
        low = min(p.lowest() for p in self._pieces)
        if self._walk is not None:
            low += float(np.min(self._walk.c[-1]))  # PCHIP stays within its knot values
        #: a lower bound of the base speed (the exponential of a coast-down tends to 0)
        self.base_floor = low
        if low < 0:  # pragma: no cover - every profile is checked when built
            raise UsageError(f"speed profile {speed!r} reaches rpm {low!r}; keep it above 0")

    # ------------------------------------------------------------------ idle wander
    def _make_walk(self, sp: IdleSpeed, seed: int, t_end: float) -> None:
        dt = sp.walk_time_s / 4.0
        n = math.ceil((t_end + 2 * WALK_MARGIN_S) / dt) + 2
        rng = np.random.default_rng(np.random.SeedSequence([seed, 0x1D1E]))
        rho = math.exp(-dt / sp.walk_time_s)
        x0 = rng.standard_normal()
        e = rng.standard_normal(n - 1) * math.sqrt(1.0 - rho * rho)
        # x[i] = rho * x[i-1] + e[i-1]: unit-variance AR(1), the sampled Ornstein-Uhlenbeck process
        rest, _ = lfilter([1.0], [1.0, -rho], e, zi=[rho * x0])
        x = np.clip(np.concatenate(([x0], rest)), -3.0, 3.0) * sp.walk_rpm
        knots = -WALK_MARGIN_S + dt * np.arange(n)
        self._walk = PchipInterpolator(knots, x, extrapolate=False)
        self._walk_int = self._walk.antiderivative()
        self._walk_lo, self._walk_hi = float(knots[0]), float(knots[-1])
        self._walk_end_int = float(self._walk_int(self._walk_hi))

    def _walk_value(self, t: np.ndarray) -> np.ndarray:
        assert self._walk is not None
        tc = np.clip(t, self._walk_lo, self._walk_hi)
        return self._walk(tc)

    def _walk_integral(self, t: np.ndarray) -> np.ndarray:
        """Integral of the wander from its first knot to t."""
        assert self._walk is not None
        tc = np.clip(t, self._walk_lo, self._walk_hi)
        out = self._walk_int(tc)
        lo = t < self._walk_lo
        hi = t > self._walk_hi
        if lo.any():
            out = np.where(lo, self._walk(self._walk_lo) * (t - self._walk_lo), out)
        if hi.any():
            out = np.where(
                hi, self._walk_end_int + self._walk(self._walk_hi) * (t - self._walk_hi), out
            )
        return out

    # ------------------------------------------------------------------ base speed
    def base_rpm(self, t: ArrayLike) -> np.ndarray:
        """Base speed (without the angle ripple), rpm."""
        t = np.asarray(t, dtype=float)
        k = np.searchsorted(self._starts, t, side="right")
        out = np.empty_like(t)
        for i, p in enumerate(self._pieces):
            m = k == i
            if np.any(m):
                out[m] = p.value(t[m])
        if self._walk is not None:
            out = out + self._walk_value(t)
        return out

    def _integral(self, t: np.ndarray) -> np.ndarray:
        """Integral of the base speed from 0 to t, rpm * s."""
        t = np.asarray(t, dtype=float)
        k = np.searchsorted(self._starts, t, side="right")
        out = np.empty_like(t)
        first = self._pieces[0]
        for i, p in enumerate(self._pieces):
            m = k == i
            if not np.any(m):
                continue
            if i == 0:
                out[m] = first.v0 * (t[m] - self._anchor)
            else:
                out[m] = self._cum[i - 1] + p.integral(t[m])
        if self._walk is not None:
            out = out + self._walk_integral(t)
        return out - self._i0

    # ------------------------------------------------------------------ ripple (angle)
    def _H(self, theta: np.ndarray) -> np.ndarray:
        """Integral of dtheta/g(theta) from the ripple phase, deg; H(theta) - theta is periodic."""
        if self.a == 0.0:
            return theta
        p = self.ripple_period
        u = (theta - self.phase) / p
        n = np.round(u)
        r = (u - n) * (2.0 * math.pi)
        return self.phase + n * p + np.arctan(self._c * np.tan(r / 2.0)) * (p / math.pi)

    def _H_inv(self, h: np.ndarray) -> np.ndarray:
        if self.a == 0.0:
            return h
        p = self.ripple_period
        u = (h - self.phase) / p
        n = np.round(u)
        w = (u - n) * math.pi
        r = 2.0 * np.arctan(np.tan(w) / self._c)
        return self.phase + n * p + r * (p / (2.0 * math.pi))

    def ripple_factor(self, theta: ArrayLike) -> np.ndarray:
        """g(theta): instantaneous speed / base speed."""
        theta = np.asarray(theta, dtype=float)
        if self.a == 0.0:
            return np.ones_like(theta)
        psi = (theta - self.phase) * (2.0 * math.pi / self.ripple_period)
        return (1.0 - self.a * np.cos(psi)) / self._s

    # ------------------------------------------------------------------ public
    def angle(self, t: ArrayLike) -> np.ndarray:
        """Engine angle theta(t), deg CA (unwrapped, theta(0) = theta0)."""
        t = np.asarray(t, dtype=float)
        return self._H_inv(self._h0 + 6.0 * self._integral(t))

    def omega(self, t: ArrayLike, theta: ArrayLike | None = None) -> np.ndarray:
        """d(theta)/dt, deg CA per second (``theta`` may be passed when already known)."""
        t = np.asarray(t, dtype=float)
        th = self.angle(t) if theta is None else np.asarray(theta, dtype=float)
        return 6.0 * self.base_rpm(t) * self.ripple_factor(th)

    def rpm(self, t: ArrayLike) -> np.ndarray:
        """Instantaneous engine speed, rpm."""
        return self.omega(t) / 6.0

    def times_at(
        self, angles: ArrayLike, t_lo: float = 0.0, t_hi: float | None = None
    ) -> np.ndarray:
        """Times at which theta reaches each of ``angles`` (rising, inside [t_lo, t_hi]).

        Without ``t_hi`` the bracket grows from ``t_lo`` until it holds the largest angle.
        """
        angles = np.asarray(angles, dtype=float)
        if t_hi is None:
            t_hi = t_lo + 1.0
            top = float(np.max(angles)) if angles.size else 0.0
            for _ in range(64):
                if float(self.angle(t_hi)) >= top:
                    break
                t_hi = t_lo + 2.0 * (t_hi - t_lo)
            else:
                raise UsageError(
                    f"the engine never reaches {top!r} deg CA (it coasts to a stop first)"
                )
        return solve_increasing(self.angle, lambda t: self.omega(t), angles, t_lo, t_hi)


def solve_increasing(
    f: Callable[[np.ndarray], np.ndarray],
    df: Callable[[np.ndarray], np.ndarray],
    targets: np.ndarray,
    t_lo: float,
    t_hi: float,
    tol: float = TIME_TOLERANCE_S,
) -> np.ndarray:
    """Times in [t_lo, t_hi] at which the increasing function ``f`` equals each target.

    Targets outside [f(t_lo), f(t_hi)] give the nearer end. The iteration is Newton's, kept
    inside a bracket taken from a grid of ``f`` (bisection whenever a step would leave it), and
    stops when the step is below ``tol`` seconds.

    >>> t = solve_increasing(lambda t: t**3, lambda t: 3 * t**2, np.array([8.0, 27.0]), 0.0, 4.0)
    >>> [round(float(v), 12) for v in t]
    [2.0, 3.0]
    """
    targets = np.asarray(targets, dtype=float)
    if targets.size == 0:
        return np.empty(0)
    n_grid = int(min(max(64, 4 * targets.size), 1 << 18))
    tg = np.linspace(t_lo, t_hi, n_grid)
    fg = np.maximum.accumulate(f(tg))
    i = np.clip(np.searchsorted(fg, targets, side="right") - 1, 0, n_grid - 2)
    lo = tg[i].copy()
    hi = tg[i + 1].copy()
    flo, fhi = fg[i], fg[i + 1]
    span = fhi - flo
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(span > 0, (targets - flo) / span, 0.5)
    t = lo + np.clip(frac, 0.0, 1.0) * (hi - lo)
    active = np.ones(t.size, dtype=bool)
    for _ in range(100):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        tt = t[idx]
        r = f(tt) - targets[idx]
        lo[idx] = np.where(r < 0, tt, lo[idx])
        hi[idx] = np.where(r > 0, tt, hi[idx])
        d = df(tt)
        with np.errstate(invalid="ignore", divide="ignore"):
            tn = tt - r / d
        bad = ~((tn > lo[idx]) & (tn < hi[idx]))
        tn = np.where(bad, 0.5 * (lo[idx] + hi[idx]), tn)
        done = (np.abs(tn - tt) <= tol) | (hi[idx] - lo[idx] <= tol) | (r == 0)
        t[idx] = np.where(r == 0, tt, tn)
        active[idx[done]] = False
    return t
