"""Sensor front ends: sub-sample edge times, streaming invariance, no filter delay."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal
from scipy.ndimage import median_filter
from toothcomb.decoders.frontends import hall as hall_mod
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


def run(
    cls, x: np.ndarray, fs: float, block: int | None = None, gather: int | None = None, **opts
) -> Edges:
    """Calibrate on ``x`` and feed it in blocks; ``gather=0`` searches every block as it comes
    (the front end's own gathering of short blocks is off)."""
    lv = levels_of(x)
    cal = cls.calibrate(x, fs, lv)
    cal.update(opts)
    fe = cls(fs, lv, **cal)
    if gather is not None:
        fe.gather = gather
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


@pytest.mark.parametrize("gather", [0, None])
@pytest.mark.parametrize("block", [1000, 4097, 65536])
def test_hall_edges_do_not_depend_on_block_size(hall_case, block, gather):
    fs, _truth, _tau, x = hall_case
    whole = run(HallFrontEnd, x, fs)
    cut = run(HallFrontEnd, x, fs, block=block, gather=gather)
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


@pytest.mark.parametrize("gather", [0, None])
def test_vr_edges_do_not_depend_on_block_size(gather):
    rng = np.random.default_rng(5)
    fs = 48000.0
    centres = 0.002 + np.cumsum(rng.uniform(0.8e-3, 1.2e-3, 300))
    n = int((centres[-1] + 0.002) * fs)
    x = vr_signal(centres, fs, n, 0.15e-3, 0.5) + rng.normal(0, 0.003, n)
    whole = run(VrFrontEnd, x, fs)
    for block in (777, 1000, 16384):
        cut = run(VrFrontEnd, x, fs, block=block, gather=gather)
        np.testing.assert_array_equal(whole.times, cut.times)
        np.testing.assert_array_equal(whole.strength, cut.strength)


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


# --------------------------------------------------------------------------- fast paths


def step_runs_by_hand(x: np.ndarray, W: int, thr: float) -> list[tuple[int, int, int]]:
    """The definition, sample by sample in plain Python: runs of ``|x[i] - x[i - W]| > thr``
    of one direction, as (first index, last index, direction)."""
    runs: list[list[int]] = []
    values = x.tolist()  # Python ints and floats: no wrap-around, IEEE subtraction
    for i in range(W, len(values)):
        d = values[i] - values[i - W]
        if abs(d) > thr:
            sign = 1 if d > 0 else -1
            if runs and runs[-1][1] == i - 1 and runs[-1][2] == sign:
                runs[-1][1] = i
            else:
                runs.append([i, i, sign])
    return [tuple(r) for r in runs]  # type: ignore[misc]


def _steps_list(x: np.ndarray, W: int, thr: float) -> list[tuple[int, int, int]]:
    s, e, sign = hall_mod._steps(x, W, thr)
    return list(zip(s.tolist(), e.tolist(), sign.tolist(), strict=True))


def _cam_like(n: int, flanks: list[int], lo: float, hi: float, rng) -> np.ndarray:
    """A two-level signal switching at ``flanks`` (sample indices), with a little noise."""
    level = np.full(n, lo)
    for k, f in enumerate(flanks):
        level[f:] = hi if k % 2 == 0 else lo
    return level + rng.normal(0, 0.01 * (hi - lo), n)


def test_hall_step_search_skips_only_stretches_without_steps(monkeypatch):
    """The search looks only at stretches whose range (with the stretch before) exceeds the
    threshold; it must find exactly the runs the sample-by-sample definition finds: flanks far
    apart (the stretches between are skipped), on and around stretch boundaries, in the last,
    shorter stretch, dense flanks (every stretch looked at), and none at all."""
    dense_calls = []
    plain_dense = hall_mod._steps_dense
    monkeypatch.setattr(
        hall_mod, "_steps_dense", lambda *a: dense_calls.append(1) or plain_dense(*a)
    )
    rng = np.random.default_rng(12)
    C, W = hall_mod.STRETCH, 5
    n = 40 * C + 777
    cases = {
        "sparse": [3 * C + 100, 9 * C + 50, 20 * C + 1],
        "on boundaries": [4 * C - 2, 6 * C, 8 * C + W - 1, 10 * C - W, 12 * C + 1],
        "in the last stretch": [2 * C, 40 * C + 300],
        "first samples": [1, W + 1, 2 * W + 3],
        "dense": list(range(200, n - 100, 150)),
        "none": [],
    }
    for name, flanks in cases.items():
        x = _cam_like(n, flanks, 0.0, 1.0, rng)
        want = step_runs_by_hand(x, W, 0.5)
        assert len(want) >= len(flanks) - (1 if name == "first samples" else 0), name
        dense_calls.clear()
        assert _steps_list(x, W, 0.5) == want, name
        assert bool(dense_calls) == (name == "dense"), name  # the others skipped stretches
        codes = np.round(x * 20000).astype(np.int16)
        assert _steps_list(codes, W, 10000) == step_runs_by_hand(codes, W, 10000), name


def test_hall_step_search_on_codes_never_wraps_around():
    """Integer codes are subtracted in a type wide enough for their range: a 16-bit swing of
    more than half the scale needs 32 bits, a 32-bit one (24- and 32-bit PCM) 64 bits."""
    rng = np.random.default_rng(13)
    W = 4
    for dtype, top in ((np.int16, 2**15 - 1), (np.int32, 2**31 - 1)):
        flanks = [1000, 5000, 5003, 9000, 30000]
        x = _cam_like(40000, flanks, -0.9, 0.9, rng)
        codes = np.round(np.clip(x, -1, 1) * top).astype(dtype)
        assert int(codes.max()) - int(codes.min()) > top  # the difference overflows the type
        thr = int(0.5 * top)
        want = step_runs_by_hand(codes, W, thr)
        assert len(want) >= 4
        assert _steps_list(codes, W, thr) == want


def test_hall_step_search_with_nan_inf_and_odd_thresholds():
    rng = np.random.default_rng(14)
    W = 3
    x = _cam_like(9000, [2000, 2600, 7000], 0.0, 1.0, rng)
    x[2100] = np.nan  # in a stretch with a flank
    x[5000:5100] = np.nan  # a stretch with nothing else
    x[8000] = np.inf
    for thr in (0.5, 0.0, -1.0, 3.0):
        assert _steps_list(x, W, thr) == step_runs_by_hand(x, W, thr), thr
    assert _steps_list(x[:W], W, 0.5) == []


def test_hall_int32_codes_of_a_wide_swing_give_the_float_edges():
    """A 24- or 32-bit sound card recording a Hall output near full scale: the codes path finds
    the edges the float path finds (a 32-bit difference would wrap around and lose them)."""
    fs = 100_000.0
    t = np.arange(200_000) / fs
    x = np.where(np.sin(2 * np.pi * 50 * t) > 0, 0.8, -0.8)
    codes = np.round(x * 2**31).clip(-(2**31), 2**31 - 1).astype(np.int32)
    values = codes * 2.0**-31
    lv = levels_of(values)
    a = HallFrontEnd(fs, lv)
    floats = Edges.concat([a.process(values, 0), a.finish()])
    b = HallFrontEnd(fs, lv)
    by_codes = Edges.concat([b.process_codes(codes, 0, 2.0**-31), b.finish()])
    # source: 50 Hz square wave over 2 s: two flanks per period, less the one at t = 0
    assert len(floats) == 199
    np.testing.assert_array_equal(by_codes.times, floats.times)
    np.testing.assert_array_equal(by_codes.direction, floats.direction)


@pytest.mark.parametrize("size", [3, 5])
def test_despike_is_scipys_running_median(size):
    """The running median is computed by a network of minima and maxima; it must give what
    scipy.ndimage.median_filter gives, ties and integer codes included."""
    rng = np.random.default_rng(15)
    h = size // 2
    for kind in ("ints", "floats", "ties"):
        for n in (size, size + 1, 50, 1001):
            x = {
                "ints": rng.integers(-3, 4, n).astype(np.int16),
                "floats": rng.normal(size=n),
                "ties": np.round(rng.normal(size=n), 1),
            }[kind]
            # source: scipy documentation, scipy.ndimage.median_filter
            want = median_filter(x, size=size, mode="nearest")
            want[:h], want[n - h :] = x[:h], x[n - h :]
            got = despike(x, size)
            assert got.dtype == x.dtype
            np.testing.assert_array_equal(got, want)
    x = rng.normal(size=100)
    x[40] = np.nan  # no order: scipy's filter is used as it is
    want = median_filter(x, size=size, mode="nearest")
    want[:h], want[100 - h :] = x[:h], x[100 - h :]
    np.testing.assert_array_equal(despike(x, size), want)


def test_has_spikes_looks_at_every_piece(monkeypatch):
    """Spikes are looked for piece by piece (the first found ends the search), next to jumps
    taller than the height or, where jumps are many, over the whole piece: a spike in any
    piece, at a piece's edge or in none, on a quiet signal or among steps, must be found as the
    whole running median finds it."""
    from toothcomb.decoders.frontends import base as base_mod

    monkeypatch.setattr(base_mod, "SPIKE_PIECE", 97)
    rng = np.random.default_rng(18)

    def by_definition(x: np.ndarray, height: float) -> bool:
        # source: scipy documentation, scipy.ndimage.median_filter (running median of five)
        m = median_filter(x, size=5, mode="nearest")
        m[:2], m[len(x) - 2 :] = x[:2], x[len(x) - 2 :]
        return bool(np.any(np.abs(x - m) > height))

    found = 0
    for trial in range(300):
        n = int(rng.integers(5, 1000))
        x = 0.1 * rng.normal(size=n)
        if trial % 3 == 1:
            # steps taller than the height that are not spikes: a square wave, slow (few
            # samples next to a jump) or fast (jumps everywhere in a piece)
            period = int(rng.choice([6, 40]))
            x += 1.5 * ((np.arange(n) // (period // 2)) % 2)
        if trial % 2:
            x[rng.integers(0, n)] += 2.0  # one spike, anywhere (at a piece's edge, too)
        if trial % 7 == 0:
            x[rng.integers(0, n)] = np.nan
        want = by_definition(x, 1.0)
        found += want
        assert base_mod.has_spikes(x, 1.0) == want, trial
    assert 90 < found < 200  # most spikes stand out; a few fall on the first or last samples


def test_hall_integer_comparisons_are_the_float_ones():
    """On codes, the level tests compare integers with integer thresholds; they must say what
    the comparisons of the same values as floats say, at integer and half-integer levels."""
    rng = np.random.default_rng(16)
    x = rng.integers(-50, 50, size=(400, 17)).astype(np.int16)
    level = np.round(rng.uniform(-40, 40, 400) * 2) / 2  # whole and half codes
    sign = np.where(rng.random(400) < 0.5, 1, -1)
    xf = x.astype(float)
    # the definition: (x - level) * sign > 0, counted
    want = np.count_nonzero((xf - level[:, None]) * sign[:, None] > 0, axis=1)
    np.testing.assert_array_equal(hall_mod._beyond(x, level, sign), want)
    np.testing.assert_array_equal(hall_mod._beyond(xf, level, sign), want)
    limit = rng.integers(0, 17, 400)
    k_int, has_int = hall_mod._last_crossing_within(x, limit, level, sign, 3)
    k_f, has_f = hall_mod._last_crossing_within(xf, limit, level, sign, 3)
    np.testing.assert_array_equal(k_int, k_f)
    np.testing.assert_array_equal(has_int, has_f)
    frac = hall_mod._linear_at(x, k_int, level)
    np.testing.assert_array_equal(frac, hall_mod._linear_at(xf, k_f, level))
    starts = rng.integers(0, 390, 50)
    rows = hall_mod._rows(x.ravel(), starts, 25, clip=True)
    at = np.minimum(starts[:, None] + np.arange(25), x.size - 1)
    np.testing.assert_array_equal(rows, x.ravel()[at])
    np.testing.assert_array_equal(hall_mod._rows(x.ravel(), starts, 9), x.ravel()[at[:, :9]])


def test_hall_persistence_check_counts_when_a_stretch_is_not_clean():
    """A flank's new level must hold (80 % of the samples beyond the midpoint) over the stretch
    after it, the old one over the stretch before; clean stretches are passed on their lowest
    and highest sample, the others counted. Both give what counting every one gives."""
    rng = np.random.default_rng(17)
    P = 20
    fe = HallFrontEnd(1e5, levels_of(np.r_[0.0, 1.0]), persist=P)
    buf = (rng.random(5000) < 0.93).astype(np.int16) * 100  # mostly high, some low samples
    after = rng.integers(P + 10, 4900, 300)
    before = after - P - 10
    mid = rng.uniform(20, 80, 300)
    sign = np.where(rng.random(300) < 0.5, 1, -1)
    buf[before[sign > 0, None] + np.arange(P)] = 0  # rising flanks come from low
    buf[after[sign < 0, None] + np.arange(P)] = 0  # falling ones go to low
    rows_a = buf[after[:, None] + np.arange(P)].astype(float)
    rows_b = buf[before[:, None] + np.arange(P)].astype(float)
    n_a = np.count_nonzero((rows_a - mid[:, None]) * sign[:, None] > 0, axis=1)
    n_b = np.count_nonzero((rows_b - mid[:, None]) * -sign[:, None] > 0, axis=1)
    want = (n_a / P >= 0.8) & (n_b / P >= 0.8)
    got = fe._held(buf, after, before, mid, sign)
    assert 0 < np.count_nonzero(want) < len(want)  # some hold, some do not
    assert np.count_nonzero(n_a < P) > 10  # and many are not clean, yet hold or not as counted
    np.testing.assert_array_equal(got, want)


def test_hall_bin_moves_are_the_definition():
    """Where codes change bin (bins of the largest power of two not above the threshold, not
    above the codes' range) from the sample W before: every such index, in order, as a
    sample-by-sample comparison finds them; none below one code of threshold."""
    rng = np.random.default_rng(23)
    W = 5
    for dtype, lo, hi in ((np.int16, -20000, 21000), (np.uint8, 10, 240)):
        x = _cam_like(6000, list(range(37, 6000, 61)), lo, hi, rng)
        codes = np.round(x).clip(np.iinfo(dtype).min, np.iinfo(dtype).max).astype(dtype)
        for thr in (0.4 * (hi - lo), 0.2 * (hi - lo), 1e9):
            m = hall_mod._bin_moves(codes, W, thr)
            assert m is not None
            assert 2**m.shift <= min(thr, 2 ** (8 * codes.itemsize - 1))
            # source: Python's >> on int is floor division by 2**shift (The Python Language
            # Reference, "Shifting operations"), the bin definition computed apart from numpy
            bins = [int(v) >> m.shift for v in codes]
            want = [i for i in range(W, len(codes)) if bins[i] != bins[i - W]]
            assert m.at.tolist() == want
    assert hall_mod._bin_moves(np.array([0, 1, 0, 1, 0], np.int16), 1, 0.5) is None


def test_hall_persistence_check_by_bins_is_the_count():
    """With the bin moves of integer codes at hand, the persistence check passes clean
    stretches without reading them: it must give what counting every sample gives, on a
    two-level signal with noise, spikes in some stretches, levels sitting on a bin edge (many
    moves: the check falls back to the reductions) and thresholds of several bins."""
    rng = np.random.default_rng(29)
    W, w, P = 5, 3, 40
    n = 40_000
    # the high level of the second sits two noise sigmas above an edge of the bins (8192); the
    # last has spikes in most stretches
    cases = ((-9000, 9000, 30), (-9000, 8272, 0), (300, 3300, 20), (300, 3300, 400))
    for low, high, spikes in cases:
        flanks = np.arange(300, n - 300, 150)
        level = np.full(n, low, dtype=float)
        for k, f in enumerate(flanks):
            level[f:] = high if k % 2 == 0 else low
        x = level + rng.normal(0, 40, n)
        # spikes and their tails: runs of 1 to 16 samples thrown across the midpoint
        for at, length, way in zip(
            rng.integers(0, n - 16, spikes), rng.integers(1, 17, spikes),
            rng.choice([-1, 1], spikes), strict=True,
        ):
            x[at : at + length] += way * 0.8 * (high - low)
        # runt pulses: every 15th flank falls back to the old level just before its stretch
        # after, and stays there past the stretch (no bin moves inside it, but the wrong level)
        for k in range(3, len(flanks), 15):
            f = flanks[k]
            x[f + 4 : f + 60] = (low if k % 2 == 0 else high) + rng.normal(0, 40, 56)
        codes = np.round(x).clip(-32768, 32767).astype(np.int16)
        fe = HallFrontEnd(1e5, levels_of(np.r_[0.0, 1.0]), window=W, plateau=w, persist=P)
        sign = np.where(np.arange(len(flanks)) % 2 == 0, 1, -1)
        after = flanks + 2 + w
        before = flanks - W - w - P
        mid = 0.5 * (low + high) + rng.uniform(-50, 50, len(flanks))
        rows_a = codes[after[:, None] + np.arange(P)].astype(float)
        rows_b = codes[before[:, None] + np.arange(P)].astype(float)
        n_a = np.count_nonzero((rows_a - mid[:, None]) * sign[:, None] > 0, axis=1)
        n_b = np.count_nonzero((rows_b - mid[:, None]) * -sign[:, None] > 0, axis=1)
        want = (n_a / P >= 0.8) & (n_b / P >= 0.8)
        for thr in (0.4 * (high - low), 0.25 * (high - low)):
            moves = hall_mod._bin_moves(codes, W, thr)
            assert moves is not None
            got = fe._held(codes, after, before, mid, sign, moves)
            np.testing.assert_array_equal(got, want)
            np.testing.assert_array_equal(fe._held(codes, after, before, mid, sign), want)
        assert np.all(~want[3::15])  # the runts do not hold
        if spikes == 30:
            assert np.count_nonzero(~want) > len(want[3::15])  # and some spikes break one
        by_bins = fe._held_by_bins(
            codes, np.where(sign > 0, after, before), np.where(sign > 0, before, after), mid,
            hall_mod._bin_moves(codes, W, 0.4 * (high - low)),
        )
        if high == 8272 or spikes == 400:
            # few samples move, but most stretches hold a move: the reductions take over
            assert by_bins is None
        else:
            assert by_bins is not None and np.count_nonzero(by_bins) > 0.75 * len(flanks)
            assert np.all(want[by_bins])  # what the bins pass holds, counted


def test_hall_binned_step_search_is_the_definition():
    """Dense steps on integer codes are searched by bins of a power of two no larger than the
    threshold (two codes further apart than the threshold lie in different bins), subtracting
    only the samples whose bin moved. It must find what the sample-by-sample definition finds:
    16-bit codes swinging more than half the scale (their difference needs 32 bits), 8-bit
    unsigned and 32-bit codes; thresholds of a fraction of the swing, a power of two, a
    half-code, one code and more than the type can hold."""
    rng = np.random.default_rng(19)
    W = 5
    for dtype, lo, hi in ((np.int16, -20000, 21000), (np.uint8, 10, 240), (np.int32, -2e9, 2e9)):
        info = np.iinfo(dtype)
        x = _cam_like(12_000, list(range(37, 12_000, 61)), lo, hi, rng)
        codes = np.round(x).clip(info.min, info.max).astype(dtype)
        swing = hi - lo
        for thr in (0.4 * swing, 2.0 ** math.floor(math.log2(0.4 * swing)), 0.4 * swing + 0.5,
                    1, 2.0 * (info.max - float(info.min))):
            want = step_runs_by_hand(codes, W, thr)
            got = hall_mod._steps_binned(codes, W, thr)
            if thr == 1:
                # noise moves nearly every sample to another bin of one code: left to the dense
                # search, which must find the same
                assert got is None
            else:
                assert got is not None, (dtype, thr)
                assert list(zip(*(a.tolist() for a in got), strict=True)) == want, (dtype, thr)
                assert len(want) >= (190 if thr < swing else 0)
            assert _steps_list_dense(codes, W, thr) == want, (dtype, thr)
    # below one code every difference may count: no bins
    assert hall_mod._steps_binned(np.array([0, 1, 0, 1], np.int16), 1, 0.5) is None


def _steps_list_dense(x: np.ndarray, W: int, thr: float) -> list[tuple[int, int, int]]:
    s, e, sign = hall_mod._steps(x, W, thr, binned=False)
    return list(zip(s.tolist(), e.tolist(), sign.tolist(), strict=True))


def test_hall_binned_search_gives_up_when_a_level_sits_on_a_bin_edge():
    """A level right at a multiple of the bin puts most samples in a moving bin: the binned
    search hands over to the dense one, and the runs are still those of the definition."""
    rng = np.random.default_rng(20)
    n, W, thr = 20_000, 4, 9000
    codes = (8192 + rng.integers(-3, 4, n)).astype(np.int16)  # bin of 8192 codes: 8192 is an edge
    codes[5000:5400] = 30000
    assert hall_mod._steps_binned(codes, W, thr) is None
    want = step_runs_by_hand(codes, W, thr)
    assert [r[2] for r in want] == [1, -1]  # source: one pulse, a step up then down
    assert _steps_list_dense(codes, W, thr) == want


def last_crossing_by_hand(
    x: np.ndarray, limit: np.ndarray, level: np.ndarray, sign: np.ndarray, W: int
) -> tuple[list[int], list[bool]]:
    """The definition, row by row in plain Python: the last column j with sample j short of the
    level and sample j + 1 at or beyond it (in the row's direction), j + 1 <= limit; W - 1 and
    False without one."""
    ks, has = [], []
    for row, lim, lv, sg in zip(x.tolist(), limit.tolist(), level.tolist(), sign.tolist(),
                                strict=True):
        beyond = [(v - lv) * sg >= 0 for v in row]
        js = [j for j in range(len(row) - 1) if not beyond[j] and beyond[j + 1] and j + 1 <= lim]
        ks.append(js[-1] if js else W - 1)
        has.append(bool(js))
    return ks, has


@pytest.mark.parametrize("span", [2, 3, 8, 12, 17, 40, 41, 47, 48, 49, 70, 88, 89, 170, 300])
def test_hall_crossing_found_on_bits_is_the_definition(span):
    """Stretches are searched as numbers, a bit per sample beyond the midpoint, 48 samples to
    a number (longer ones in overlapping pieces). The search must give the last crossing the
    definition gives, for integer codes and floats, rising and falling, at whole and half-code
    levels."""
    rng = np.random.default_rng(21 + span)
    n = 400
    x = rng.integers(-6, 7, size=(n, span)).astype(np.int16)
    level = np.round(rng.uniform(-4, 4, n) * 2) / 2
    sign = np.where(rng.random(n) < 0.5, 1, -1)
    limit = rng.integers(0, span + 3, n)  # some reach past the last column
    want_k, want_has = last_crossing_by_hand(x, limit, level, sign, 3)
    assert 0 < sum(want_has) < n
    for stretch in (x, x.astype(float)):
        k, has = hall_mod._last_crossing_within(stretch, limit, level, sign, 3)
        assert k.tolist() == want_k
        assert has.tolist() == want_has


def test_hall_plateau_levels_are_numpys_median_and_mean():
    """A flank's levels: the median of the first three samples of its window (w >= 3) or the
    mean of its w samples, as float64; gathered sample by sample, they must be numpy's median
    and mean of the rows."""
    rng = np.random.default_rng(22)
    x = rng.integers(-1000, 1000, 5000).astype(np.int16)
    first = rng.integers(0, 4990, 300)
    for data in (x, x * 0.25):
        for w in (1, 2, 3, 5):
            rows = data[first[:, None] + np.arange(w)].astype(float)
            # source: numpy documentation (numpy.median, numpy.mean)
            want = np.median(rows[:, :3], axis=1) if w >= 3 else rows.mean(axis=1)
            got = hall_mod._plateau_level(data, first, w)
            assert got.dtype == np.float64
            np.testing.assert_array_equal(got, want)


def test_vr_peaks_of_stretches_by_side_are_the_two_reductions():
    """The VR front end's half-wave peaks on signed codes come from one reduction over the
    samples with those below the offset bit-flipped: they must be what the highest and lowest
    sample of each stretch give, also for a first and a last stretch that hold crossings of
    their own (not looked at yet)."""
    rng = np.random.default_rng(47)
    fe = VrFrontEnd.__new__(VrFrontEnd)
    for dtype in (np.int16, np.int32):
        for _ in range(200):
            n = int(rng.integers(50, 400))
            x = rng.integers(-3000, 3000, n).astype(dtype)
            fe._off = float(rng.uniform(-500, 500))
            fe._unit = 2.0**-15
            side = x > math.floor(fe._off)
            cross = np.flatnonzero(side[:-1] != side[1:]) + 1
            if len(cross) < 6:
                continue
            # stretches from one crossing to the next, but the first and last hold some of
            # their own
            i0 = int(rng.integers(1, 3))
            i1 = len(cross) - int(rng.integers(1, 3))
            at = np.concatenate(([0], cross[i0:i1]))
            got = fe._peaks_by_side(x, side, at)
            ends = np.append(at[1:], n)
            # the definition, stretch by stretch, in Python integers and floats
            # source: Python's built-in max() and min() on ints (The Python Language Reference,
            # "Value comparisons"), computed apart from numpy's reductions
            want = [
                max(int(x[i:j].max()) - fe._off, fe._off - int(x[i:j].min()), 0.0) * fe._unit
                for i, j in zip(at, ends, strict=True)
            ]
            np.testing.assert_array_equal(got, want)
