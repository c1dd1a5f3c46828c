"""open_capture, the audio reader, and what every reader shares (block-size invariance, close)."""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import pytest
import soundfile as sf
from toothcomb.decoders.errors import CaptureError, UsageError
from toothcomb.decoders.model import CaptureSource
from toothcomb.decoders.readers import open_capture, supported_formats
from toothcomb.decoders.readers.base import split_dataset_path
from toothcomb.decoders.readers.write import write_capture

RNG = np.random.default_rng(20240611)


def _all(src: CaptureSource, block_size: int) -> np.ndarray:
    blocks = list(src.blocks(block_size))
    starts = [b.start for b in blocks]
    assert starts == list(range(0, src.info.n_samples, block_size))
    assert all(b.data.dtype == np.float64 for b in blocks)
    assert all(b.data.shape[1] == src.info.n_channels for b in blocks)
    return np.concatenate([b.data for b in blocks])


def _signal(n: int, channels: int, peak: float = 0.9) -> np.ndarray:
    return RNG.uniform(-peak, peak, size=(n, channels))


# ---------------------------------------------------------------------------------- audio


AUDIO_CASES = [
    ("WAV", "PCM_16", ".wav"),
    ("WAV", "PCM_24", ".wav"),
    ("WAV", "FLOAT", ".wav"),
    ("FLAC", "PCM_16", ".flac"),
    ("FLAC", "PCM_24", ".flac"),
]


@pytest.mark.parametrize("fmt,subtype,suffix", AUDIO_CASES)
@pytest.mark.parametrize("channels", [1, 2, 3])
def test_audio_matches_soundfile(
    tmp_path: Path, fmt: str, subtype: str, suffix: str, channels: int
) -> None:
    path = tmp_path / f"capture{suffix}"
    sf.write(path, _signal(5003, channels), 44100, format=fmt, subtype=subtype)
    # source: python-soundfile documentation, soundfile.read(dtype='float64') returns the
    # samples scaled to -1.0..1.0 for PCM and as stored for float files
    expected, rate = sf.read(path, dtype="float64", always_2d=True)
    with open_capture(str(path)) as src:
        info = src.info
        got = _all(src, 1000)
    assert np.array_equal(got, expected)
    assert info.sample_rate == float(rate) == 44100.0
    assert info.n_samples == 5003
    assert info.channels == tuple(f"ch{i}" for i in range(channels))
    assert info.format == fmt.lower()
    assert info.subtype == subtype
    if subtype.startswith("PCM"):
        assert info.full_scale == (1.0,) * channels
    else:
        assert all(np.isnan(info.full_scale))


def test_float_audio_is_libsndfiles_float64_to_the_bit(tmp_path: Path) -> None:
    """32-bit float samples are read as stored and widened by numpy: every bit as libsndfile's
    own float64 read gives them, signed zeros, values beyond 1, subnormals and infinities too."""
    odd = [0.0, -0.0, 1.5, -3.25, 1e-40, -1e-45, 3.4e38, -np.inf, np.inf, 0.1, 1 / 3]
    x = np.concatenate([np.array(odd * 2).reshape(-1, 2), _signal(3001, 2, peak=4.0)])
    path = tmp_path / "float.wav"
    sf.write(path, x.astype(np.float32), 48000, subtype="FLOAT")
    # source: python-soundfile / libsndfile, soundfile.read(dtype="float64") of a float file
    expected, _ = sf.read(path, dtype="float64", always_2d=True)
    with open_capture(str(path)) as src:
        got = _all(src, 777)
        later = np.concatenate([b.data for b in src.blocks_from(777, start=777 * 2)])
    assert np.array_equal(got.view(np.uint64), expected.view(np.uint64))
    assert np.array_equal(later.view(np.uint64), expected[777 * 2 :].view(np.uint64))


def test_aiff_and_ogg_open(tmp_path: Path) -> None:
    x = _signal(2000, 2, 0.5)
    for name, fmt, subtype in (("a.aiff", "AIFF", "PCM_16"), ("a.ogg", "OGG", "VORBIS")):
        sf.write(tmp_path / name, x, 8000, format=fmt, subtype=subtype)
        # source: python-soundfile documentation (soundfile.read)
        expected, _ = sf.read(tmp_path / name, dtype="float64", always_2d=True)
        with open_capture(tmp_path / name) as src:
            assert src.info.format == fmt.lower()
            assert np.array_equal(_all(src, 333), expected)


def test_audio_cut_in_data_chunk_is_refused_naming_both_counts(tmp_path: Path) -> None:
    path = tmp_path / "cut.wav"
    sf.write(path, _signal(1000, 2), 48000, subtype="PCM_16")
    raw = path.read_bytes()
    header = len(raw) - 1000 * 4  # 2 channels x 2 bytes per frame
    path.write_bytes(raw[: header + 400 * 4 + 2])  # 400 whole frames and half of the next
    # source: python-soundfile documentation (soundfile.info): libsndfile itself would take the
    # 400 frames there are without a word, which is why the reader checks the header first
    assert sf.info(str(path)).frames == 400
    with pytest.raises(CaptureError) as err:
        open_capture(path)
    assert str(err.value) == (
        f"{path}: the WAV header announces 1000 frames but the file holds only 400; it is "
        "truncated (or its header is wrong): copy it again, or re-save it with an audio editor "
        "to keep the 400 frames there are"
    )


def test_audio_garbage_header_is_a_capture_error(tmp_path: Path) -> None:
    riff = tmp_path / "bad.wav"
    riff.write_bytes(b"RIFF" + bytes(range(256)) * 4)
    with pytest.raises(CaptureError, match=r"bad\.wav: cannot be read as audio"):
        open_capture(riff)
    noise = tmp_path / "noise.wav"
    noise.write_bytes(RNG.bytes(5000))
    with pytest.raises(CaptureError, match=r"noise\.wav: does not start like a sound file"):
        open_capture(noise)


def test_flac_cut_short_fails_while_reading(tmp_path: Path) -> None:
    path = tmp_path / "cut.flac"
    sf.write(path, _signal(20000, 1), 48000, subtype="PCM_24")
    raw = path.read_bytes()
    path.write_bytes(raw[: len(raw) // 2])
    with pytest.raises(CaptureError, match="truncated or corrupt") as err:
        with open_capture(path) as src:
            _all(src, 4096)
    assert "\n" not in str(err.value)


def test_audio_sample_rate_override_adds_a_note(tmp_path: Path) -> None:
    path = tmp_path / "a.wav"
    sf.write(path, _signal(100, 1), 48000)
    with open_capture(path, sample_rate=50000) as src:
        assert src.info.sample_rate == 50000.0
        assert any("48000" in n for n in src.info.notes)


# ---------------------------------------------------------------------------- open_capture


def test_missing_directory_and_empty_files(tmp_path: Path) -> None:
    with pytest.raises(CaptureError, match="does not exist"):
        open_capture(tmp_path / "nope.wav")
    with pytest.raises(CaptureError, match="is a folder"):
        open_capture(tmp_path)
    (tmp_path / "empty.csv").write_bytes(b"")
    with pytest.raises(CaptureError, match="is empty"):
        open_capture(tmp_path / "empty.csv")


def test_unknown_format_lists_the_supported_ones(tmp_path: Path) -> None:
    path = tmp_path / "blob.bin"
    path.write_bytes(b"\x00\x01\x02 nothing anyone reads \x00" * 10)
    with pytest.raises(CaptureError) as err:
        open_capture(path)
    msg = str(err.value)
    assert "not a capture format" in msg
    for bit in ("hdf5 (.h5", "audio (.wav", ".flac", "csv (.csv", ".txt"):
        assert bit in msg
    assert msg.endswith(supported_formats())


def test_content_wins_over_suffix(tmp_path: Path) -> None:
    wav_named_csv = tmp_path / "really_audio.csv"
    sf.write(wav_named_csv, _signal(300, 2), 16000, format="WAV", subtype="PCM_16")
    with open_capture(wav_named_csv) as src:
        assert src.info.format == "wav"
    csv_named_dat = tmp_path / "scope.dat"
    csv_named_dat.write_text("time,a\n0.0,1\n0.5,2\n1.0,3\n")
    with open_capture(csv_named_dat) as src:
        assert src.info.format == "csv"
        assert src.info.sample_rate == 2.0


def test_reader_by_name(tmp_path: Path) -> None:
    path = tmp_path / "odd.name"
    path.write_text("1,2\n3,4\n5,6\n")
    with open_capture(path, reader="csv", sample_rate=10) as src:
        assert src.info.n_samples == 3
    with pytest.raises(UsageError, match="there is no reader 'midi'; choose one of audio, csv"):
        open_capture(path, reader="midi")


def test_bad_sample_rate_and_bad_option(tmp_path: Path) -> None:
    path = tmp_path / "a.csv"
    path.write_text("1,2\n3,4\n")
    with pytest.raises(UsageError, match="positive"):
        open_capture(path, sample_rate=-5)
    with pytest.raises(UsageError, match="not a number"):
        open_capture(path, sample_rate="fast")
    with pytest.raises(UsageError, match="does not take the option"):
        open_capture(path, sample_rate=10, colour="blue")


def test_info_path_is_the_string_given(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    write_capture("run.h5", np.zeros((10, 2)), 1000.0, ["a", "b"])
    with open_capture("run.h5:/a") as src:
        assert src.info.path == "run.h5:/a"
        assert src.info.channels == ("a",)
    with open_capture(Path("run.h5")) as src:
        assert src.info.path == "run.h5"


def test_dataset_suffix_only_for_hdf5(tmp_path: Path) -> None:
    path = tmp_path / "a.csv"
    path.write_text("1,2\n3,4\n")
    with pytest.raises(CaptureError, match="only HDF5 files take"):
        open_capture(f"{path}:/x", sample_rate=5)


def test_split_dataset_path(tmp_path: Path) -> None:
    f = tmp_path / "x.h5"
    f.write_bytes(b"1")
    assert split_dataset_path(f"{f}:/grp/ds") == (str(f), "/grp/ds")
    assert split_dataset_path(str(f)) == (str(f), None)
    # a drive letter: the part before the ':' is no file, so nothing is split off
    assert split_dataset_path("C:\\captures\\run.h5") == ("C:\\captures\\run.h5", None)
    assert split_dataset_path(f"{tmp_path}/missing.h5:/a") == (f"{tmp_path}/missing.h5:/a", None)
    # a file whose own name holds ':' stays whole
    colon = tmp_path / "run:2.csv"
    colon.write_text("1\n")
    assert split_dataset_path(str(colon)) == (str(colon), None)


# ------------------------------------------------------------------- shared source behaviour


def _make_sources(tmp_path: Path) -> dict[str, tuple[str, np.ndarray]]:
    """One capture per reader (and layout) with the samples it must deliver."""
    out: dict[str, tuple[str, np.ndarray]] = {}
    x = _signal(10_007, 2)
    sf.write(tmp_path / "a.wav", x, 48000, subtype="PCM_24")
    # source: python-soundfile documentation (soundfile.read)
    out["wav"] = (str(tmp_path / "a.wav"), sf.read(tmp_path / "a.wav", always_2d=True)[0])
    sf.write(tmp_path / "a.flac", x, 48000, subtype="PCM_16")
    # source: python-soundfile documentation (soundfile.read)
    out["flac"] = (str(tmp_path / "a.flac"), sf.read(tmp_path / "a.flac", always_2d=True)[0])
    write_capture(tmp_path / "a.csv", x, 48000.0, ["crank", "cam"])
    parsed = np.array([[float(f"{v:.6g}") for v in row] for row in x])
    out["csv"] = (str(tmp_path / "a.csv"), parsed)
    write_capture(tmp_path / "a.h5", x, 48000.0, ["crank", "cam"])
    out["hdf5"] = (str(tmp_path / "a.h5"), x)
    with h5py.File(tmp_path / "m.h5", "w") as f:
        ds = f.create_dataset("m", data=x.T.astype(np.float32), chunks=(2, 1000))
        ds.attrs["fs"] = 48000.0
    out["hdf5-2d"] = (str(tmp_path / "m.h5"), x.astype(np.float32).astype(np.float64))
    return out


@pytest.mark.parametrize("kind", ["wav", "flac", "csv", "hdf5", "hdf5-2d"])
def test_every_reader_is_block_size_invariant(tmp_path: Path, kind: str) -> None:
    path, expected = _make_sources(tmp_path)[kind]
    with open_capture(path) as src:
        assert src.info.n_samples == expected.shape[0]
        for size in (1, 999, 4096, 65536, 1 << 20):
            if size == 1 and kind != "wav":
                continue  # one case of 10 007 single-sample blocks is enough
            got = _all(src, size)
            assert np.array_equal(got, expected), size


@pytest.mark.parametrize("kind", ["wav", "csv", "hdf5"])
def test_blocks_start_over_interleave_and_close(tmp_path: Path, kind: str) -> None:
    path, expected = _make_sources(tmp_path)[kind]
    src = open_capture(path)
    assert isinstance(src, CaptureSource)
    one = src.blocks(3000)
    two = src.blocks(3000)
    first_a = next(one)
    first_b = next(two)
    assert first_a.start == first_b.start == 0
    assert np.array_equal(first_a.data, first_b.data)
    rest = np.concatenate([first_a.data] + [b.data for b in one])
    assert np.array_equal(rest, expected)
    assert np.array_equal(_all(src, 5000), expected)
    src.close()
    src.close()  # idempotent
    with pytest.raises(CaptureError, match="was closed"):
        next(iter(src.blocks()))
    with open_capture(path) as again:
        assert again.info.n_samples == expected.shape[0]


def test_bad_block_size(tmp_path: Path) -> None:
    path, _ = _make_sources(tmp_path)["wav"]
    with open_capture(path) as src:
        with pytest.raises(UsageError, match="block size 0"):
            src.blocks(0)
        with pytest.raises(UsageError, match="not an integer"):
            src.blocks(2.5)  # type: ignore[arg-type]
