"""The HDF5 reader: toothcomb's own layout, generic files, dataset paths and its errors."""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import pytest
from toothcomb.decoders.errors import CaptureError
from toothcomb.decoders.readers import open_capture
from toothcomb.decoders.readers.hdf5 import FORMAT_NAME, Hdf5Reader
from toothcomb.decoders.readers.write import write_capture

RNG = np.random.default_rng(99)


def _read(path: object, block_size: int = 700, **kw: object) -> tuple[object, np.ndarray]:
    with open_capture(path, **kw) as src:  # type: ignore[arg-type]
        data = np.concatenate([b.data for b in src.blocks(block_size)])
        return src.info, data


def test_own_layout_round_trip(tmp_path: Path) -> None:
    x = RNG.normal(size=(70_001, 3)) * [1.0, 5.0, 0.01]
    path = tmp_path / "run.h5"
    write_capture(
        path, x, 96000.0, ["crank", "cam_in", "cam_ex"], units=["V", "V", "mV"], comments=["a"]
    )
    info, data = _read(path)
    assert np.array_equal(data, x)
    assert info.sample_rate == 96000.0
    assert info.channels == ("crank", "cam_in", "cam_ex")
    assert info.units == ("V", "V", "mV")
    assert info.format == "hdf5" and info.subtype == "float64"
    with h5py.File(path) as f:
        assert f.attrs["format"] == FORMAT_NAME
        assert int(f.attrs["format_version"]) == 1
        assert list(f.attrs["comments"]) == ["a"]
        assert f["crank"].compression == "gzip" and f["crank"].chunks is not None


def test_own_layout_t0_and_channel_order(tmp_path: Path) -> None:
    path = tmp_path / "own.h5"
    with h5py.File(path, "w") as f:
        f.attrs.update(
            format=FORMAT_NAME, format_version=1, sample_rate=1000.0, t0=-0.25,
            channel_names=np.array(["zeta", "alpha"], dtype=h5py.string_dtype()),
        )  # fmt: skip
        f["alpha"] = np.arange(5.0)
        f["zeta"] = -np.arange(5.0)
        f["alpha"].attrs["units"] = "A"
    info, data = _read(path)
    assert info.channels == ("zeta", "alpha")
    assert info.units == ("", "A")
    assert info.t0 == -0.25
    assert data[:, 0].tolist() == [0, -1, -2, -3, -4]


def test_own_layout_of_another_version(tmp_path: Path) -> None:
    path = tmp_path / "v2.h5"
    with h5py.File(path, "w") as f:
        f.attrs.update(format=FORMAT_NAME, format_version=2, sample_rate=10.0)
        f["a"] = np.zeros(4)
    with pytest.raises(CaptureError, match="format_version 2; this toothcomb reads version 1"):
        open_capture(path)


def test_generic_root_datasets_with_fs_and_integers(tmp_path: Path) -> None:
    path = tmp_path / "gen.h5"
    a = RNG.integers(-32768, 32767, size=1000).astype(np.int16)
    b = RNG.normal(size=1000).astype(np.float32)
    with h5py.File(path, "w") as f:
        f.attrs["fs"] = 20000
        f["a"] = a
        f["b"] = b
    info, data = _read(path, block_size=333)
    assert info.sample_rate == 20000.0
    assert info.channels == ("a", "b")
    assert info.subtype == "float32/int16"
    assert np.array_equal(data[:, 0], a.astype(np.float64))  # as stored, no scaling
    assert np.array_equal(data[:, 1], b.astype(np.float64))


@pytest.mark.parametrize(
    "where,attr,value,rate",
    [
        ("dataset", "sample_rate", 5000.0, 5000.0),
        ("group", "SampleRate", 5000, 5000.0),
        ("root", "Sampling_Rate", np.array([5000.0]), 5000.0),
        ("group", "rate", 8000.0, 8000.0),
        ("dataset", "dt", 1e-4, 10000.0),
        ("root", "sample_interval", 2e-5, 50000.0),
        ("group", "X_INCREMENT", 4e-6, 250000.0),
    ],
)
def test_rate_attribute_spellings_and_places(
    tmp_path: Path, where: str, attr: str, value: object, rate: float
) -> None:
    path = tmp_path / "r.h5"
    with h5py.File(path, "w") as f:
        g = f.create_group("scope")
        for name in ("ch_a", "ch_b"):
            g[name] = np.zeros(50)
        target = {"dataset": g["ch_a"], "group": g, "root": f}[where]
        target.attrs[attr] = value
    info, _ = _read(path)
    assert info.sample_rate == rate
    assert info.channels == ("ch_a", "ch_b")


def test_channel_names_attribute_orders_a_group(tmp_path: Path) -> None:
    path = tmp_path / "o.h5"
    with h5py.File(path, "w") as f:
        g = f.create_group("capture")
        g.attrs["fs"] = 100.0
        g.attrs["channel_names"] = ["cam", "crank"]
        g["crank"] = np.ones(10)
        g["cam"] = np.zeros(10)
    info, data = _read(path)
    assert info.channels == ("cam", "crank")
    assert data[0].tolist() == [0.0, 1.0]


@pytest.mark.parametrize("transpose", [False, True])
def test_2d_dataset_by_path(tmp_path: Path, transpose: bool) -> None:
    x = RNG.normal(size=(5000, 3))
    path = tmp_path / "m.h5"
    with h5py.File(path, "w") as f:
        g = f.create_group("acq")
        ds = g.create_dataset("samples", data=x.T if transpose else x, chunks=True)
        ds.attrs["channel_names"] = ["crank", "cam1", "cam2"]
        g.attrs["dt"] = 1 / 40000
        g["other"] = np.zeros((7, 9))
    info, data = _read(f"{path}:/acq/samples", block_size=999)
    assert info.path == f"{path}:/acq/samples"
    assert info.channels == ("crank", "cam1", "cam2")
    assert info.sample_rate == 40000.0
    assert np.array_equal(data, x)


def test_1d_dataset_and_group_by_path(tmp_path: Path) -> None:
    path = tmp_path / "p.h5"
    with h5py.File(path, "w") as f:
        for name, n in (("run1", 100), ("run2", 200)):
            g = f.create_group(name)
            g.attrs["sample_rate"] = 1000.0
            g["x"] = np.arange(n, dtype=np.float64)
            g["y"] = np.arange(n, dtype=np.float64) * 2
    info, data = _read(f"{path}:/run2/y")
    assert info.channels == ("y",) and info.n_samples == 200
    assert data[-1, 0] == 398.0
    info, data = _read(f"{path}:run1")  # the leading '/' may be left out
    assert info.channels == ("x", "y") and info.n_samples == 100
    info, _ = _read(path, reader="hdf5", dataset="/run1")
    assert info.n_samples == 100


def test_missing_rate(tmp_path: Path) -> None:
    path = tmp_path / "n.h5"
    with h5py.File(path, "w") as f:
        f["x"] = np.zeros(50)
    with pytest.raises(CaptureError, match=r"gives no sample rate .*; pass --sample-rate"):
        open_capture(path)
    info, _ = _read(path, sample_rate=123.0)
    assert info.sample_rate == 123.0


def test_given_rate_overrides_the_file_with_a_note(tmp_path: Path) -> None:
    path = tmp_path / "g.h5"
    write_capture(path, np.zeros((10, 1)), 1000.0, ["a"])
    info, _ = _read(path, sample_rate=2000.0)
    assert info.sample_rate == 2000.0
    assert info.notes == ("sample rate 2000 Hz given overrides 1000 Hz from /@sample_rate",)


def test_ambiguous_file_lists_the_candidates(tmp_path: Path) -> None:
    path = tmp_path / "two.h5"
    with h5py.File(path, "w") as f:
        for name, n in (("run1", 50), ("run2", 60)):
            g = f.create_group(name)
            g.attrs["dt"] = 1e-4
            g["x"] = np.zeros(n)
        f["matrix"] = np.zeros((3, 1000))
    with pytest.raises(CaptureError) as err:
        open_capture(path)
    msg = str(err.value)
    for bit in (
        "holds several possible captures",
        "/run1 (1 channel of 50 samples)",
        "/run2 (1 channel of 60 samples)",
        "/matrix (3 channels of 1000 samples)",
        "pick one as two.h5:/",
    ):
        assert bit in msg
    with pytest.raises(CaptureError, match=r"there is no /nope in the file \(it has /matrix"):
        open_capture(f"{path}:/nope")


def test_time_axis_gives_rate_and_t0(tmp_path: Path) -> None:
    path = tmp_path / "t.h5"
    with h5py.File(path, "w") as f:
        f["time"] = 0.5 + np.arange(300) / 2000
        f["v"] = np.ones(300)
    info, data = _read(path)
    assert info.channels == ("v",)
    assert info.sample_rate == 2000.0 and info.t0 == 0.5
    assert data.shape == (300, 1)
    with h5py.File(path, "a") as f:
        t = f["time"][...]
        t[100:] += 0.01
        f["time"][...] = t
    with pytest.raises(CaptureError, match="time axis /time is irregular at index 100"):
        open_capture(path)


def test_unequal_lengths_in_a_group(tmp_path: Path) -> None:
    path = tmp_path / "u.h5"
    with h5py.File(path, "w") as f:
        g = f.create_group("g")
        g["a"] = np.zeros(10)
        g["b"] = np.zeros(11)
    with pytest.raises(CaptureError, match="differ in length"):
        open_capture(f"{path}:/g", sample_rate=10)


def test_3d_and_text_datasets_are_refused(tmp_path: Path) -> None:
    path = tmp_path / "odd.h5"
    with h5py.File(path, "w") as f:
        f["cube"] = np.zeros((2, 3, 4))
        f["label"] = "not numbers"
    with pytest.raises(CaptureError, match="3 dimensions"):
        open_capture(f"{path}:/cube", sample_rate=10)
    with pytest.raises(CaptureError, match="not numbers"):
        open_capture(f"{path}:/label", sample_rate=10)


def test_truncated_file_is_a_capture_error(tmp_path: Path) -> None:
    path = tmp_path / "t.h5"
    write_capture(path, RNG.normal(size=(50_000, 2)), 1000.0, ["a", "b"])
    raw = path.read_bytes()
    path.write_bytes(raw[: len(raw) // 2])
    with pytest.raises(CaptureError) as err:
        with open_capture(path) as src:
            for _ in src.blocks():
                pass
    assert str(err.value).startswith(f"{path}")
    assert "\n" not in str(err.value)


def test_detect_sniffs_the_signature_even_after_a_user_block(tmp_path: Path) -> None:
    path = tmp_path / "ub.bin"
    with h5py.File(path, "w", userblock_size=1024) as f:
        f.attrs["fs"] = 10.0
        f["x"] = np.arange(20.0)
    assert Hdf5Reader.detect(path)
    info, data = _read(path)
    assert info.format == "hdf5" and data[:, 0].tolist() == list(range(20))
    other = tmp_path / "plain.csv"
    other.write_text("1,2\n")
    assert not Hdf5Reader.detect(other)
