"""The level-statistics pass, checked against numpy on the same samples."""

from __future__ import annotations

import math
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from toothcomb.decoders import levels as levels_mod
from toothcomb.decoders.errors import SignalError
from toothcomb.decoders.levels import check_finite, measure_levels, subsample_step
from toothcomb.decoders.model import Block, CaptureInfo, ChannelLevels
from toothcomb.decoders.readers import open_capture
from toothcomb.decoders.readers.write import write_capture

RNG = np.random.default_rng(2718)
POINTS = ChannelLevels.POINTS


class ArraySource:
    """A capture held in memory, streamed like a file."""

    def __init__(self, data: np.ndarray, rate: float = 10_000.0) -> None:
        self.data = np.asarray(data, dtype=np.float64)
        names = tuple(f"ch{i}" for i in range(self.data.shape[1]))
        self.info = CaptureInfo("memory", rate, self.data.shape[0], names, "memory")

    def blocks(self, block_size: int = 65536) -> Iterator[Block]:
        for start in range(0, self.data.shape[0], block_size):
            yield Block(start, self.data[start : start + block_size])

    def close(self) -> None:
        pass

    def __enter__(self) -> ArraySource:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _expected(x: np.ndarray, k: int) -> dict[str, object]:
    """The figures measure_levels must give, computed with numpy on the whole channel."""
    sub = x[::k]
    idx = np.arange(0, x.size, k)
    idx = idx[idx >= 1]
    diffs = np.abs(x[idx] - x[idx - 1])
    return {
        "n": x.size,
        "minimum": float(np.min(x)),
        "maximum": float(np.max(x)),
        # source: numpy documentation, numpy.mean / numpy.std (ddof=0) / numpy.percentile
        "mean": float(np.mean(x)),
        "std": float(np.std(x)),
        "percentiles": tuple(float(p) for p in np.percentile(sub, POINTS)),
        "noise": float(np.median(diffs)) / (0.6745 * math.sqrt(2)),
        "subsample": sub.size,
    }


def _check(lv: ChannelLevels, x: np.ndarray, k: int) -> None:
    e = _expected(x, k)
    assert lv.n == e["n"]
    assert lv.minimum == e["minimum"] and lv.maximum == e["maximum"]
    assert lv.mean == pytest.approx(e["mean"], rel=1e-12, abs=1e-12)
    assert lv.std == pytest.approx(e["std"], rel=1e-12)
    assert lv.percentiles == e["percentiles"]  # the same subsample: exactly the same numbers
    assert lv.noise == e["noise"]
    assert lv.subsample == e["subsample"]
    assert lv.non_finite == 0 and lv.first_non_finite is None


def _capture(n: int = 150_001) -> np.ndarray:
    t = np.arange(n) / 10_000.0
    crank = np.where(np.sin(2 * np.pi * 360 * t) > 0, 4.8, 0.2) + RNG.normal(0, 0.02, n)
    cam = 3.0 * np.sin(2 * np.pi * 6 * t) + RNG.normal(0, 0.1, n)
    offset = 1e6 + RNG.normal(0, 1e-3, n)  # a large offset: the mean/std update must hold up
    return np.column_stack([crank, cam, offset])


def test_levels_match_numpy() -> None:
    x = _capture()
    result = measure_levels(ArraySource(x), block_size=10_000)
    assert [lv.name for lv in result] == ["ch0", "ch1", "ch2"]
    for j, lv in enumerate(result):
        _check(lv, x[:, j], k=1)


def test_levels_through_a_real_reader(tmp_path: Path) -> None:
    x = _capture(40_000)
    write_capture(tmp_path / "c.h5", x, 10_000.0, ["crank", "cam", "dc"])
    with open_capture(tmp_path / "c.h5") as src:
        result = measure_levels(src, block_size=3333)
    assert [lv.name for lv in result] == ["crank", "cam", "dc"]
    for j, lv in enumerate(result):
        _check(lv, x[:, j], k=1)


def test_results_identical_for_any_block_size() -> None:
    x = _capture()
    runs = [measure_levels(ArraySource(x), block_size=b) for b in (65536, 4096, 9973, 150_001)]
    for other in runs[1:]:
        assert other == runs[0]


def test_subsample_every_kth_sample(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(levels_mod, "SUBSAMPLE_TARGET", 20_000)
    x = _capture(100_003)
    k = subsample_step(x.shape[0])
    assert k == 6  # ceil(100 003 / 20 000)
    a = measure_levels(ArraySource(x), block_size=7001)
    b = measure_levels(ArraySource(x), block_size=65536)
    assert a == b
    for j, lv in enumerate(a):
        _check(lv, x[:, j], k=k)
        assert lv.subsample == 16_668  # indices 0, 6, ..., 100 002


def test_noise_of_white_gaussian_noise_is_its_sigma() -> None:
    sigma = 0.05
    x = RNG.normal(1.0, sigma, size=(200_000, 1))
    (lv,) = measure_levels(ArraySource(x))
    # source: scipy.stats.median_abs_deviation documentation, scale="normal" = 0.67449; the
    # difference of two independent N(0, s^2) samples is N(0, 2 s^2)
    assert lv.noise == pytest.approx(sigma, rel=0.02)


def test_clipped_fraction() -> None:
    n = 100_000
    t = np.arange(n) / n
    sine = np.sin(2 * np.pi * 50 * t + 0.1)
    clipped_top = np.minimum(1.2 * sine, 1.0)
    square = np.where(sine > 0, 5.0, 0.0)
    rare = sine.copy()
    rare[:5] = 2.0  # 5 samples at the maximum: 0.005 %, below the 0.1 % a flat top needs
    flat = np.full(n, 0.7)
    x = np.column_stack([sine, clipped_top, square, rare, flat])
    res = measure_levels(ArraySource(x), block_size=12_345)
    assert res[0].clipped_fraction == 0.0
    assert res[1].clipped_fraction == np.count_nonzero(clipped_top == 1.0) / n
    assert res[1].clipped_fraction > 0.1
    assert res[2].clipped_fraction == 1.0  # every sample sits at one of the two rails
    assert res[3].clipped_fraction == 0.0
    assert res[4].clipped_fraction == 1.0 and res[4].std == 0.0


def test_non_finite_samples_are_counted_and_skipped() -> None:
    x = _capture(50_000)[:, :2].copy()
    x[1234, 1] = np.nan
    x[40_000:40_010, 1] = np.inf
    x[49_999, 1] = -np.inf
    res = measure_levels(ArraySource(x), block_size=3000)
    assert res[0].non_finite == 0 and res[0].first_non_finite is None
    lv = res[1]
    assert lv.non_finite == 12 and lv.first_non_finite == 1234
    good = x[:, 1][np.isfinite(x[:, 1])]
    assert lv.n == good.size == 49_988
    # source: numpy documentation, numpy.mean / numpy.std
    assert lv.mean == pytest.approx(np.mean(good), rel=1e-12)
    assert lv.std == pytest.approx(np.std(good), rel=1e-12)
    assert lv.minimum == np.min(good) and lv.maximum == np.max(good)
    sub = x[:, 1]
    assert lv.percentiles == tuple(np.percentile(sub[np.isfinite(sub)], POINTS))
    with pytest.raises(SignalError) as err:
        check_finite(res, sample_rate=10_000.0)
    assert str(err.value) == (
        "channel 'ch1' has 12 NaN or infinite samples (first at sample 1234, t = 0.1234 s); "
        "repair the capture or record it again"
    )
    check_finite(res[:1])  # a clean channel passes


def test_all_nan_channel() -> None:
    x = np.column_stack([np.arange(10.0), np.full(10, np.nan)])
    ok, bad = measure_levels(ArraySource(x))
    assert ok.n == 10 and ok.mean == 4.5
    assert bad.n == 0 and bad.non_finite == 10 and bad.first_non_finite == 0
    assert math.isnan(bad.mean) and math.isnan(bad.std) and math.isnan(bad.noise)
    assert all(math.isnan(p) for p in bad.percentiles)
    assert bad.clipped_fraction == 0.0 and bad.subsample == 0
    with pytest.raises(SignalError, match="channel 'ch1' has 10 NaN or infinite samples"):
        check_finite((ok, bad))


def test_progress_is_reported_per_block() -> None:
    x = np.zeros((10_000, 1))
    calls: list[tuple[int, int]] = []
    measure_levels(ArraySource(x), block_size=3000, progress=lambda d, t: calls.append((d, t)))
    assert calls == [(3000, 10_000), (6000, 10_000), (9000, 10_000), (10_000, 10_000)]


def test_empty_capture_and_single_sample() -> None:
    (lv,) = measure_levels(ArraySource(np.zeros((0, 1))))
    assert lv.n == 0 and math.isnan(lv.minimum) and lv.subsample == 0
    (one,) = measure_levels(ArraySource(np.array([[2.5]])))
    assert one.n == 1 and one.mean == 2.5 and one.std == 0.0
    assert one.percentiles == (2.5,) * len(POINTS)
    assert math.isnan(one.noise)  # no sample before the first one



def test_subsample_across_cells_matches_numpy() -> None:
    """Every 3rd sample (700 003 samples): cells of 65 536 samples start at each of the three
    offsets from the subsample grid, so a cell's first taken sample is its first sample (its
    difference then reaches into the cell before) or a later one."""
    x = _capture(700_003)[:, :2]
    k = subsample_step(x.shape[0])
    assert k == 3  # ceil(700 003 / 2**18)
    assert {(-m * levels_mod.CELL) % k for m in range(3)} == {0, 1, 2}
    for block in (4096, 65536):
        for j, lv in enumerate(measure_levels(ArraySource(x), block_size=block)):
            _check(lv, x[:, j], k=k)
