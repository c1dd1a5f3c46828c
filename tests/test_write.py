"""Capture writers: formats, the audio range check, streaming, and atomic replacement."""

from __future__ import annotations

import os
from pathlib import Path

import h5py
import numpy as np
import pytest
import soundfile as sf
from toothcomb.decoders.errors import UsageError
from toothcomb.decoders.readers import open_capture
from toothcomb.decoders.readers.write import open_writer, write_capture

RNG = np.random.default_rng(314)


def _read(path: Path) -> tuple[object, np.ndarray]:
    with open_capture(path) as src:
        return src.info, np.concatenate([b.data for b in src.blocks(4096)])


def _leftovers(folder: Path, keep: set[str]) -> list[str]:
    return sorted(n for n in os.listdir(folder) if n not in keep)


# ------------------------------------------------------------------------------ formats


@pytest.mark.parametrize(
    "name,fmt,subtype,bits",
    [
        ("a.wav", "wav", "PCM_16", 16),
        ("a.flac", "flac", "PCM_24", 24),
        ("a.aiff", "aiff", "PCM_16", 16),
    ],
)
def test_audio_defaults_and_round_trip(
    tmp_path: Path, name: str, fmt: str, subtype: str, bits: int
) -> None:
    x = RNG.uniform(-1.0, 1.0, size=(3001, 2))
    x[0] = [1.0, -1.0]  # full scale itself is allowed
    write_capture(tmp_path / name, x, 44100, ["crank", "cam"])
    # source: python-soundfile documentation (soundfile.info: format, subtype, samplerate)
    meta = sf.info(tmp_path / name)
    assert meta.subtype == subtype and meta.samplerate == 44100 and meta.channels == 2
    info, data = _read(tmp_path / name)
    assert info.format == fmt and info.n_samples == 3001
    # PCM keeps the samples to within one code step: 2 / 2**bits of full scale
    assert np.max(np.abs(data - x)) <= 2.0 / 2**bits


@pytest.mark.parametrize("name,subtype,bits", [("k.wav", "PCM_16", 16), ("k.flac", "PCM_24", 24)])
def test_samples_on_the_pcm_grid_come_back_exactly(
    tmp_path: Path, name: str, subtype: str, bits: int
) -> None:
    q = 2 ** (bits - 1)
    codes = np.concatenate([[-q, -1, 0, 1, q - 1], RNG.integers(-q, q, size=5000)])
    x = (codes / q)[:, None]
    write_capture(tmp_path / name, x, 48000, ["crank"], subtype=subtype)
    _, data = _read(tmp_path / name)
    assert np.array_equal(data, x)


def test_float_wav_is_exact(tmp_path: Path) -> None:
    x = RNG.uniform(-1.0, 1.0, size=(500, 1)).astype(np.float32).astype(np.float64)
    write_capture(tmp_path / "f.wav", x, 8000, ["crank"], subtype="FLOAT")
    _, data = _read(tmp_path / "f.wav")
    assert np.array_equal(data, x)


def test_csv_text_layout(tmp_path: Path) -> None:
    x = np.array([[0.5, -1.25e-7], [123456.789, 4.0]])
    path = tmp_path / "s.csv"
    write_capture(path, x, 48000.0, ["crank", "cam"], units=["V", "mV"], comments=["bench", "x"])
    assert path.read_text().splitlines() == [
        "# bench",
        "# x",
        "# sample rate: 48000.0 Hz",
        "# units: V,mV",
        "time_s,crank,cam",
        "0.000000000,0.5,-1.25e-07",
        "0.000020833,123457,4",
    ]
    info, data = _read(path)
    assert info.sample_rate == 48000.0
    assert info.channels == ("crank", "cam")
    assert info.units == ("V", "mV")
    assert data.tolist() == [[0.5, -1.25e-7], [123457.0, 4.0]]


def test_csv_round_trip_of_a_long_capture_keeps_the_rate(tmp_path: Path) -> None:
    x = RNG.normal(size=(20_000, 3))
    path = tmp_path / "long.txt"
    write_capture(path, x, 48000.0, ["a", "b", "c"])
    info, data = _read(path)
    assert info.sample_rate == 48000.0 and info.format == "csv"
    assert np.allclose(data, x, rtol=5e-6, atol=0)  # %.6g keeps 6 significant digits


def test_hdf5_layout_and_float32(tmp_path: Path) -> None:
    x = RNG.normal(size=(1000, 2))
    path = tmp_path / "h.hdf5"
    write_capture(path, x, 1000.0, ["crank", "cam"], subtype="float32", units="mV")
    with h5py.File(path) as f:
        assert f["crank"].dtype == np.float32
        assert f["crank"].attrs["units"] == "mV"
        assert f["crank"].maxshape == (None,)
    info, data = _read(path)
    assert info.units == ("mV", "mV")
    assert np.array_equal(data, x.astype(np.float32).astype(np.float64))


def test_format_argument_beats_the_suffix(tmp_path: Path) -> None:
    path = tmp_path / "capture.bin"
    write_capture(path, np.zeros((10, 1)), 100.0, ["a"], format="csv")
    assert path.read_text().startswith("# sample rate: 100.0 Hz")
    with pytest.raises(UsageError, match=r"cannot tell the output format from the suffix '\.bin'"):
        write_capture(path, np.zeros((10, 1)), 100.0, ["a"])
    with pytest.raises(UsageError, match="output format 'mp3' is not one toothcomb writes"):
        write_capture(path, np.zeros((10, 1)), 100.0, ["a"], format="mp3")


@pytest.mark.parametrize(
    "kwargs,fragment",
    [
        ({"path": "x.wav", "sample_rate": 44100.5}, "not a whole number"),
        ({"path": "x.csv", "sample_rate": 0}, "positive"),
        ({"path": "x.csv", "channels": ["a,b"]}, "cannot go into a CSV header"),
        ({"path": "x.h5", "channels": ["a/b"]}, "cannot name an HDF5 dataset"),
        ({"path": "x.csv", "channels": ["a", "a"]}, "must differ"),
        ({"path": "x.csv", "data": np.zeros((5, 3))}, "do not fit 1 channel"),
        ({"path": "x.flac", "subtype": "FLOAT"}, "does not fit flac"),
        ({"path": "x.csv", "subtype": "PCM_16"}, "takes no subtype"),
        ({"path": "x.csv", "units": ["V", "V"]}, "2 units given for 1 channels"),
        ({"path": "x.csv", "data": np.zeros((0, 1))}, "no samples were written"),
    ],
)
def test_bad_arguments(tmp_path: Path, kwargs: dict, fragment: str) -> None:
    args = {"data": np.zeros((5, 1)), "sample_rate": 100.0, "channels": ["a"], **kwargs}
    args["path"] = tmp_path / args["path"]
    with pytest.raises(UsageError, match=fragment):
        write_capture(**args)
    assert _leftovers(tmp_path, set()) == []


# --------------------------------------------------------------------- audio range check


def test_audio_range_check_names_channel_and_peak(tmp_path: Path) -> None:
    x = np.zeros((100, 3))
    x[42, 1] = -1.5
    with pytest.raises(ValueError, match=r"channel 'cam' peaks at 1\.5, outside the \+-1\.0"):
        write_capture(tmp_path / "a.wav", x, 48000, ["crank", "cam", "cam2"])
    x[42, 1] = np.nan
    with pytest.raises(ValueError, match="channel 'cam' holds NaN"):
        write_capture(tmp_path / "a.flac", x, 48000, ["crank", "cam", "cam2"])
    assert _leftovers(tmp_path, set()) == []
    # the same samples are fine where there is no full scale
    x[42, 1] = -1.5
    write_capture(tmp_path / "a.csv", x, 48000, ["crank", "cam", "cam2"])
    assert _read(tmp_path / "a.csv")[1][42, 1] == -1.5


# ------------------------------------------------------------------------------ streaming


@pytest.mark.parametrize("name", ["s.wav", "s.flac", "s.csv", "s.h5"])
def test_streaming_equals_writing_at_once(tmp_path: Path, name: str) -> None:
    x = RNG.uniform(-0.99, 0.99, size=(10_000, 2))
    whole = tmp_path / ("whole_" + name)
    write_capture(whole, x, 16000, ["a", "b"])
    streamed = tmp_path / name
    with open_writer(streamed, 16000, ["a", "b"]) as w:
        for piece in np.array_split(x, [1, 1000, 1001, 7777]):
            w.write(piece)
        assert not streamed.exists()  # nothing at the target until close
    assert w.n_written == 10_000
    _, a = _read(whole)
    _, b = _read(streamed)
    assert np.array_equal(a, b)
    if name.endswith(".csv"):
        assert whole.read_bytes() == streamed.read_bytes()


def test_single_channel_takes_a_1d_array(tmp_path: Path) -> None:
    write_capture(tmp_path / "one.h5", np.arange(5.0), 10.0, ["crank"])
    assert _read(tmp_path / "one.h5")[1][:, 0].tolist() == [0, 1, 2, 3, 4]


# ------------------------------------------------------------------------------- atomicity


@pytest.mark.parametrize("name", ["t.wav", "t.csv", "t.h5"])
def test_failed_write_leaves_target_untouched_and_no_temp_files(tmp_path: Path, name: str) -> None:
    target = tmp_path / name
    write_capture(target, np.full((50, 1), 0.25), 1000, ["a"])
    before = target.read_bytes()
    bad = np.full((50, 1), 0.5)
    bad[-1] = 3.0 if name.endswith(".wav") else 0.5
    if name.endswith(".wav"):
        with pytest.raises(ValueError, match="peaks at 3"):
            write_capture(target, bad, 1000, ["a"])
    with pytest.raises(RuntimeError, match="disk unplugged"):
        with open_writer(target, 1000, ["a"]) as w:
            w.write(np.full((20, 1), 0.75))
            raise RuntimeError("disk unplugged")
    with pytest.raises(UsageError):
        with open_writer(target, 1000, ["a"]) as w:
            w.write(np.full((20, 1), 0.75))
            w.write(np.zeros((5, 2)))  # wrong shape: the writer discards its output
    assert target.read_bytes() == before
    assert _leftovers(tmp_path, {name}) == []


def test_writer_after_close_and_abort(tmp_path: Path) -> None:
    w = open_writer(tmp_path / "c.csv", 10.0, ["a"])
    w.write(np.zeros(3))
    w.close()
    w.close()  # idempotent
    with pytest.raises(UsageError, match="already closed"):
        w.write(np.zeros(3))
    assert (tmp_path / "c.csv").exists()
    w2 = open_writer(tmp_path / "d.h5", 10.0, ["a"])
    w2.write(np.zeros(3))
    w2.abort()
    assert _leftovers(tmp_path, {"c.csv"}) == []


def test_new_file_permissions_follow_the_umask(tmp_path: Path) -> None:
    mask = os.umask(0o022)
    try:
        write_capture(tmp_path / "p.csv", np.zeros((3, 1)), 10.0, ["a"])
    finally:
        os.umask(mask)
    assert (tmp_path / "p.csv").stat().st_mode & 0o777 == 0o644


def test_input_array_and_open_input_file_are_not_modified(tmp_path: Path) -> None:
    x = RNG.uniform(-0.5, 0.5, size=(100, 2))
    copy = x.copy()
    path = tmp_path / "in.h5"
    write_capture(path, x, 100.0, ["a", "b"])
    assert np.array_equal(x, copy)
    with open_capture(path) as src:
        first = next(iter(src.blocks(50))).data.copy()
        write_capture(path, np.zeros((10, 2)), 100.0, ["a", "b"])  # replaced underneath
        again = next(iter(src.blocks(50))).data
    assert np.array_equal(first, x[:50]) and np.array_equal(again, x[:50])
    assert _read(path)[1].shape == (10, 2)
