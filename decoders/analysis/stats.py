"""Statistics on angles: circular where angles wrap, so no false spread appears across 0/360."""

from __future__ import annotations

import numpy as np

from ..result import AngleStats


def wrap(angle: np.ndarray | float, period: float = 360.0) -> np.ndarray:
    """Angles folded into [0, period).

    >>> wrap(np.array([-1.0, 360.0, 725.0])).tolist()
    [359.0, 0.0, 5.0]
    """
    return np.mod(np.asarray(angle, dtype=float), period)


def signed_difference(a: np.ndarray | float, b: np.ndarray | float, period: float = 360.0):
    """Smallest signed difference ``a - b`` on a circle of ``period``.

    >>> float(signed_difference(359.0, 1.0)), float(signed_difference(1.0, 359.0))
    (-2.0, 2.0)
    """
    half = period / 2.0
    return np.mod(np.asarray(a, dtype=float) - b + half, period) - half


def circular_mean(angles: np.ndarray, period: float = 360.0) -> float:
    """Mean direction of angles on a circle of ``period`` (the angle of the mean unit vector).

    >>> round(circular_mean(np.array([359.0, 1.0, 3.0])), 6)
    1.0
    """
    a = np.asarray(angles, dtype=float) * (2.0 * np.pi / period)
    m = np.arctan2(np.mean(np.sin(a)), np.mean(np.cos(a)))
    return float(np.mod(m * period / (2.0 * np.pi), period))


def angle_stats(angles: np.ndarray, period: float = 360.0) -> AngleStats:
    """Mean, spread and range of angles that may wrap at ``period``.

    The mean is the circular mean (in [0, period)); std, min and max are taken on the deviations
    from it, so an edge whose events straddle 0/360 shows its true spread. ``min`` and ``max``
    are ``mean + smallest/largest deviation`` and so may lie just outside [0, period).

    >>> s = angle_stats(np.array([359.5, 0.5, 359.7, 0.3]))
    >>> round(s.mean, 6) % 360, round(s.std, 4), round(s.min, 4), round(s.max, 4), s.n
    (0.0, 0.4761, -0.5, 0.5, 4)
    """
    a = np.asarray(angles, dtype=float)
    if len(a) == 0:
        nan = float("nan")
        return AngleStats(nan, nan, nan, nan, 0)
    mean = circular_mean(a, period)
    dev = signed_difference(a, mean, period)
    # re-centre on the mean of the deviations (the circular mean is not exactly the arithmetic
    # mean of small deviations when they are skewed)
    mean = float(np.mod(mean + dev.mean(), period))
    dev = signed_difference(a, mean, period)
    std = float(np.std(dev, ddof=1)) if len(a) > 1 else 0.0
    if mean >= period - 1e-9:
        mean = 0.0
    return AngleStats(mean, std, mean + float(dev.min()), mean + float(dev.max()), len(a))
