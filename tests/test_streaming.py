"""The fast streaming paths give what the plain ones give: integer audio reads, levels from
spread windows, NaN caught block by block, runs of VR half-waves closed at once, whole wheel
revolutions taken at once, the thinned speed trace, edges handed over in batches, and the
progress bar that shows for long decodes only."""

from __future__ import annotations

import io
import itertools
import math
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from conftest import cam_errors, decode_json, make_capture
from rich.console import Console
from scipy import signal
from toothcomb.cli.progress import SHOW_AFTER_S, StageProgress, progress_for
from toothcomb.decoders import levels as levels_mod
from toothcomb.decoders import pipeline
from toothcomb.decoders.errors import CaptureError, SignalError
from toothcomb.decoders.frontends import hall as hall_mod
from toothcomb.decoders.frontends import vr as vr_mod
from toothcomb.decoders.levels import (
    FiniteWatch,
    estimate_levels,
    measure_levels,
    window_starts,
)
from toothcomb.decoders.model import Block, CaptureInfo, ChannelLevels, Edges
from toothcomb.decoders.options import DecodeOptions
from toothcomb.decoders.pipeline import CrankStats, decode_capture
from toothcomb.decoders.readers import open_capture
from toothcomb.decoders.readers.write import write_capture
from toothcomb.decoders.simulate import preset, simulate
from toothcomb.decoders.wheels.base import ToothTrack
from toothcomb.decoders.wheels.missing_tooth import MissingToothSpec, ToothTracker, decode_teeth

RNG = np.random.default_rng(1618)



# --------------------------------------------------------------------------- audio reader


@pytest.mark.parametrize(
    "fmt,subtype",
    [
        ("wav", "PCM_U8"),
        ("wav", "PCM_16"),
        ("wav", "PCM_24"),
        ("wav", "PCM_32"),
        ("wav", "FLOAT"),
        ("flac", "PCM_S8"),
        ("flac", "PCM_16"),
        ("flac", "PCM_24"),
    ],
)
def test_audio_blocks_are_the_values_soundfile_gives(tmp_path: Path, fmt: str, subtype: str):
    """Integer PCM is read as integers and scaled by toothcomb: the values must be libsndfile's
    own float conversion, to the last bit."""
    x = np.clip(RNG.normal(size=(20_011, 3)) * 0.4, -1.0, 1.0)
    path = tmp_path / f"t.{fmt}"
    sf.write(path, x, 48000, subtype=subtype)
    # source: python-soundfile / libsndfile, read(dtype="float64") is the reference conversion
    want = sf.read(path, dtype="float64", always_2d=True)[0]
    with open_capture(str(path)) as src:
        got = np.concatenate([b.data for b in src.blocks(4099)])
        windows = list(src.read_windows([0, 777, len(want) - 100], 256))
    assert got.dtype == np.float64
    assert np.array_equal(got, want)
    assert np.array_equal(windows[1], want[777:1033])
    assert np.array_equal(windows[2], want[-100:])  # cut short at the end of the file


def test_hdf5_windows_are_the_stored_samples(tmp_path: Path):
    x = RNG.normal(size=(5000, 2))
    path = tmp_path / "t.h5"
    write_capture(path, x, 1000.0, ["a", "b"])
    with open_capture(str(path)) as src:
        w = list(src.read_windows([10, 4990], 64))
    assert np.array_equal(w[0], x[10:74]) and np.array_equal(w[1], x[4990:])


# --------------------------------------------------------------------------- levels


class WindowSource:
    """A capture held in memory that can be read block by block and at any position."""

    def __init__(self, data: np.ndarray, subtype: str = "float64") -> None:
        self.data = np.asarray(data, dtype=np.float64)
        names = tuple(f"ch{i}" for i in range(self.data.shape[1]))
        self.info = CaptureInfo("memory", 10_000.0, self.data.shape[0], names, "hdf5", subtype)
        self.windows_read = 0

    def blocks(self, block_size: int = 65536) -> Iterator[Block]:
        for start in range(0, self.data.shape[0], block_size):
            yield Block(start, self.data[start : start + block_size])

    def read_windows(self, starts, length: int) -> Iterator[np.ndarray]:
        for s in starts:
            self.windows_read += 1
            yield self.data[s : s + length]


def test_short_captures_get_the_exact_levels():
    x = RNG.normal(size=(50_000, 2))
    src = WindowSource(x)
    assert estimate_levels(src, 3000) == measure_levels(src, 3000)
    assert src.windows_read == 0


def test_window_levels_are_the_figures_of_the_windows():
    n = 600_000
    t = np.arange(n)
    x = np.stack([np.sin(t / 37.0) + 0.01 * RNG.normal(size=n), 2.0 + RNG.normal(size=n)], axis=1)
    src = WindowSource(x)
    got = estimate_levels(src, 4096, sparse_above=100_000)
    starts = window_starts(n)
    assert len(starts) == levels_mod.WINDOWS and starts[0] == 0
    assert starts[-1] == n - levels_mod.WINDOW
    w = np.concatenate([x[s : s + levels_mod.WINDOW] for s in starts])
    for j, lv in enumerate(got):
        v = w[:, j]
        # source: numpy documentation (numpy.percentile, numpy.mean, numpy.std with ddof=0)
        assert lv.n == lv.subsample == v.size
        assert lv.minimum == v.min() and lv.maximum == v.max()
        assert lv.mean == pytest.approx(v.mean(), rel=1e-12, abs=1e-12)
        assert lv.std == pytest.approx(v.std(), rel=1e-12)
        assert lv.percentiles == tuple(float(p) for p in np.percentile(v, ChannelLevels.POINTS))
        # and they describe the whole channel: the windows are spread over all of it
        assert lv.percentile(50) == pytest.approx(np.median(x[:, j]), abs=0.02)
        assert lv.std == pytest.approx(np.std(x[:, j]), rel=0.02)
    # white noise of sigma 1: the difference estimate reads 1
    # source: median absolute deviation of a normal variable is 0.6745 sigma
    assert got[1].noise == pytest.approx(1.0, rel=0.03)
    # nothing depends on the block size
    assert estimate_levels(src, 999, sparse_above=100_000) == got


@pytest.mark.parametrize("bits", [8, 16])
def test_window_levels_of_pcm_codes_are_numpys_figures_to_the_bit(bits):
    """8- and 16-bit samples (every value a code times 2**-15) are counted, not sorted: the
    figures are still numpy's to the last bit, flat tops, odd counts and one value included."""
    n = 600_000
    step = 2.0 ** (1 - bits)
    top = 2 ** (bits - 1)
    t = np.arange(n)
    hall = np.where(np.sin(t / 53.0) > 0, top - 1, -top // 3) + RNG.integers(-2, 3, n)
    wave = np.round(0.7 * top * np.sin(t / 91.0)) + RNG.integers(-top // 4, top // 4 + 1, n)
    flat = np.full(n, 7.0)
    clipped = np.clip(np.round(1.5 * top * np.sin(t / 17.0)), -top, top - 1)
    x = np.stack([hall, wave, flat, clipped], axis=1).astype(np.float64) * step
    src = WindowSource(x, subtype=f"PCM_{bits}" if bits == 16 else "PCM_S8")
    got = estimate_levels(src, 4096, sparse_above=100_000)
    w = np.concatenate([x[s : s + levels_mod.WINDOW] for s in window_starts(n)])
    n_windowed = len(w)
    assert all(levels_mod._coded(w[:, j]) is not None for j in range(4))  # counted, not sorted
    for j, lv in enumerate(got):
        v = w[:, j]
        # source: numpy.percentile (linear method), numpy.median, numpy.mean on the same samples
        assert lv.percentiles == tuple(float(p) for p in np.percentile(v, ChannelLevels.POINTS))
        assert lv.minimum == v.min() and lv.maximum == v.max()
        assert lv.mean == float(v.mean())
        d = np.abs(np.diff(v.reshape(levels_mod.WINDOWS, -1), axis=1))
        assert lv.noise == float(np.median(d)) / levels_mod.NOISE_DIVISOR
    # source: numpy.count_nonzero of the samples at the clipped ends
    ends = np.count_nonzero(w[:, 3] == w[:, 3].min()) + np.count_nonzero(w[:, 3] == w[:, 3].max())
    assert got[3].clipped_fraction == ends / n_windowed > 0.1
    assert got[2].std == 0.0 and got[2].minimum == got[2].maximum == 7 * step


def test_float_samples_are_sorted_even_on_the_code_grid():
    """A float capture may hold -0.0, which counting codes would turn into +0.0: its windows
    are sorted, and the figures keep numpy's signs."""
    n = 600_000
    x = np.where(np.arange(n) % 7 < 4, -0.0, 0.25)[:, None]
    (lv,) = estimate_levels(WindowSource(x), 4096, sparse_above=100_000)
    w = np.concatenate([x[s : s + levels_mod.WINDOW] for s in window_starts(n)])[:, 0]
    # source: numpy.percentile and numpy.min of the same samples, signs included
    expected = np.percentile(w, ChannelLevels.POINTS)
    assert [math.copysign(1, p) for p in lv.percentiles] == np.copysign(1, expected).tolist()
    assert math.copysign(1, lv.minimum) == math.copysign(1, float(w.min())) == -1.0


def test_counted_percentiles_and_medians_are_numpys():
    # source: numpy.percentile (linear method) and numpy.median, on samples drawn at random
    for trial in range(360):
        if trial < 300:  # few samples, few codes: ties and empty codes everywhere
            n = int(RNG.integers(1, 2_000))
            codes = RNG.integers(-300, 300, n) * int(RNG.integers(1, 4))
        else:  # the whole 16-bit range and many samples: the interpolation's rounding shows
            n = int(RNG.integers(100_000, 300_000))
            codes = RNG.integers(-32768, 32768, n)
        v = codes * levels_mod.CODE
        low = int(codes.min())
        counts = np.bincount(codes - low)
        points = (*sorted(RNG.uniform(0, 100, 5)), 0.0, 0.1, 50.0, 99.9, 100.0)
        got = levels_mod.coded_percentiles(counts, low, points)
        assert got == np.percentile(v, points).tolist(), trial
        d = np.abs(codes)
        assert levels_mod.coded_median(np.bincount(d)) == float(np.median(d * levels_mod.CODE))


def test_samples_off_the_code_grid_are_sorted_as_before():
    assert levels_mod._coded(np.array([0.5, 0.25 + 2.0**-16])) is None  # between two codes
    assert levels_mod._coded(np.array([-1.0, 1.0])) is not None  # 65,537 codes, the most counted
    assert levels_mod._coded(np.array([-1.0, 1.0 + 2.0**-15])) is None  # one too many
    assert levels_mod._coded(np.array([1e6, 1e6 + 1.0])) is None  # beyond 32-bit codes
    assert levels_mod._coded(np.array([3.0, 3.0]))[1] == 3 * 2**15


def test_a_nan_in_a_window_gives_the_exact_count():
    x = RNG.normal(size=(300_000, 1))
    x[[0, 5, 123_456], 0] = np.nan  # sample 0 lies in the first window
    (lv,) = estimate_levels(WindowSource(x), 4096, sparse_above=100_000)
    assert lv.non_finite == 3 and lv.first_non_finite == 0


def test_a_source_that_cannot_seek_is_measured_in_full():
    class Plain(WindowSource):
        read_windows = None  # type: ignore[assignment]

    x = RNG.normal(size=(300_000, 1))
    assert estimate_levels(Plain(x), 4096, sparse_above=100_000) == measure_levels(Plain(x))


def test_finite_watch_names_the_first_bad_sample():
    x = RNG.normal(size=(40_000, 2))
    x[31_000, 1] = np.inf
    x[35_000, 1] = np.nan
    src = WindowSource(x)
    watch = FiniteWatch(src, 4096)
    with pytest.raises(SignalError, match=r"'ch1' has 2 NaN or infinite samples \(first at sample "
                       r"31000, t = 3.1 s\)"):
        for b in src.blocks(4096):
            watch.check(b.data)
    # finite values whose sum overflows are not bad samples
    watch.check(np.array([[1e308, 0.0], [1e308, 0.0]]))
    # integer formats hold no NaN: not looked at
    assert not FiniteWatch(WindowSource(x, subtype="PCM_16"), 4096).active


def test_window_levels_decode_the_same_whatever_the_blocks(tmp_path, monkeypatch):
    """Long captures take their levels from windows: still no dependence on the block size, and
    the same angles as with the exact levels."""
    path, truth = make_capture(tmp_path, preset("cranking-60-2-vr", duration_s=2.0), "h5")
    exact = decode_capture(str(path))
    monkeypatch.setattr(levels_mod, "SPARSE_ABOVE", 10_000)
    answers = {decode_json(path, block_size=b) for b in (1000, 4099, 65536)}
    assert len(answers) == 1
    sparse = decode_capture(str(path))
    assert len(sparse.crank.reference_times_s) == len(exact.crank.reference_times_s)
    assert max(cam_errors(sparse, truth).values()) < 0.3  # as test_decode asks of cranking


def test_a_nan_between_the_windows_stops_the_decode(tmp_path, monkeypatch):
    sim = simulate(preset("cranking-60-2-vr", duration_s=4.0))
    data = sim.samples.copy()
    covered = np.zeros(len(data), dtype=bool)
    for s in window_starts(len(data)):
        covered[s : s + levels_mod.WINDOW] = True
    bad = int(np.flatnonzero(~covered)[len(data) // 10])  # in no window
    data[bad, 1] = np.nan
    path = tmp_path / "nan.h5"
    write_capture(path, data, sim.sample_rate, sim.channels)
    monkeypatch.setattr(levels_mod, "SPARSE_ABOVE", 10_000)
    with open_capture(str(path)) as src:
        assert estimate_levels(src)[1].n < len(data)  # the windows saw no NaN
    want = rf"has 1 NaN or infinite samples \(first at sample {bad},"
    with pytest.raises(SignalError, match=want):
        decode_capture(str(path))


# --------------------------------------------------------------------------- front ends


def _vr_signal(n: int = 400_000) -> np.ndarray:
    t = np.arange(n) / 100_000.0
    rate = 300.0 * (1 + 0.3 * np.sin(2 * np.pi * 2 * t))  # teeth per second, swinging
    phase = 2 * np.pi * np.cumsum(rate) / 100_000.0
    amp = rate / 300.0
    gap = (np.floor(phase / (2 * np.pi)) % 36) == 35  # a missing tooth: flat, noisy
    x = np.where(gap, 0.0, amp * np.sin(phase)) + 0.003 * RNG.normal(size=n)
    x[RNG.integers(0, n, 40)] += 1.5  # spikes
    return x


def _assert_same_edges(a: Edges, b: Edges) -> None:
    assert np.array_equal(a.times, b.times)
    assert np.array_equal(a.direction, b.direction)
    assert np.array_equal(a.strength, b.strength)


def _edges_of(fe, x: np.ndarray, block: int) -> Edges:
    parts = [fe.process(x[i : i + block], i) for i in range(0, len(x), block)]
    return Edges.concat([*parts, fe.finish()])


def test_vr_runs_of_half_waves_close_as_one_by_one(monkeypatch):
    """The vectorised closing of ordinary half-waves must give, to the last bit, what closing
    each one in turn gives (the definition)."""
    x = _vr_signal()
    lv = ChannelLevels("ch0", len(x), -2, 2, 0, 0.7, (-1.2, -1, -0.9, -0.5, 0, 0.5, 0.9, 1, 1.2),
                       0.003, 0.0)
    fast = _edges_of(vr_mod.VrFrontEnd(100_000.0, lv), x, 8191)
    monkeypatch.setattr(vr_mod.VrFrontEnd, "_close_run", lambda self, *a: 0)
    slow = _edges_of(vr_mod.VrFrontEnd(100_000.0, lv), x, 8191)
    assert len(fast) > 1000
    _assert_same_edges(fast, slow)


def test_vr_tooth_after_a_quiet_gap_costs_no_string_of_single_closes(monkeypatch):
    """Without noise, the envelope decays through the gap's tiny half-waves and the tooth after
    the gap outgrows it: an odd half-wave once per revolution. Closing it on its own must not
    make the half-waves after it be closed one by one as well (the runs are tried again at
    once), and the edges must be those of closing every half-wave in turn."""
    n = 400_000
    t = np.arange(n) / 100_000.0
    rate = 300.0 * (1 + 0.3 * np.sin(2 * np.pi * 2 * t))
    phase = 2 * np.pi * np.cumsum(rate) / 100_000.0
    gap = (np.floor(phase / (2 * np.pi)) % 36) == 35
    x = np.where(gap, 0.004 * np.sin(5 * phase), rate / 300.0 * np.sin(phase))
    revolutions = int(phase[-1] / (2 * np.pi) // 36)
    lv = ChannelLevels("ch0", n, -2, 2, 0, 0.7, (-1.2, -1, -0.9, -0.5, 0, 0.5, 0.9, 1, 1.2),
                       0.0, 0.0)
    singles = 0
    plain_close = vr_mod.VrFrontEnd._close

    def counting(self, *a):
        nonlocal singles
        singles += 1
        return plain_close(self, *a)

    monkeypatch.setattr(vr_mod.VrFrontEnd, "_close", counting)
    fast = _edges_of(vr_mod.VrFrontEnd(100_000.0, lv), x, 8191)
    assert revolutions >= 30 and singles <= 3 * revolutions  # was 17 a revolution
    monkeypatch.setattr(vr_mod.VrFrontEnd, "_close_run", lambda self, *a: 0)
    slow = _edges_of(vr_mod.VrFrontEnd(100_000.0, lv), x, 8191)
    assert len(fast) > 2000
    _assert_same_edges(fast, slow)


def test_vr_recursions_step_by_step_and_at_once_agree():
    x = RNG.random(500)
    for rec in (vr_mod._ENVELOPE, vr_mod._SLOW, vr_mod._WIDTH):
        y = 0.7
        one = []
        for v in x:
            y = vr_mod._follow(rec, y, float(v))
            one.append(y)
        assert np.array_equal(vr_mod._run(rec, 0.7, x), np.array(one))
    # the envelope recursion is the mean of the old value and the new one, exactly
    assert vr_mod._follow(vr_mod._ENVELOPE, 0.3, 0.9) == 0.5 * (0.3 + 0.9)


@pytest.mark.parametrize("decay", [0.8, 0.5, 1.0, 0.0, 1.25])
def test_vr_envelope_through_runs_of_quiet_half_waves_is_step_by_step(decay: float):
    """The envelope over a mix of significant and insignificant half-waves, runs of the latter
    taken at once (a running product held at the floor), is :meth:`VrFrontEnd._close`'s steps
    one after the other, to the last bit; a decay above 1 is taken step by step."""
    for trial in range(300):
        n = int(RNG.integers(1, 400))
        if trial % 2:
            # long runs of each kind, as in and between the gaps of a wheel
            quiet = np.repeat(RNG.random(n // 25 + 1) < 0.5, 25)[:n]
        else:
            quiet = RNG.random(n) < RNG.random()
        peak = RNG.random(n) * 10.0 ** float(RNG.integers(-3, 2))
        e0 = float(RNG.random() * 10.0 ** float(RNG.integers(-4, 2)))
        floor = float(RNG.choice([0.0, 1e-3, 0.05, 0.2]))
        e, want = e0, []
        for p, q in zip(peak.tolist(), quiet.tolist(), strict=True):
            e = max(e * decay, floor) if q else vr_mod._follow(vr_mod._ENVELOPE, e, p)
            want.append(e)
        got = vr_mod._envelope_through(e0, peak, quiet, decay, floor)
        assert got.tolist() == want
    assert vr_mod._envelope_through(1.0, np.empty(0), np.empty(0, bool), decay, 0.1).size == 0


def test_hall_step_runs_are_the_runs_of_each_direction():
    d = RNG.normal(size=20_000)
    s, e, sign = hall_mod._step_runs(d, 1.2)

    def runs(mask: np.ndarray) -> list[tuple[int, int]]:
        m = np.concatenate(([False], mask, [False])).astype(np.int8)
        return list(zip(np.flatnonzero(np.diff(m) == 1), np.flatnonzero(np.diff(m) == -1) - 1,
                        strict=True))

    want = sorted([(a, b, 1) for a, b in runs(d > 1.2)] + [(a, b, -1) for a, b in runs(-d > 1.2)])
    assert list(zip(s.tolist(), e.tolist(), sign.tolist(), strict=True)) == want


def test_hall_median_of_three_is_numpys():
    x = RNG.normal(size=(1000, 3))
    x[::7, 1] = x[::7, 0]  # ties
    # source: numpy documentation, numpy.median
    assert np.array_equal(hall_mod._median3(x), np.median(x, axis=1))


def test_hall_ordered_edges_fast_and_slow_agree():
    pos = np.cumsum(RNG.uniform(0.5, 30.0, 300))
    sign = np.where(np.arange(300) % 2 == 0, 1, -1).astype(np.int8)
    step = np.ones(300)
    fast = hall_mod._ordered_edges((pos[0] - 40.0, -1), pos, sign, step, 5.0)
    # a flank found twice forces the flank-by-flank loop
    dup = np.insert(pos, 11, pos[10] + 1.0)
    dsign = np.insert(sign, 11, sign[10])
    slow = hall_mod._ordered_edges((pos[0] - 40.0, -1), dup, dsign, np.ones(301), 5.0)
    assert np.array_equal(fast[0], pos) and fast[3] == (float(pos[-1]), int(sign[-1]))
    assert np.array_equal(slow[0], pos) and np.array_equal(slow[1], sign)


@pytest.mark.parametrize("gather", [0, None])
@pytest.mark.parametrize("kind", ["hall", "vr"])
@pytest.mark.parametrize("despike", [1, 5])
def test_front_ends_find_the_same_edges_on_codes_as_on_floats(
    kind: str, despike: int, gather: int | None
):
    """Integer codes with the code's value (a power of two) give the edges the float samples
    give, to the last bit: every threshold is scaled instead of every sample. ``gather=0``
    searches every block as it comes (block boundaries everywhere)."""
    x = _vr_signal(200_000)
    if kind == "hall":
        x = np.where(np.sin(np.cumsum(np.full(len(x), 0.013))) > 0, 0.8, -0.6) + 0.01 * x
        x[RNG.integers(0, len(x), 40)] += 0.9  # spikes
    codes = np.round(np.clip(x / 2.0, -1, 1 - 2**-15) * 2**15).astype(np.int16)
    values = codes * 2.0**-15  # what a 16-bit file's samples are, exactly
    lv = ChannelLevels("ch0", len(x), -1, 1, 0, 0.4, (-0.5, -0.4, -0.35, -0.3, 0, 0.4, 0.45, 0.5,
                                                     0.55), 0.003, 0.0)
    cls = hall_mod.HallFrontEnd if kind == "hall" else vr_mod.VrFrontEnd
    opts = {"despike": despike} | ({"persist": 40} if kind == "hall" else {})
    fa = cls(100_000.0, lv, **opts)
    fe = cls(100_000.0, lv, **opts)
    if gather is not None:
        fa.gather = fe.gather = gather
    a = _edges_of(fa, values, 7001)
    parts = [fe.process_codes(codes[i : i + 7001], i, 2.0**-15) for i in range(0, len(x), 7001)]
    b = Edges.concat([*parts, fe.finish()])
    assert len(a) > 100
    assert np.array_equal(a.times, b.times)
    assert np.array_equal(a.direction, b.direction)
    assert np.array_equal(a.strength, b.strength)


def _hall_signal(n: int) -> np.ndarray:
    """A Hall channel with flanks of a crank (close together) in its first half and of a cam
    (far apart: most stretches hold no flank) in its second, noise and spikes."""
    x = np.where(np.sin(np.cumsum(np.full(n, 0.013))) > 0, 0.8, -0.6)
    slow = np.where(np.sin(np.arange(n) * 2 * np.pi / 70_000) > 0, 0.7, 0.0)
    x = x * (np.arange(n) < n // 2) + slow * (np.arange(n) >= n // 2) + 0.01 * RNG.normal(size=n)
    x[RNG.integers(0, n, 40)] += 0.9
    return x


@pytest.mark.parametrize("kind", ["hall", "vr"])
@pytest.mark.parametrize("codes", [False, True])
def test_gathered_blocks_give_the_edges_of_blocks_searched_as_they_come(kind: str, codes: bool):
    """A front end gathers short blocks and searches them together (carrying its own tail into
    the next gathering); the edges, their strengths and the rejected flanks must be those of
    searching every block as it comes, for blocks of any and of changing sizes, and the
    gathered samples never take more than :data:`GATHER_BYTES`."""
    from toothcomb.decoders.frontends.base import GATHER_BYTES

    n = 600_000
    x = _vr_signal(n) if kind == "vr" else _hall_signal(n)
    c = np.round(np.clip(x / 2.0, -1, 1 - 2**-15) * 2**15).astype(np.int16)
    v = c * 2.0**-15
    lv = ChannelLevels("ch0", n, -1, 1, 0, 0.4, (-0.5, -0.4, -0.35, -0.3, 0, 0.4, 0.45, 0.5, 0.55),
                       0.003, 0.0)
    cls = hall_mod.HallFrontEnd if kind == "hall" else vr_mod.VrFrontEnd
    opts = {"persist": 40} if kind == "hall" else {}
    cuts = np.cumsum(RNG.integers(1, 30_000, 200))
    sizes = {"7001": np.arange(7001, n, 7001), "varied": cuts[cuts < n], "one": np.array([], int)}
    results = []
    for gather in (None, 0):
        for cut in sizes.values():
            fe = cls(100_000.0, lv, **opts)
            if gather is not None:
                fe.gather = gather
            bounds = [0, *cut.tolist(), n]
            parts = [
                fe.process_codes(c[a:b], a, 2.0**-15) if codes else fe.process(v[a:b], a)
                for a, b in itertools.pairwise(bounds)
            ]
            if gather is None and fe._gbuf is not None:
                assert fe._gbuf.nbytes <= GATHER_BYTES + 8 * len(fe._carry())
            e = Edges.concat([*parts, fe.finish()])
            results.append((e, dict(getattr(fe, "rejected", {}))))
    first, rejected = results[0]
    assert len(first) > 1000
    for e, rej in results[1:]:
        assert np.array_equal(e.times, first.times)
        assert np.array_equal(e.direction, first.direction)
        assert np.array_equal(e.strength, first.strength)
        assert rej == rejected


def test_vr_teeth_after_a_quiet_gap_are_closed_alone_and_one_run_spans_a_revolution(
    monkeypatch,
):
    """In the gap the envelope decays, and the first teeth after it are taller than four times
    the envelope: not ordinary, so a run would stop at each of them at once. They are closed
    alone, and the run after them reaches the next gap: about one run per revolution (the
    closing before counted about four), with the edges of closing every half-wave in turn.
    (A 36-1 wheel at 300 teeth/s: 16 gaps in 2 s.)"""
    fs, n = 100_000.0, 200_000
    phase = 2 * np.pi * 300.0 * np.arange(n) / fs
    gap = (np.floor(phase / (2 * np.pi)) % 36) == 35
    x = np.where(gap, 0.0, np.sin(phase)) + 0.003 * np.random.default_rng(5).normal(size=n)
    lv = ChannelLevels("ch0", n, -1, 1, 0, 0.7, (-1, -1, -0.9, -0.5, 0, 0.5, 0.9, 1, 1),
                       0.003, 0.0)
    runs: list[int] = []
    mixed = vr_mod.VrFrontEnd._close_mixed
    monkeypatch.setattr(vr_mod.VrFrontEnd, "_close_mixed",
                        lambda self, *a: runs.append(1) or mixed(self, *a))
    fast = _edges_of(vr_mod.VrFrontEnd(fs, lv), x, 8192)
    gaps = int(np.count_nonzero(np.diff(gap.astype(int)) == 1))
    assert gaps == 16
    assert len(runs) <= gaps + 4, len(runs)
    monkeypatch.setattr(vr_mod.VrFrontEnd, "_close_run", lambda self, *a: 0)
    slow = _edges_of(vr_mod.VrFrontEnd(fs, lv), x, 8192)
    assert len(slow) > 1000
    _assert_same_edges(fast, slow)


def test_vr_a_wrong_guess_of_quiet_half_waves_changes_nothing(monkeypatch):
    """Runs of half-waves are closed at once for a guess of which ones are insignificant; the
    guess is checked against the running averages, so even a random one must give what
    closing each half-wave in turn gives."""
    x = _vr_signal()
    lv = ChannelLevels("ch0", len(x), -2, 2, 0, 0.7, (-1.2, -1, -0.9, -0.5, 0, 0.5, 0.9, 1, 1.2),
                       0.003, 0.0)
    mixed: list[int] = []
    plain_mixed = vr_mod.VrFrontEnd._close_mixed

    def spy(self, start, end, sign, peak, quiet, *rest):
        mixed.append(int(np.count_nonzero(quiet)))
        return plain_mixed(self, start, end, sign, peak, quiet, *rest)

    monkeypatch.setattr(vr_mod.VrFrontEnd, "_close_mixed", spy)
    fast = _edges_of(vr_mod.VrFrontEnd(100_000.0, lv), x, 8191)
    assert sum(mixed) > 5  # runs went on through insignificant half-waves (the gaps)
    rng = np.random.default_rng(7)
    monkeypatch.setattr(vr_mod.VrFrontEnd, "_quiet_guess",
                        lambda self, peak: rng.random(len(peak)) < 0.02)
    guessed = _edges_of(vr_mod.VrFrontEnd(100_000.0, lv), x, 8191)
    monkeypatch.setattr(vr_mod.VrFrontEnd, "_close_run", lambda self, *a: 0)
    slow = _edges_of(vr_mod.VrFrontEnd(100_000.0, lv), x, 8191)
    for e in (fast, guessed):
        assert np.array_equal(e.times, slow.times)
        assert np.array_equal(e.direction, slow.direction)
        assert np.array_equal(e.strength, slow.strength)


def test_vr_recursions_step_by_step_are_lfilters():
    """A run of a running average is computed step by step in Python, or by lfilter once
    scipy.signal is imported; the steps must be what scipy.signal.lfilter gives (the recursion
    y = b x + k y), to the last bit, on short runs and long ones."""
    if not vr_mod._plain():
        pytest.skip("this scipy fuses multiply and add: the runs are stepped in Python only")
    rng = np.random.default_rng(8)
    for rec in (vr_mod._ENVELOPE, vr_mod._SLOW, vr_mod._WIDTH):
        for n in (0, 1, 2, 17, vr_mod.RUN_BY_STEPS, vr_mod.RUN_BY_STEPS + 1, 5000):
            x = rng.random(n) * 10.0 ** rng.integers(-6, 3, n)
            b, k = rec
            # source: scipy documentation, scipy.signal.lfilter (direct form II transposed)
            want = signal.lfilter([b], [1.0, -k], x, zi=[k * 0.37])[0]
            assert np.array_equal(vr_mod._steps_of(rec, 0.37, x), want)
            assert np.array_equal(vr_mod._run(rec, 0.37, x), want)


def test_vr_edges_are_the_same_with_or_without_lfilter(monkeypatch):
    """Long runs go to lfilter only when it gives Python's numbers: a front end whose runs are
    all stepped in Python finds the same edges to the last bit."""
    x = _vr_signal()
    lv = ChannelLevels("ch0", len(x), -2, 2, 0, 0.7, (-1.2, -1, -0.9, -0.5, 0, 0.5, 0.9, 1, 1.2),
                       0.003, 0.0)
    lfiltered: list[int] = []
    real = vr_mod._lfilter_run
    monkeypatch.setattr(vr_mod, "_lfilter_run", lambda *a: lfiltered.append(1) or real(*a))
    with_lfilter = _edges_of(vr_mod.VrFrontEnd(100_000.0, lv), x, 8191)
    if vr_mod._plain():
        assert len(lfiltered) > 10  # scipy.signal is imported here: the long runs took it
    monkeypatch.setattr(vr_mod, "_plain", lambda: False)  # as if lfilter were not plain
    lfiltered.clear()
    stepped = _edges_of(vr_mod.VrFrontEnd(100_000.0, lv), x, 8191)
    assert lfiltered == []
    assert len(stepped) > 1000
    _assert_same_edges(with_lfilter, stepped)


def _extensible_wav(path: Path, codes: np.ndarray, rate: int) -> None:
    """A 16-bit PCM WAV with a WAVE_FORMAT_EXTENSIBLE header, written by hand.

    source: Microsoft, "WAVEFORMATEXTENSIBLE structure" (mmreg.h): format tag 0xFFFE,
    cbSize 22, then valid bits, channel mask and the sub-format GUID, whose first two bytes
    are the format tag of plain PCM (1)."""
    import struct

    ch = codes.shape[1]
    guid = struct.pack("<I", 1) + struct.pack("<HH", 0, 0x10) + bytes(
        [0x80, 0, 0, 0xAA, 0, 0x38, 0x9B, 0x71]
    )
    fmt = struct.pack("<HHIIHHHHI", 0xFFFE, ch, rate, rate * 2 * ch, 2 * ch, 16, 22, 16,
                      (1 << ch) - 1) + guid
    data = codes.astype("<i2").tobytes()
    body = b"WAVE" + b"fmt " + struct.pack("<I", len(fmt)) + fmt + b"data" + struct.pack(
        "<I", len(data)) + data
    path.write_bytes(b"RIFF" + struct.pack("<I", len(body)) + body)


@pytest.mark.parametrize("layout", ["mono", "stereo", "three", "extensible", "streaming"])
def test_a_plain_16_bit_wav_is_read_as_its_stored_codes(tmp_path: Path, layout: str):
    """A 16-bit PCM WAV is read straight from its data chunk; the codes and the values must be
    what libsndfile reads (python-soundfile, the reference), in blocks of any size."""
    import struct

    ch = {"mono": 1, "three": 3}.get(layout, 2)
    x = np.clip(RNG.normal(size=(30_011, ch)) * 0.4, -1.0, 1.0)
    path = tmp_path / "t.wav"
    codes = np.round(x * 32767).astype(np.int16)
    if layout == "extensible":
        _extensible_wav(path, codes, 48000)
    else:
        sf.write(path, codes, 48000, subtype="PCM_16")
    if layout == "streaming":  # a recorder that never wrote the length: size 0xFFFFFFFF
        raw = bytearray(path.read_bytes())
        at = raw.index(b"data")
        raw[at + 4 : at + 8] = struct.pack("<I", 0xFFFFFFFF)
        path.write_bytes(bytes(raw))
    # source: python-soundfile / libsndfile, read(dtype="int16") and read(dtype="float64")
    want_codes = sf.read(path, dtype="int16", always_2d=True)[0]
    want = sf.read(path, dtype="float64", always_2d=True)[0]
    assert np.array_equal(want_codes, codes)
    with open_capture(str(path)) as src:
        assert src._raw is not None  # the data chunk is read directly
        assert src._raw.format_tag == (0xFFFE if layout == "extensible" else 1)
        got_codes = np.concatenate([b.data for b in src.code_blocks(4099)])
        got = np.concatenate([b.data for b in src.blocks(65536)])
        assert all(b.data[:, 0].flags.c_contiguous for b in src.code_blocks(1000))
    assert got_codes.dtype == np.int16 and np.array_equal(got_codes, want_codes)
    assert np.array_equal(got, want)


def test_a_truncated_streaming_wav_is_refused_where_its_data_ends(tmp_path: Path):
    import struct

    path = tmp_path / "t.wav"
    sf.write(path, np.zeros((5000, 2)), 48000, subtype="PCM_16")
    raw = bytearray(path.read_bytes())
    at = raw.index(b"data")
    raw[at + 4 : at + 8] = struct.pack("<I", 0xFFFFFFFF)
    path.write_bytes(bytes(raw))
    with open_capture(str(path)) as src:
        assert src._raw is not None
        path.write_bytes(bytes(raw[: len(raw) - 4 * 3000]))  # cut while open
        with pytest.raises(CaptureError, match=r"audio data ends at frame 2000 although the "
                           r"file announces 5000; the file looks truncated"):
            for _ in src.code_blocks(1000):
                pass


def test_decode_is_the_same_with_every_block_searched_as_it_comes(tmp_path, monkeypatch):
    """The front ends gather short blocks; with that off (every block searched on its own, as
    the blocks come) a decode gives the same answer, to the last bit."""
    from toothcomb.decoders.frontends.base import SampleFeed

    for fmt in ("wav", "h5"):
        path, _ = make_capture(tmp_path, preset("idle-60-2-vr-soundcard", duration_s=2.0), fmt)
        gathered = decode_json(path, block_size=4096)
        with monkeypatch.context() as m:
            m.setattr(SampleFeed, "gather", 0)
            assert decode_json(path, block_size=4096) == gathered
            assert decode_json(path, block_size=999) == gathered


def test_pcm_decodes_the_same_through_codes_and_floats(tmp_path, monkeypatch):
    from toothcomb.decoders.readers.audio import AudioSource

    path, _ = make_capture(tmp_path, preset("idle-60-2-vr-soundcard", duration_s=2.0), "wav")
    by_codes = decode_json(path, block_size=5000)
    monkeypatch.setattr(AudioSource, "code_scale", property(lambda self: None))
    assert decode_json(path, block_size=5000) == by_codes


# --------------------------------------------------------------------------- wheel, stats


def test_whole_revolutions_at_once_as_tooth_by_tooth():
    spec = MissingToothSpec(36, 1)
    angles = np.array([r * 360 + k * 10.0 for r in range(40) for k in range(35)])
    rpm = 900 + 200 * np.sin(angles / 720.0)  # speed swings over the capture
    t = np.cumsum(np.diff(angles, prepend=0.0) / (6 * rpm)) + 1e-6 * RNG.normal(size=len(angles))
    whole = decode_teeth(t, spec)
    tr = ToothTracker(spec)
    parts = [tr.feed(t[i : i + 1]) for i in range(len(t))] + [tr.finish()]
    one = ToothTrack.concat(parts, spec.pitch_deg)
    assert len(whole.reference_times) == 40  # the first counted back from the second
    for field in ("times", "angles", "tooth", "run", "pitches", "reference_times"):
        assert np.array_equal(getattr(whole, field), getattr(one, field)), field


def test_speed_trace_keeps_the_first_point_of_each_bucket():
    for _ in range(50):
        st = CrankStats(float(RNG.uniform(0.05, 50.0)))
        bucket = st._bucket
        want: list[tuple[float, float]] = []
        nxt = -math.inf
        t0 = 0.0
        for _ in range(4):
            step = float(RNG.choice([bucket * 0.3, bucket, bucket * 3]))
            mid = t0 + np.cumsum(RNG.exponential(step, int(RNG.integers(1, 300))))
            t0 = float(mid[-1])
            rpm = RNG.random(len(mid))
            for tm, v in zip(mid, rpm, strict=True):  # the definition, point by point
                if tm >= nxt:
                    want.append((float(tm), float(v)))
                    nxt = (math.floor(tm / bucket) + 1) * bucket
            st._thin(mid, rpm)
        assert [tuple(row) for row in st.trace().tolist()] == want


def test_edges_handed_over_in_any_batch_give_the_same_answer(tmp_path, monkeypatch):
    path, _ = make_capture(tmp_path, preset("idle-60-2-vr-soundcard", duration_s=2.0), "wav")
    big = decode_json(path, block_size=4096)
    monkeypatch.setattr(pipeline, "EDGES_PER_HANDOVER", 1)
    assert decode_json(path, block_size=4096) == big


# --------------------------------------------------------------------------- progress bar


class FakeClock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def test_progress_bar_waits_a_second_then_shows_on_the_terminal():
    buf = io.StringIO()
    clock = FakeClock()
    con = Console(file=buf, force_terminal=True, width=80)
    with StageProgress(con, show_after_s=SHOW_AFTER_S, clock=clock) as bar:
        bar("edges", 10, 100)
        clock.now += 0.5
        bar("edges", 20, 100)
        assert not bar.shown and buf.getvalue() == ""
        clock.now += 0.6  # a decode still running after a second gets its bar
        bar("edges", 30, 100)
        assert bar.shown
        bar("edges", 31, 100)  # reported, drawn on the next redraw
        assert bar.completed("edges") == 31.0
    assert "edges" in buf.getvalue()


def test_progress_goes_to_stderr_only_on_a_terminal_and_not_when_quiet(tmp_path, monkeypatch):
    from toothcomb.cli import main as cli_main

    seen = []

    def fake_decode(path, options, progress=None):
        seen.append(progress)
        raise SignalError("stop here")

    monkeypatch.setattr(pipeline, "decode_capture", fake_decode)
    path, _ = make_capture(tmp_path, preset("idle-60-2-vr-soundcard", duration_s=0.2), "wav")
    # the bar draws on the error stream, never on stdout (which may carry the JSON)
    out, err = io.StringIO(), io.StringIO()
    assert cli_main._progress_console(cli_main.Streams(out, err)).file is err
    term = Console(file=io.StringIO(), force_terminal=True)
    monkeypatch.setattr(cli_main, "_progress_console", lambda streams: term)
    cli_main.main(["decode", str(path)])
    cli_main.main(["decode", str(path), "--quiet"])
    assert isinstance(seen[0], StageProgress) and seen[1] is None
    with progress_for(Console(file=io.StringIO()), enabled=True) as cb:
        assert cb is None  # a pipe or a file: no bar


# --------------------------------------------------------------------------- fixed costs


def test_channel_sharpness_is_the_flank_by_flank_definition():
    """The sharpness of a channel (the share of each flank's step done within 10 us) is taken
    for all flanks in one reduction; it must be what looking at each flank's stretch gives,
    flanks at the ends of the probe (cut-off or empty stretches) included."""
    from toothcomb.decoders.analysis.identify import SHARP_SPAN_S, _sharpness

    rng = np.random.default_rng(23)

    def by_hand(probe: np.ndarray, e: Edges, fs: float) -> float:
        h = max(1, round(SHARP_SPAN_S * fs / 2))
        d = [abs(probe[i + 2 * h] - probe[i]) for i in range(len(probe) - 2 * h)]
        shares = []
        for t, strength in zip(e.times.tolist(), e.strength.tolist(), strict=True):
            pos = round(t * fs) - h  # numpy's rint rounds halves to even, as round() does
            a = min(max(pos - 3 * h - 2, 0), len(d) - 1)
            b = min(max(pos + 3 * h + 3, 1), len(d))
            shares.append((max(d[a:b]) if b > a else 0.0) / strength)
        # source: numpy documentation (numpy.median)
        return float(np.median(shares))

    for trial in range(60):
        fs = float(rng.choice([44_100.0, 192_000.0, 1e6]))
        n = int(rng.integers(30, 2000))
        probe = rng.normal(size=n).cumsum()
        k = int(rng.integers(1, 30))
        times = np.sort(rng.uniform(-3 / fs, (n + 3) / fs, k))
        e = Edges(times, np.ones(k, np.int8), rng.uniform(0.5, 3.0, k))
        assert _sharpness(probe, e, fs) == by_hand(probe, e, fs), trial


def test_every_sample_goes_through_a_front_end_once(tmp_path, monkeypatch):
    """The crank and its wheel are identified from the first seconds' edges, and those are the
    first edges of the one pass that the decode then follows to the end: no sample is searched
    twice. Each front end the decode makes must be fed every sample of its channel exactly once,
    in order."""
    path, _ = make_capture(tmp_path, preset("idle-60-2-vr-soundcard", duration_s=9.0), "wav")
    fed: list[list[tuple[int, int]]] = []
    made = pipeline._frontend

    def counting(look, fs, lv):
        fe = made(look, fs, lv)
        seen: list[tuple[int, int]] = []
        fed.append(seen)
        for name in ("process", "process_codes"):
            inner = getattr(fe, name)

            def spy(x, start, *rest, inner=inner):
                seen.append((start, len(x)))
                return inner(x, start, *rest)

            setattr(fe, name, spy)
        return fe

    monkeypatch.setattr(pipeline, "_frontend", counting)
    r = decode_capture(str(path), DecodeOptions(block_size=4096))
    n = r.capture.n_samples
    assert len(fed) == 2  # crank and cam
    for seen in fed:
        starts = [s for s, _ in seen]
        assert starts == sorted(starts) and starts[0] == 0
        assert sum(k for _, k in seen) == n
        assert all(a + k == b for (a, k), (b, _) in itertools.pairwise(seen))


def test_the_first_seconds_are_the_start_of_the_whole_pass(tmp_path):
    """The edges the crank is identified from are those a front end finds in the whole capture
    before the first seconds end, whatever the blocks."""
    from toothcomb.decoders.analysis.identify import look_at_channel
    from toothcomb.decoders.edgepass import EdgePass, Received

    path, _ = make_capture(tmp_path, preset("idle-60-2-vr-soundcard", duration_s=6.0), "wav")
    with open_capture(str(path)) as src:
        fs = src.info.sample_rate
        lv = estimate_levels(src, 4096)
        probe = pipeline.read_probe(src, src.info.n_samples, 4096)
        looks = {c: look_at_channel(probe[:, c], fs, lv[c]) for c in (0, 1)}
        whole = {}
        for c in (0, 1):  # the definition: one front end over the whole capture, in one piece
            fe = pipeline._frontend(looks[c], fs, lv[c])
            x = np.concatenate([b.data[:, c] for b in src.blocks(1 << 20)])
            whole[c] = Edges.concat([fe.process(x, 0), fe.finish()])
        for block in (999, 4096):
            fronts = {c: pipeline._frontend(looks[c], fs, lv[c]) for c in (0, 1)}
            edge_pass = EdgePass(src, fronts, {}, block, FiniteWatch(src, block))
            got = Received(edge_pass, None)
            stop = int(2.0 * fs)
            got.until(stop / fs)
            assert not got.done  # the first seconds come before the pass ends
            for c in (0, 1):
                head = got.edges(c, stop / fs)
                want = whole[c].select(whole[c].times < stop / fs)
                assert len(want) > 10
                np.testing.assert_array_equal(head.times, want.times)
                np.testing.assert_array_equal(head.direction, want.direction)


def test_two_channel_codes_are_split_as_numpy_transposes_them():
    from toothcomb.decoders.readers.audio import _split_pairs

    raw = RNG.integers(-(2**15), 2**15, size=(10_007, 2)).astype(np.int16)
    raw[:4] = [[-(2**15), 2**15 - 1], [-1, 0], [0, -1], [2**15 - 1, -(2**15)]]
    # source: numpy documentation (numpy.ascontiguousarray of the transpose)
    np.testing.assert_array_equal(_split_pairs(raw), np.ascontiguousarray(raw.T))


def test_wav_windows_are_read_together_as_soundfile_reads_them(tmp_path: Path):
    """The windows of a plain 16-bit WAV are read into one array and made floats at once; each
    must be libsndfile's float conversion of its frames, cut short (or empty) at the end."""
    x = np.clip(RNG.normal(size=(9_000, 2)) * 0.4, -1.0, 1.0)
    path = tmp_path / "t.wav"
    sf.write(path, x, 48000, subtype="PCM_16")
    # source: python-soundfile / libsndfile, read(dtype="float64")
    want = sf.read(path, dtype="float64", always_2d=True)[0]
    starts = [0, 17, 4000, 8990, 9000, 500]
    with open_capture(str(path)) as src:
        got = list(src.read_windows(starts, 64))
    assert [len(w) for w in got] == [64, 64, 64, 10, 0, 64]
    for s, w in zip(starts, got, strict=True):
        assert w.dtype == np.float64 and w.shape[1] == 2
        assert np.array_equal(w, want[s : s + 64])


@pytest.mark.parametrize("uneven", [False, True])
def test_window_noise_is_the_median_difference_inside_the_windows(uneven: bool):
    """The noise of spread-window levels comes from differences of neighbouring samples inside
    each window, never across two; windows of equal length are reshaped rather than cut."""

    class Uneven(WindowSource):
        def read_windows(self, starts, length: int) -> Iterator[np.ndarray]:
            for k, s in enumerate(starts):
                yield self.data[s : s + length - (k % 3 if uneven else 0)]

    n = 400_000
    x = np.stack([np.cumsum(RNG.normal(size=n)), RNG.normal(size=n)], axis=1)
    src = Uneven(x)
    got = estimate_levels(src, 4096, sparse_above=100_000)
    windows = list(src.read_windows(window_starts(n), levels_mod.WINDOW))
    for j, lv in enumerate(got):
        d = np.concatenate([np.abs(np.diff(w[:, j])) for w in windows])
        # source: the median absolute difference over 0.6745 * sqrt(2) is sigma for white
        # Gaussian noise (module docstring of levels); numpy.median is the reference
        assert lv.noise == float(np.median(d)) / (0.6745 * math.sqrt(2.0))
        assert lv.n == sum(len(w) for w in windows)
    assert got[1].noise == pytest.approx(1.0, rel=0.03)  # unit white noise reads 1
