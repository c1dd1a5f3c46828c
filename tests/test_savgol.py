"""Savitzky-Golay smoothing in numpy (toothcomb.decoders.savgol) against scipy.signal, and the
import cost it saves: a decode of Hall sensors, or a short one of VR sensors, loads no scipy."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.signal as ss
from toothcomb.decoders.savgol import savgol_coeffs, savgol_filter
from toothcomb.decoders.simulate import simulate
from toothcomb.decoders.simulate.presets import preset


def test_coefficients_are_scipys() -> None:
    """Every odd window up to 41, order up to 6, value and first two derivatives, both orders.
    # source: scipy.signal.savgol_coeffs (SciPy reference implementation)"""
    worst = 0.0
    for window in range(1, 42, 2):
        for order in range(min(window, 7)):
            for deriv in range(3):
                for use in ("conv", "dot"):
                    ours = savgol_coeffs(window, order, deriv, use=use)
                    ref = ss.savgol_coeffs(window, order, deriv=deriv, use=use)
                    assert ours.shape == ref.shape
                    worst = max(worst, float(np.max(np.abs(ours - ref))))
    assert worst < 1e-12


def test_coefficients_of_the_published_tables() -> None:
    """Savitzky & Golay (1964), Table I (quadratic/cubic smoothing, 7 points): -2, 3, 6, 7, 6,
    3, -2 over 21; Table III (first derivative, quadratic, 5 points): -2, -1, 0, 1, 2 over 10.
    # source: A. Savitzky, M. J. E. Golay, Anal. Chem. 36(8), 1627-1639 (1964), Tables I, III"""
    assert np.allclose(savgol_coeffs(7, 3, use="dot") * 21, [-2, 3, 6, 7, 6, 3, -2])
    assert np.allclose(savgol_coeffs(7, 2, use="dot") * 21, [-2, 3, 6, 7, 6, 3, -2])
    assert np.allclose(savgol_coeffs(5, 2, deriv=1, use="dot") * 10, [-2, -1, 0, 1, 2])
    # a convolution kernel is the dot product's weights reversed
    assert np.allclose(savgol_coeffs(5, 2, deriv=1) * 10, [2, 1, 0, -1, -2])


def test_filter_is_scipys_interp_mode() -> None:
    """Random series, windows and orders, offsets and scales: scipy's default (``interp``) mode,
    ends included, to rounding.
    # source: scipy.signal.savgol_filter (SciPy reference implementation)"""
    rng = np.random.default_rng(7)
    for _ in range(500):
        window = int(rng.integers(0, 16)) * 2 + 1
        order = int(rng.integers(0, min(window, 5)))
        n = int(rng.integers(window, 120))
        x = rng.normal(size=n) * 10 ** rng.uniform(-3, 3) + rng.uniform(-1e3, 1e3)
        ours = savgol_filter(x, window, order)
        ref = ss.savgol_filter(x, window, order)
        assert np.max(np.abs(ours - ref)) <= 1e-12 * np.max(np.abs(x)), (window, order, n)


def test_a_polynomial_of_the_fitted_order_comes_through() -> None:
    """Least squares fits a polynomial of its own degree exactly: the filter returns it, ends
    and all (analytic)."""
    t = np.linspace(-3.0, 5.0, 40)
    cubic = 0.5 * t**3 - 2.0 * t**2 + t - 7.0
    assert np.allclose(savgol_filter(cubic, 9, 3), cubic, rtol=0, atol=1e-9)
    # a cubic fit cannot follow a quartic term: inside, at unit spacing, it moves every sample
    # by sum(c_i * i**4) of the 9-point weights -21, 14, 39, 54, 59, 54, 39, 14, -21 over 231
    # source: Savitzky & Golay (1964), Table I (quadratic/cubic smoothing, 9 points)
    i = np.arange(30.0) - 10.0
    quartic = i**4
    table = np.array([-21, 14, 39, 54, 59, 54, 39, 14, -21]) / 231
    bias = float(np.sum(table * np.arange(-4.0, 5.0) ** 4))  # -3564 * 2 / 231
    assert bias == pytest.approx(-30.857, abs=1e-3)
    moved = savgol_filter(quartic, 9, 3) - quartic
    assert np.allclose(moved[4:-4], bias, rtol=0, atol=1e-9)


@pytest.mark.parametrize(("window", "order"), [(4, 2), (0, 0), (5, 5), (5, -1)])
def test_bad_windows_are_refused(window: int, order: int) -> None:
    with pytest.raises(ValueError, match=r"window|order"):
        savgol_coeffs(window, order)


def test_a_window_longer_than_the_series_is_refused() -> None:
    with pytest.raises(ValueError, match="longer than the series"):
        savgol_filter(np.arange(4.0), 5, 2)


#: in a fresh process: decode a capture (with a worker process from its first samples on, if
#: asked and this machine can fork one) and list the scipy modules that got imported
IMPORTS = r"""
import json, sys
from toothcomb.decoders import worker
from toothcomb.decoders.options import DecodeOptions
from toothcomb.decoders.pipeline import decode_capture
forked = []
if sys.argv[2] == "worker-long":
    # as if the rest of the capture held more half-waves than pay for scipy.signal's import
    from toothcomb.decoders.frontends import vr
    vr.FORK_STEPS = 1000
if sys.argv[2].startswith("worker"):
    worker.MIN_SAMPLES = 1
    made = worker.FrontEndWorker.__init__
    def counted(self, *args, **kwargs):
        forked.append(sorted(m for m in sys.modules if m.split(".")[0] == "scipy"))
        made(self, *args, **kwargs)
    worker.FrontEndWorker.__init__ = counted
r = decode_capture(sys.argv[1], DecodeOptions(worker_process=sys.argv[2] != "one-process"))
print(json.dumps({"refs": len(r.crank.reference_times_s), "forked": forked,
                  "scipy": sorted(m for m in sys.modules if m.split(".")[0] == "scipy")}))
"""


def _decode_imports(path: Path, how: str = "one-process") -> dict:
    """What a decode of ``path`` in a fresh process imports; ``how``: "worker" to hand the
    crank to a worker process (and list what was imported when it was forked), "worker-long"
    as well, as if the capture went on for long."""
    out = subprocess.run([sys.executable, "-c", IMPORTS, str(path), how],
                         capture_output=True, text=True, check=True)
    return json.loads(out.stdout)


def test_a_hall_decode_loads_no_scipy(tmp_path: Path) -> None:
    """Hall crank and cams need numpy alone; scipy.signal would cost about 0.7 s and 70 MiB to
    import, more than a decode of a few seconds takes (measured by python -X importtime)."""
    path = tmp_path / "hall.h5"  # float samples beyond +-1
    simulate(preset("phaser-sweep-60-2-hall", duration_s=1.5)).write(path)
    got = _decode_imports(path)
    assert got["refs"] >= 30  # 2500 rpm for 1.5 s: about 60 revolutions decoded
    assert got["scipy"] == []


def test_a_vr_decode_loads_scipy_only_for_a_long_worker(tmp_path: Path) -> None:
    """The VR front end's running averages are stepped in Python on a short capture (importing
    scipy.signal for lfilter would cost more), also in a worker process (here forced from the
    first samples on); when the rest of the capture would step more values than pay for the
    import, scipy.signal is imported before the fork, so that the worker has it."""
    from toothcomb.decoders.worker import can_fork

    path = tmp_path / "vr.flac"
    # longer than the first seconds the decode looks at before it may hand the crank over
    simulate(preset("idle-60-2-vr-soundcard", duration_s=8.0)).write(path)
    got = _decode_imports(path)
    assert got["refs"] >= 100  # 800 rpm for 8 s
    assert got["scipy"] == [] and got["forked"] == []
    if not can_fork():
        pytest.skip("no worker process on this machine (Linux with two cores or more)")
    got = _decode_imports(path, "worker")
    assert got["refs"] >= 100
    assert len(got["forked"]) == 1 and got["forked"][0] == [] and got["scipy"] == []
    got = _decode_imports(path, "worker-long")
    assert got["refs"] >= 100
    assert len(got["forked"]) == 1 and "scipy.signal" in got["forked"][0]
