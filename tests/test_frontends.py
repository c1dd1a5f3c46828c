"""Sensor front ends: sub-sample edge times, streaming invariance, no filter delay."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal
from toothcomb.decoders.frontends.base import cubic_crossing, despike, linear_crossing
from toothcomb.decoders.frontends.hall import HallFrontEnd
from toothcomb.decoders.frontends.vr import VrFrontEnd
from toothcomb.decoders.model import ChannelLevels, Edges


def levels_of(x: np.ndarray) -> ChannelLevels:
    pts = ChannelLevels.POINTS
    noise = float(np.median(np.abs(np.diff(x))) / (0.6745 * math.sqrt(2)))
    return ChannelLevels(
        "ch", len(x), float(x.min()), float(x.max()), float(x.mean()), float(x.std()),
        tuple(float(v) for v in np.percentile(x, pts)), noise, 0.0,
    )


def run(cls, x: np.ndarray, fs: float, block: int | None = None, **opts) -> Edges:
    lv = levels_of(x)
    cal = cls.calibrate(x, fs, lv)
    cal.update(opts)
    fe = cls(fs, lv, **cal)
    block = block or len(x)
    parts = [fe.process(x[i : i + block], i) for i in range(0, len(x), block)]
    parts.append(fe.finish())
    return Edges.concat(parts)


def hall_signal(edges_s: np.ndarray, fs: float, n: int, tau: float, lo=0.0, hi=5.0):
    """Exact first-order response of a sensor output switching at ``edges_s`` (rising first)."""
    t = np.arange(n) / fs
    level = np.full(n, lo)
    for k, te in enumerate(edges_s):
        target = hi if k % 2 == 0 else lo
        prev = lo if k % 2 == 0 else hi
        after = t >= te
        level[after] = target + (prev - target) * np.exp(-(t[after] - te) / tau)
    return level


@pytest.fixture
def hall_case():
    """A Hall channel as a sound card records it: made at 16x the rate, then decimated with a
    linear-phase anti-alias filter (scipy.signal.resample_poly compensates its delay)."""
    rng = np.random.default_rng(7)
    fs = 48000.0
    # 200 flanks, 0.4..0.6 ms apart, at arbitrary sub-sample positions
    gaps = rng.uniform(0.4e-3, 0.6e-3, 200)
    edges = 0.002 + np.cumsum(gaps)
    n = int((edges[-1] + 0.002) * fs)
    tau = 0.2e-6  # a fast sensor; the 50 % lag of a slow one is checked at scope rates below
    fine = hall_signal(edges, 16 * fs, 16 * n, tau)
    x = signal.resample_poly(fine, 1, 16) + rng.normal(0, 0.005, n)
    return fs, edges, tau, x


def test_hall_edges_are_sub_sample(hall_case):
    fs, truth, tau, x = hall_case
    e = run(HallFrontEnd, x, fs)
    assert len(e) == len(truth)
    assert e.direction[0] == 1 and np.all(np.diff(e.direction.astype(int)) != 0)
    # a first-order output crosses its 50 % point tau*ln2 after the flank
    # source: step response of a first-order system, 1 - exp(-t/tau) = 0.5 at t = tau ln 2
    err = e.times - (truth + tau * math.log(2))
    ts = 1 / fs
    # quantising an edge to the sample grid gives an rms error of Ts/sqrt(12)
    # source: uniform quantisation error variance Delta^2/12 (B. Widrow, I. Kollar,
    # "Quantization Noise", Cambridge University Press 2008, ch. 4)
    grid_err = np.round(truth * fs) / fs - truth
    assert np.sqrt(np.mean(grid_err**2)) == pytest.approx(ts / math.sqrt(12), rel=0.15)
    # interpolation does far better than the grid: under a third of it here
    assert np.sqrt(np.mean(err**2)) < 0.3 * ts / math.sqrt(12)
    assert np.max(np.abs(err)) < 0.2 * ts


@pytest.mark.parametrize("block", [1000, 4097, 65536])
def test_hall_edges_do_not_depend_on_block_size(hall_case, block):
    fs, _truth, _tau, x = hall_case
    whole = run(HallFrontEnd, x, fs)
    cut = run(HallFrontEnd, x, fs, block=block)
    np.testing.assert_array_equal(whole.times, cut.times)
    np.testing.assert_array_equal(whole.direction, cut.direction)


def test_hall_50_percent_lag_at_scope_rate():
    """Resolved by a 1 MS/s scope, a first-order output of tau = 5 us crosses its 50 % point
    tau*ln2 after the flank."""
    rng = np.random.default_rng(2)
    fs = 1e6
    truth = 0.0002 + np.cumsum(rng.uniform(2e-4, 3e-4, 40))
    tau = 5e-6
    x = hall_signal(truth, fs, int((truth[-1] + 2e-4) * fs), tau)
    e = run(HallFrontEnd, x, fs)
    # source: step response of a first-order system, 1 - exp(-t/tau) = 0.5 at t = tau ln 2
    np.testing.assert_allclose(e.times - truth, tau * math.log(2), atol=0.05e-6)


def test_hall_handles_ac_coupling_droop():
    """A sound card's high-pass turns a slow square wave into spikes with droop; the local
    midpoint still times the flanks."""
    fs = 48000.0
    truth = np.array([0.05, 0.058, 0.25, 0.258, 0.45, 0.458])  # cam window at cranking speed
    n = int(0.6 * fs)
    x = hall_signal(truth, fs, n, 2e-6, 0.0, 1.0)
    # first-order high-pass, corner 10 Hz (bilinear design, as a sound card's coupling capacitor)
    b, a = signal.butter(1, 10.0, "highpass", fs=fs)
    y = signal.lfilter(b, a, x)
    # the droop over one window agrees with the exponential decay exp(-T/tau), tau = 1/(2 pi fc)
    # source: first-order high-pass step response y = exp(-t/tau)
    k = int(0.0575 * fs)
    assert y[k] == pytest.approx(math.exp(-(0.0075 - 0.0) * 2 * math.pi * 10.0), abs=0.02)
    e = run(HallFrontEnd, y, fs)
    assert e.direction.tolist() == [1, -1, 1, -1, 1, -1]
    assert np.max(np.abs(e.times - truth)) < 0.5 / fs


def test_hall_rejects_ignition_spikes():
    rng = np.random.default_rng(3)
    fs = 250000.0
    truth = 0.001 + np.arange(40) * 0.0005
    n = int(0.022 * fs)
    x = hall_signal(truth, fs, n, 3e-6) + rng.normal(0, 0.01, n)
    # 9 V spikes, 2 us decay, between flanks: as many as there are flanks
    t = np.arange(n) / fs
    for ts in truth[:-1] + 0.00017:
        after = t >= ts
        x[after] += 9.0 * np.exp(-(t[after] - ts) / 2e-6)
    e = run(HallFrontEnd, x, fs)
    assert len(e) == len(truth)
    assert np.max(np.abs(e.times - truth)) < 1.0 / fs


def vr_signal(centres: np.ndarray, fs: float, n: int, width: float, amp: float):
    """Sum of derivative-of-Gaussian pulses: zero and falling at each tooth centre."""
    t = np.arange(n) / fs
    x = np.zeros(n)
    for c in centres:
        u = (t - c) / width
        x += -amp * u * np.exp(-0.5 * u * u)
    return x


def test_vr_times_tooth_centres_on_the_zero_crossing():
    rng = np.random.default_rng(11)
    fs = 44100.0
    centres = 0.003 + np.cumsum(rng.uniform(1.0e-3, 1.4e-3, 150))
    n = int((centres[-1] + 0.003) * fs)
    x = vr_signal(centres, fs, n, 0.2e-3, 1.0) + rng.normal(0, 0.002, n)
    e = run(VrFrontEnd, x, fs)
    falling = e.times[e.direction == -1]
    assert len(falling) == len(centres)
    assert np.max(np.abs(falling - centres)) < 0.05 / fs


def test_vr_follows_amplitude_growing_with_speed():
    """Amplitude proportional to speed (Faraday's law): a 20x speed-up must not lose teeth."""
    fs = 96000.0
    t_end = 1.0
    # speed ramps 1 -> 20 (relative); teeth at equal angles; amplitude ~ speed
    theta = lambda t: 40 * t + 380 * t**2  # noqa: E731 - revolutions of a 1-tooth-per-unit wheel
    k = np.arange(1, int(theta(t_end)))
    centres = (-40 + np.sqrt(40**2 + 4 * 380 * k)) / (2 * 380)
    n = int(t_end * fs)
    t = np.arange(n) / fs
    x = np.zeros(n)
    for c in centres:
        speed = 40 + 2 * 380 * c
        width = 0.2 / speed
        u = (t - c) / width
        near = np.abs(u) < 8
        x[near] += -(speed / 40) * u[near] * np.exp(-0.5 * u[near] ** 2)
    e = run(VrFrontEnd, x, fs)
    falling = e.times[e.direction == -1]
    assert len(falling) == len(centres)
    assert np.max(np.abs(falling - centres)) < 0.1 / fs


def test_vr_edges_do_not_depend_on_block_size():
    rng = np.random.default_rng(5)
    fs = 48000.0
    centres = 0.002 + np.cumsum(rng.uniform(0.8e-3, 1.2e-3, 300))
    n = int((centres[-1] + 0.002) * fs)
    x = vr_signal(centres, fs, n, 0.15e-3, 0.5) + rng.normal(0, 0.003, n)
    whole = run(VrFrontEnd, x, fs)
    for block in (777, 1000, 16384):
        cut = run(VrFrontEnd, x, fs, block=block)
        np.testing.assert_array_equal(whole.times, cut.times)


def test_despike_does_not_move_edges(hall_case):
    """The running median that removes spikes only finds flanks and measures levels; the time
    comes from the samples as recorded. It is off unless the channel has spikes, and forced on
    it moves no flank on average (its window is centred) and none by more than a hair."""
    fs, truth, tau, noisy = hall_case
    clean = signal.resample_poly(hall_signal(truth, 16 * fs, 16 * len(noisy), tau), 1, 16)
    for x in (clean, noisy):
        assert "despike" not in HallFrontEnd.calibrate(x, fs, levels_of(x))
        plain = run(HallFrontEnd, x, fs, despike=1)
        median = run(HallFrontEnd, x, fs, despike=5)
        shift = (median.times - plain.times) * fs
        assert abs(np.mean(shift)) < 0.003
        assert np.max(np.abs(shift)) < 0.03
    centres = 0.002 + np.arange(100) * 1.1e-3
    v = vr_signal(centres, fs, int(0.115 * fs), 0.2e-3, 1.0)
    a = run(VrFrontEnd, v, fs, despike=1)
    b = run(VrFrontEnd, v, fs, despike=5)
    np.testing.assert_allclose(a.times, b.times, rtol=0, atol=1e-12)


def test_a_causal_low_pass_would_delay_edges():
    """Why toothcomb never filters causally: a first-order low-pass delays a slow zero crossing
    by about 1/(2 pi fc), which at speed becomes an angle error."""
    fs = 100000.0
    fc = 2000.0
    f = 100.0
    t = np.arange(int(0.05 * fs)) / fs
    x = np.sin(2 * np.pi * f * t)
    b, a = signal.butter(1, fc, fs=fs)
    y = signal.lfilter(b, a, x)
    fe_x = run(VrFrontEnd, x, fs)
    fe_y = run(VrFrontEnd, y, fs)
    tx = fe_x.times[fe_x.direction == -1][1:]
    ty = fe_y.times[fe_y.direction == -1][1:]
    delay = np.median(ty - tx)
    # source: phase delay of a first-order low-pass, atan(f/fc)/(2 pi f) -> 1/(2 pi fc) for
    # f << fc (A. V. Oppenheim, A. S. Willsky, "Signals and Systems", 2nd ed., sec. 6.5)
    assert delay == pytest.approx(math.atan(f / fc) / (2 * math.pi * f), rel=0.02)
    assert delay == pytest.approx(1 / (2 * math.pi * fc), rel=0.01)


def test_interpolation_helpers():
    y = np.array([0.0, 1.0, 3.0, 4.0])
    assert linear_crossing(y, np.array([1]), np.array([2.0]))[0] == pytest.approx(0.5)
    t = np.arange(10.0)
    s = np.sin(2 * np.pi * (t - 4.37) / 24)
    # the cubic through four samples of a sine finds its zero to within 1e-4 sample here
    assert cubic_crossing(s, np.array([4]), 0.0)[0] == pytest.approx(0.37, abs=1e-4)
    assert despike(np.array([1.0, 1, 50, 1, 1]), 3).tolist() == [1, 1, 1, 1, 1]


def test_flat_input_gives_no_edges():
    fs = 48000.0
    x = np.zeros(10000)
    lv = levels_of(x + 1e-9)
    fe = HallFrontEnd(fs, lv, threshold=0.1)
    assert len(Edges.concat([fe.process(x, 0), fe.finish()])) == 0
    fe2 = VrFrontEnd(fs, lv, floor=0.01)
    assert len(Edges.concat([fe2.process(x, 0), fe2.finish()])) == 0
