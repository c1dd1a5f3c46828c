"""Savitzky-Golay smoothing in numpy alone.

A Savitzky-Golay filter fits a polynomial of degree ``polyorder`` to every ``window`` consecutive
samples by least squares and takes its value (or a derivative) at the window's centre; since the
fit is linear in the samples, that is one fixed set of weights applied at every position
(Savitzky & Golay, "Smoothing and Differentiation of Data by Simplified Least Squares
Procedures", Analytical Chemistry 36(8), 1964). At the ends, where no window is centred, the
polynomial fitted to the first (last) ``window`` samples is evaluated instead.

These are the numbers :func:`scipy.signal.savgol_coeffs` and :func:`scipy.signal.savgol_filter`
(``mode="interp"``) give, to rounding: the decode needs only these two, and importing
``scipy.signal`` costs about 0.7 s and 70 MiB, more than a decode of a few seconds of capture.
Only odd windows are taken (every caller's are).
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["savgol_coeffs", "savgol_filter"]


def _odd_window(window: int, polyorder: int) -> int:
    window = int(window)
    if window < 1 or window % 2 == 0:
        raise ValueError(f"the window must be a positive odd number of samples, not {window}")
    if not 0 <= polyorder < window:
        raise ValueError(f"the polynomial order must lie in 0 .. {window - 1}, not {polyorder}")
    return window


def savgol_coeffs(window: int, polyorder: int, deriv: int = 0, use: str = "conv") -> np.ndarray:
    """Weights that give the fitted polynomial's ``deriv``-th derivative (per sample) at the
    centre of a window of ``window`` samples: for ``use="dot"`` in the samples' order (a dot
    product with the window), for ``"conv"`` reversed (a convolution kernel).

    >>> (savgol_coeffs(5, 2, use="dot") * 35).round(9).tolist()  # the 1964 paper's table
    [-3.0, 12.0, 17.0, 12.0, -3.0]
    """
    window = _odd_window(window, polyorder)
    if use not in ("conv", "dot"):
        raise ValueError(f"use must be 'conv' or 'dot', not {use!r}")
    if deriv > polyorder:
        return np.zeros(window)
    x = np.arange(-(window // 2), window // 2 + 1, dtype=float)
    if use == "conv":
        x = x[::-1]
    # the weights w solve  sum_i w_i x_i**j = deriv! when j == deriv, else 0  (j = 0..polyorder):
    # the minimum-norm solution, which is the least-squares fit's
    a = x ** np.arange(polyorder + 1)[:, None]
    y = np.zeros(polyorder + 1)
    y[deriv] = math.factorial(deriv)
    return np.linalg.lstsq(a, y, rcond=None)[0]


def _fit_edge(x: np.ndarray, start: int, stop: int, lo: int, hi: int, order: int) -> np.ndarray:
    """The polynomial fitted to ``x[start:stop]``, at the positions ``lo .. hi - 1``."""
    p = np.polyfit(np.arange(stop - start, dtype=float), x[start:stop], order)
    return np.polyval(p, np.arange(lo - start, hi - start, dtype=float))


def savgol_filter(x: np.ndarray, window: int, polyorder: int) -> np.ndarray:
    """``x`` smoothed by a Savitzky-Golay filter; the ends are the polynomial fitted to the
    first and the last ``window`` samples (at least ``window`` samples are needed).

    A polynomial of degree ``polyorder`` comes through unchanged:

    >>> t = np.arange(12.0)
    >>> bool(np.allclose(savgol_filter(2 * t**2 - t + 1, 5, 2), 2 * t**2 - t + 1))
    True
    """
    window = _odd_window(window, polyorder)
    x = np.asarray(x, dtype=float)
    n = len(x)
    if window > n:
        raise ValueError(f"the window ({window}) is longer than the series ({n})")
    half = window // 2
    y = np.convolve(x, savgol_coeffs(window, polyorder), mode="same")
    y[:half] = _fit_edge(x, 0, window, 0, half, polyorder)
    y[n - half :] = _fit_edge(x, n - window, n, n - half, n, polyorder)
    return y
