"""The fast streaming paths give what the plain ones give: integer audio reads, levels from
spread windows, NaN caught block by block, runs of VR half-waves closed at once, whole wheel
revolutions taken at once, the thinned speed trace, edges handed over in batches, and the
progress bar that shows for long decodes only."""

from __future__ import annotations

import io
import json
import math
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from conftest import cam_errors, make_capture
from rich.console import Console
from toothcomb.cli.progress import SHOW_AFTER_S, StageProgress, progress_for
from toothcomb.decoders import levels as levels_mod
from toothcomb.decoders import pipeline
from toothcomb.decoders.errors import SignalError
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


def _decode_json(path: Path, **opts: object) -> str:
    r = decode_capture(str(path), DecodeOptions(**opts))  # type: ignore[arg-type]
    return json.dumps(r.to_json(), sort_keys=True)


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
    answers = {_decode_json(path, block_size=b) for b in (1000, 4099, 65536)}
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
    assert np.array_equal(fast.times, slow.times)
    assert np.array_equal(fast.direction, slow.direction)
    assert np.array_equal(fast.strength, slow.strength)


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


@pytest.mark.parametrize("kind", ["hall", "vr"])
@pytest.mark.parametrize("despike", [1, 5])
def test_front_ends_find_the_same_edges_on_codes_as_on_floats(kind: str, despike: int):
    """Integer codes with the code's value (a power of two) give the edges the float samples
    give, to the last bit: every threshold is scaled instead of every sample."""
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
    a = _edges_of(cls(100_000.0, lv, **opts), values, 7001)
    fe = cls(100_000.0, lv, **opts)
    parts = [fe.process_codes(codes[i : i + 7001], i, 2.0**-15) for i in range(0, len(x), 7001)]
    b = Edges.concat([*parts, fe.finish()])
    assert len(a) > 100
    assert np.array_equal(a.times, b.times)
    assert np.array_equal(a.direction, b.direction)
    assert np.array_equal(a.strength, b.strength)


def test_pcm_decodes_the_same_through_codes_and_floats(tmp_path, monkeypatch):
    from toothcomb.decoders.readers.audio import AudioSource

    path, _ = make_capture(tmp_path, preset("idle-60-2-vr-soundcard", duration_s=2.0), "wav")
    by_codes = _decode_json(path, block_size=5000)
    monkeypatch.setattr(AudioSource, "code_scale", property(lambda self: None))
    assert _decode_json(path, block_size=5000) == by_codes


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
    assert len(whole.reference_times) == 39
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
        assert st.trace == want


def test_edges_handed_over_in_any_batch_give_the_same_answer(tmp_path, monkeypatch):
    path, _ = make_capture(tmp_path, preset("idle-60-2-vr-soundcard", duration_s=2.0), "wav")
    big = _decode_json(path, block_size=4096)
    monkeypatch.setattr(pipeline, "EDGES_PER_HANDOVER", 1)
    assert _decode_json(path, block_size=4096) == big


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
