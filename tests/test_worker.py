"""The crank's front end in a forked worker process gives the decode one process gives, to the
last bit; what goes wrong in the worker comes back as one sentence; the worker is forked only
where it is safe, and never outlives the decode."""

from __future__ import annotations

import dataclasses
import json
import os
import signal
import sys
import threading
import time

import numpy as np
import pytest
import soundfile as sf
from conftest import decode_json, make_capture
from toothcomb.decoders import worker as worker_mod
from toothcomb.decoders.errors import CaptureError, DecodeError
from toothcomb.decoders.frontends.base import SampleFeed
from toothcomb.decoders.model import Edges
from toothcomb.decoders.options import DecodeOptions
from toothcomb.decoders.pipeline import decode_capture
from toothcomb.decoders.readers import open_capture
from toothcomb.decoders.readers.write import write_capture
from toothcomb.decoders.simulate import (
    Channel,
    HallSensor,
    IgnitionSpikes,
    Instrument,
    ValveDrive,
    preset,
    simulate,
)

RNG = np.random.default_rng(4711)


@pytest.fixture
def forks(monkeypatch):
    """Every decode forks its worker however short the capture; the list records each one
    (channels, first sample), :data:`PIDS` their process ids."""
    if not sys.platform.startswith("linux") or len(os.sched_getaffinity(0)) < 2:
        pytest.skip("a worker is forked on Linux with two cores or more only")
    others = [t.name for t in threading.enumerate() if t is not threading.current_thread()]
    assert others == [], f"threads left running by earlier tests stop every fork: {others}"
    made: list[tuple[tuple[int, ...], int]] = []
    real = worker_mod.FrontEndWorker.__init__

    def record(self, source, frontends, start, scale, block_size, watch=None):
        made.append((tuple(sorted(frontends)), start))
        real(self, source, frontends, start, scale, block_size, watch)
        PIDS.append(self._pid)

    PIDS.clear()

    monkeypatch.setattr(worker_mod, "MIN_SAMPLES", 0)
    monkeypatch.setattr(worker_mod, "MIN_SAMPLES_APART", 0)
    monkeypatch.setattr(worker_mod.FrontEndWorker, "__init__", record)
    return made



def _soundcard(sc, rate: float = 48_000.0, bits: int = 16, full_scale_v: float = 1.0):
    return sc.replace(instrument=Instrument(kind="soundcard", sample_rate=rate, bits=bits,
                                            oversample=1, full_scale_v=full_scale_v))


#: the process ids of the workers the ``forks`` fixture saw forked
PIDS: list[int] = []


def _no_child_left() -> bool:
    """Every worker forked has ended and been waited for (none runs, none is a zombie)."""
    for pid in PIDS:
        try:
            os.waitpid(pid, os.WNOHANG)
        except ChildProcessError:
            continue
        return False
    return True


def _scenario(name: str):
    if name == "hall-two-cams":
        return _soundcard(preset("hall-36-1-two-cams-scope", duration_s=7.0))
    if name == "vr-spikes":
        return _soundcard(preset("snap-60-2-vr-spikes", duration_s=7.0), bits=24)
    if name == "swapped":
        # the cam on the first input, the crank on the second
        sc = preset("idle-60-2-vr-soundcard", duration_s=7.0)
        return _soundcard(sc.replace(channels=tuple(reversed(sc.channels))))
    if name == "valve":
        # a phaser valve's PWM command on a third input (with its flyback spikes), found
        # without a hint: a second front end follows the cam channels as possible commands
        sc = preset("hall-36-1-two-cams-scope", duration_s=7.0)
        valve = ValveDrive(duty_pct=((0.0, 50.0), (2.0, 75.0), (4.0, 30.0), (5.5, 50.0)))
        ocv = Channel(name="ocv", source="valve:cam_intake", noise_v=0.05, range_v=(-35.0, 50.0))
        sc = sc.replace(cams=(dataclasses.replace(sc.cams[0], valve=valve), sc.cams[1]),
                        channels=(*sc.channels, ocv))
        return sc.replace(instrument=Instrument(kind="soundcard", sample_rate=96_000.0, bits=24,
                                                oversample=1, full_scale_v=60.0,
                                                ac_corner_hz=0.0))
    if name == "hall-crank-spikes":
        sc = preset("idle-60-2-vr-soundcard", duration_s=7.0)
        crank = dataclasses.replace(sc.crank, sensor=HallSensor())
        return _soundcard(sc.replace(crank=crank, spikes=IgnitionSpikes(amplitude_v=2.0)))
    return _soundcard(preset(name, duration_s=7.0))


@pytest.mark.parametrize(
    "name,fmt",
    [
        ("idle-60-2-vr-soundcard", "wav"),
        ("cranking-60-2-vr", "flac"),
        ("phaser-sweep-60-2-hall", "wav"),
        ("hall-two-cams", "flac"),
        ("vr-spikes", "flac"),
        ("hall-crank-spikes", "wav"),
        ("swapped", "wav"),
        ("valve", "flac"),
        ("idle-60-2-vr-soundcard", "csv"),  # float samples, read back from the CSV's spool
        # float samples read by position, each process its own channels
        ("idle-60-2-vr-soundcard", "h5"),
        ("phaser-sweep-60-2-hall", "h5"),
        ("valve", "h5"),
    ],
)
def test_the_worker_gives_the_decode_of_one_process(tmp_path, forks, name, fmt):
    path, _ = make_capture(tmp_path, _scenario(name), fmt)
    alone = decode_json(path, worker_process=False, block_size=4096)
    assert forks == []
    assert decode_json(path, block_size=4096) == alone
    # the worker ran the crank's front end only, from a block boundary after the first seconds
    ((channels, start),) = forks
    assert len(channels) == 1 and start > 0 and start % 4096 == 0
    # a block size that divides nothing evenly: the worker's blocks are the decode's all the same
    assert decode_json(path, block_size=3001) == alone
    if name == "valve":
        assert len(json.loads(alone)["actuators"]) == 1
    assert _no_child_left()


@pytest.mark.parametrize("name", ["idle-60-2-vr-soundcard", "phaser-sweep-60-2-hall"])
def test_the_worker_takes_float_samples_too(tmp_path, forks, name):
    """A 32-bit float WAV (what many recording programs write) holds no integer codes: the
    worker reads its float samples from the file itself and gives the decode of one process."""
    sim = simulate(preset(name, duration_s=7.0).replace(
        instrument=Instrument(kind="float", sample_rate=48_000.0)))
    path = tmp_path / "float.wav"
    peak = float(np.max(np.abs(sim.samples)))
    sf.write(path, sim.samples / (2 * peak), 48_000, subtype="FLOAT")
    alone = decode_json(path, worker_process=False, block_size=4096)
    assert forks == []
    assert decode_json(path, block_size=4096) == alone
    ((channels, start),) = forks
    assert len(channels) == 1 and start > 0 and start % 4096 == 0
    assert len(json.loads(alone)["crank"]["reference_times_s"]) > 50
    assert _no_child_left()


def test_pulses_the_worker_rejected_are_reported(tmp_path, forks, monkeypatch):
    """The crank's count of rejected pulses comes back from the worker: here every block a Hall
    front end is fed counts as one, wherever it runs, so the decode reports as many pulses as
    the crank's front end was fed blocks, worker or not."""
    path, _ = make_capture(tmp_path, _scenario("phaser-sweep-60-2-hall"), "wav")
    real = SampleFeed.process_codes

    def counting(self, codes, start, scale):
        if hasattr(self, "rejected"):
            self.rejected[1] += 1
        return real(self, codes, start, scale)

    monkeypatch.setattr(SampleFeed, "process_codes", counting)
    alone = decode_capture(str(path), DecodeOptions(worker_process=False, block_size=4096))
    split = decode_capture(str(path), DecodeOptions(block_size=4096))
    assert forks
    blocks = -(-alone.capture.n_samples // 4096)
    for r in (alone, split):
        (pulses,) = [f.message for f in r.crank.findings if "short pulse" in f.message]
        assert pulses.startswith(f"{blocks} short pulse(s) on crank channel")
    assert split.crank.extra_teeth == alone.crank.extra_teeth >= blocks


def test_edges_travel_as_bytes_and_come_back_the_same():
    channels = (0, 2, 5)
    blocks = []
    for b in range(7):
        edges, settled = {}, {}
        for c in channels:
            n = int(RNG.integers(0, 40)) if RNG.random() > 0.3 else 0
            edges[c] = Edges(
                np.sort(RNG.uniform(0, 100, n)),
                RNG.choice(np.array([-1, 1], np.int8), n),
                RNG.uniform(0.1, 5.0, n),
            )
            if c != 5:
                settled[c] = float(RNG.uniform(0, 100))
        blocks.append((4096 * (b + 1), edges, settled))
    back = worker_mod.unpack_blocks(worker_mod.pack_blocks(blocks, channels), channels)
    assert len(back) == len(blocks)
    for (stop, edges, settled), (stop2, edges2, settled2) in zip(blocks, back, strict=True):
        assert stop2 == stop and settled2 == settled
        for c in channels:
            for field in ("times", "direction", "strength"):
                a, b2 = getattr(edges[c], field), getattr(edges2[c], field)
                assert b2.dtype == a.dtype and np.array_equal(a, b2)
    with pytest.raises(ValueError, match="does not add up"):
        worker_mod.unpack_blocks(worker_mod.pack_blocks(blocks, channels) + b"x", channels)


def _fail_in_worker(monkeypatch, what):
    """Front ends that call ``what()`` once they run in another process than this one."""
    parent = os.getpid()
    real = SampleFeed.process_codes

    def process_codes(self, codes, start, scale):
        if os.getpid() != parent:
            what()
        return real(self, codes, start, scale)

    monkeypatch.setattr(SampleFeed, "process_codes", process_codes)


def _raise(exc: BaseException):
    def go():
        raise exc

    return go


def test_an_error_in_the_worker_is_raised_as_itself(tmp_path, forks, monkeypatch):
    path, _ = make_capture(tmp_path, _scenario("idle-60-2-vr-soundcard"), "wav")
    _fail_in_worker(monkeypatch, _raise(CaptureError("capture.wav: the disk went away")))
    with pytest.raises(CaptureError, match=r"^capture.wav: the disk went away$"):
        decode_capture(str(path))
    assert forks and _no_child_left()


def test_a_foreign_error_in_the_worker_is_named_in_a_decode_error(tmp_path, forks, monkeypatch):
    path, _ = make_capture(tmp_path, _scenario("idle-60-2-vr-soundcard"), "wav")
    _fail_in_worker(monkeypatch, _raise(ZeroDivisionError("float division by zero")))
    with pytest.raises(DecodeError, match=r"failed \(ZeroDivisionError: float division by zero\)"
                       r"; decode again with --one-process"):
        decode_capture(str(path))
    assert _no_child_left()


def test_a_worker_that_dies_stops_the_decode_with_a_sentence(tmp_path, forks, monkeypatch):
    path, _ = make_capture(tmp_path, _scenario("idle-60-2-vr-soundcard"), "wav")
    _fail_in_worker(monkeypatch, lambda: os.kill(os.getpid(), signal.SIGKILL))
    with pytest.raises(DecodeError, match=r"stopped before the end of the capture \(killed by "
                       rf"signal {int(signal.SIGKILL)}\); decode again with --one-process"):
        decode_capture(str(path))
    assert _no_child_left()


@pytest.mark.parametrize("where", ["progress", "front end"])
def test_a_decode_that_stops_early_stops_its_worker(tmp_path, forks, monkeypatch, where):
    """The decode fails on the first block after the worker took over, while the worker has
    hundreds of blocks to go (after its first message it waits a minute on each): the worker
    is stopped and waited for, not left behind. The failure comes from outside the edge pass
    (the progress callback) or from inside it (a front end of the decode's own)."""
    path, _ = make_capture(tmp_path, _scenario("idle-60-2-vr-soundcard"), "wav")
    calls = []

    def slow_after_first_message():
        calls.append(1)
        if len(calls) > worker_mod.GROUP:
            time.sleep(60.0)

    _fail_in_worker(monkeypatch, slow_after_first_message)
    progress = None
    if where == "progress":

        def progress(what, done, total):
            if PIDS:
                raise DecodeError("stopped on purpose")
    else:
        real = SampleFeed.process_codes  # the one _fail_in_worker set

        def failing(self, codes, start, scale):
            if PIDS and os.getpid() != PIDS[0]:
                raise DecodeError("stopped on purpose")
            return real(self, codes, start, scale)

        monkeypatch.setattr(SampleFeed, "process_codes", failing)
    with pytest.raises(DecodeError, match="stopped on purpose") as caught:
        decode_capture(str(path), DecodeOptions(block_size=1024), progress=progress)
    # (the traceback, and with it the decode's frames, are still alive here)
    assert caught.traceback
    assert forks and PIDS and _no_child_left()


def test_no_worker_while_another_thread_runs(tmp_path, forks):
    path, _ = make_capture(tmp_path, _scenario("idle-60-2-vr-soundcard"), "wav")
    alone = decode_json(path, worker_process=False)
    stop = threading.Event()
    other = threading.Thread(target=stop.wait)
    other.start()
    try:
        assert worker_mod.can_fork() is False
        assert decode_json(path) == alone
    finally:
        stop.set()
        other.join()
    assert forks == []
    assert worker_mod.can_fork() is True


def test_a_fork_that_fails_leaves_the_decode_in_one_process(tmp_path, forks, monkeypatch):
    """No process to be had (a process limit, memory that cannot be committed): the decode
    goes on in one process, with the same answer, and leaves no pipe open."""
    import errno

    path, _ = make_capture(tmp_path, _scenario("idle-60-2-vr-soundcard"), "wav")
    alone = decode_json(path, worker_process=False)

    def no_fork():
        raise OSError(errno.EAGAIN, "Resource temporarily unavailable")

    monkeypatch.setattr(worker_mod.os, "fork", no_fork)
    before = len(os.listdir("/proc/self/fd"))
    assert decode_json(path) == alone
    assert len(forks) == 1 and PIDS == []
    assert len(os.listdir("/proc/self/fd")) == before


def test_no_worker_for_what_is_left_of_a_short_capture(tmp_path, monkeypatch):
    path, _ = make_capture(tmp_path, _scenario("idle-60-2-vr-soundcard"), "wav")
    made = []
    monkeypatch.setattr(worker_mod.FrontEndWorker, "__init__",
                        lambda self, *a: made.append(a) or None)
    decode_capture(str(path))  # 7 s at 48 kHz: far below MIN_SAMPLES
    assert made == []
    assert worker_mod.MIN_SAMPLES > 7 * 48_000


def _check_later_blocks(whole_pass, from_block, n_samples: int) -> None:
    """Blocks of 4096 read from the fourth block on (``from_block(4096, start=...)``) are those
    a pass from the first sample (``whole_pass``) gives there; the end gives none, and a start
    off a block boundary is refused."""
    whole = [(b.start, b.data.copy()) for b in whole_pass]
    later = [(b.start, b.data.copy()) for b in from_block(4096, start=3 * 4096)]
    assert [s for s, _ in later] == [s for s, _ in whole[3:]]
    assert all(np.array_equal(a, b) for (_, a), (_, b) in zip(whole[3:], later, strict=True))
    assert list(from_block(4096, start=n_samples)) == []
    with pytest.raises(ValueError, match="not a block boundary"):
        next(from_block(4096, start=4000))


@pytest.mark.parametrize("fmt,subtype", [("wav", "PCM_16"), ("wav", "PCM_24"), ("flac", "PCM_16")])
def test_code_blocks_from_a_later_block_are_the_same_blocks(tmp_path, fmt, subtype):
    x = np.clip(RNG.normal(size=(50_000, 2)) * 0.3, -1.0, 1.0)
    path = tmp_path / f"t.{fmt}"
    sf.write(path, x, 48_000, subtype=subtype)
    with open_capture(str(path)) as src:
        _check_later_blocks(src.code_blocks(4096), src.code_blocks, src.info.n_samples)


@pytest.mark.parametrize("subtype", ["FLOAT", "PCM_16", "csv", "h5"])
def test_float_blocks_from_a_later_block_are_the_same_blocks(tmp_path, subtype):
    x = np.clip(RNG.normal(size=(50_000, 2)) * 0.3, -1.0, 1.0)
    if subtype in ("csv", "h5"):
        path = tmp_path / f"t.{subtype}"
        write_capture(str(path), x, 48_000.0, ["a", "b"])
    else:
        path = tmp_path / "t.wav"
        sf.write(path, x, 48_000, subtype=subtype)
    with open_capture(str(path)) as src:
        _check_later_blocks(src.blocks(4096), src.blocks_from, src.info.n_samples)
    assert worker_mod.starts_anywhere(src, codes=False)


def test_an_hdf5_decode_reads_only_the_channels_its_worker_does_not(tmp_path, forks,
                                                                    monkeypatch):
    """Each channel of an HDF5 file is stored apart: once the worker reads the crank, the
    decode reads only the others (here the cam), and gives the decode of one process."""
    from toothcomb.decoders.readers import hdf5 as hdf5_mod

    path, _ = make_capture(tmp_path, _scenario("idle-60-2-vr-soundcard"), "h5")
    reads: list[frozenset[int] | None] = []
    real = hdf5_mod.Hdf5Source._read

    def read(self, start, stop, channels=None):
        reads.append(None if channels is None else frozenset(channels))
        return real(self, start, stop, channels)

    monkeypatch.setattr(hdf5_mod.Hdf5Source, "_read", read)
    alone = decode_json(path, worker_process=False, block_size=4096)
    assert set(reads) == {None}
    reads.clear()
    assert decode_json(path, block_size=4096) == alone
    ((channels, start),) = forks
    assert channels == (0,) and start > 0
    # the first blocks (and the levels' windows) with every channel, then the cam's alone
    assert reads[0] is None and reads[-1] == frozenset({1})
    first = reads.index(frozenset({1}))
    assert set(reads[first:]) == {frozenset({1})}
    # the block the worker starts at is read whole here too; from the next one on, no crank
    assert len(reads) - first == -(-(7 * 48_000 - start - 4096) // 4096)
    assert _no_child_left()


def test_sources_read_apart_have_the_lower_threshold():
    assert 0 < worker_mod.MIN_SAMPLES_APART < worker_mod.MIN_SAMPLES


def test_a_source_read_apart_has_a_worker_from_fewer_samples(tmp_path, forks, monkeypatch):
    """An HDF5 file's worker also takes half of the reading, so it pays on shorter captures:
    the threshold of sources read apart applies to them alone."""
    sc = _scenario("idle-60-2-vr-soundcard")
    h5, _ = make_capture(tmp_path, sc, "h5")
    sim = simulate(preset("idle-60-2-vr-soundcard", duration_s=7.0).replace(
        instrument=Instrument(kind="float", sample_rate=48_000.0)))
    wav = tmp_path / "float.wav"
    sf.write(wav, sim.samples / (2 * float(np.max(np.abs(sim.samples)))), 48_000,
             subtype="FLOAT")
    monkeypatch.setattr(worker_mod, "MIN_SAMPLES", 10**12)
    decode_capture(str(h5), DecodeOptions(block_size=4096))
    decode_capture(str(wav), DecodeOptions(block_size=4096))
    assert [channels for channels, _ in forks] == [(0,)]  # the HDF5 file's only
    monkeypatch.setattr(worker_mod, "MIN_SAMPLES_APART", 10**12)
    decode_capture(str(h5), DecodeOptions(block_size=4096))
    assert len(forks) == 1
    assert _no_child_left()


def test_a_bad_sample_only_the_worker_reads_is_reported_as_in_one_process(tmp_path, forks):
    """A NaN in the crank's samples of an HDF5 file, where neither the levels' windows nor the
    decode look, is found by the worker: the same sentence as a decode in one process."""
    from toothcomb.decoders.errors import SignalError
    from toothcomb.decoders.levels import WINDOW, window_starts

    sim = simulate(_soundcard(preset("idle-60-2-vr-soundcard", duration_s=12.0)))
    x = np.array(sim.samples, dtype=np.float64)
    n = len(x)
    starts = window_starts(n)
    bad = int(starts[-3]) + WINDOW + 17  # between two windows, late in the capture
    assert not any(s <= bad < s + WINDOW for s in starts)
    x[bad, 0] = np.nan
    path = tmp_path / "nan.h5"
    write_capture(str(path), x, 48_000.0, ["crank", "cam"])
    with pytest.raises(SignalError) as one:
        decode_capture(str(path), DecodeOptions(worker_process=False, block_size=4096))
    assert forks == []
    with pytest.raises(SignalError) as two:
        decode_capture(str(path), DecodeOptions(block_size=4096))
    ((channels, start),) = forks
    assert channels == (0,) and start < bad
    assert str(two.value) == str(one.value)
    assert f"first at sample {bad}" in str(one.value)
    assert _no_child_left()


def test_sources_that_cannot_start_later_keep_their_front_ends():
    class Plain:
        def code_blocks(self, block_size):
            return iter(())

    assert worker_mod.starts_anywhere(Plain()) is False
    assert worker_mod.starts_anywhere(object()) is False


def test_the_progress_bar_runs_no_thread_of_its_own():
    """The bar is drawn from the decode's calls: with it on screen, the decode may still fork."""
    import io

    from rich.console import Console
    from toothcomb.cli.progress import StageProgress

    before = threading.active_count()
    con = Console(file=io.StringIO(), force_terminal=True, width=60)
    with StageProgress(con) as bar:
        bar("edges", 5, 10)
        assert bar.shown
        assert threading.active_count() == before
        bar("edges", 10, 10)
    assert "edges" in con.file.getvalue()


def test_one_process_on_the_command_line_and_in_a_batch(tmp_path, monkeypatch):
    from toothcomb.cli.main import build_parser, decode_options
    from toothcomb.decoders import batch, pipeline

    args = build_parser().parse_args(["decode", "x.wav", "--one-process"])
    assert decode_options(args).worker_process is False
    args = build_parser().parse_args(["decode", "x.wav"])
    assert decode_options(args).worker_process is True
    seen = []
    monkeypatch.setattr(pipeline, "decode_capture", lambda p, o: seen.append(o) or 1 / 0)
    batch.decode_one("x.wav", batch.BatchOptions())
    assert [o.worker_process for o in seen] == [False]
