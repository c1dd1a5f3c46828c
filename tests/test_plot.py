"""Plots: file format, atomic writing, panel content, and a clear error without matplotlib."""

from __future__ import annotations

import importlib.util
import struct
import sys
from pathlib import Path

import numpy as np
import pytest
from toothcomb.cli.main import main
from toothcomb.cli.plot import (
    MISSING_MATPLOTLIB,
    build_figure,
    plot_format,
    plot_result,
    require_matplotlib,
)
from toothcomb.decoders import pipeline
from toothcomb.decoders.errors import UsageError

try:
    from test_cli import FakeDecoder
    from test_report import make_result
except ImportError:  # tests collected as a package
    from tests.test_cli import FakeDecoder
    from tests.test_report import make_result

HAVE_MATPLOTLIB = importlib.util.find_spec("matplotlib") is not None

# source: PNG specification (ISO/IEC 15948), 5.2 PNG signature
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def test_png_file_when_matplotlib_is_installed(tmp_path: Path) -> None:
    target = tmp_path / "run.png"
    if not HAVE_MATPLOTLIB:
        with pytest.raises(UsageError, match=r"pip install 'toothcomb\[plot\]'"):
            plot_result(make_result(), target)
        assert not target.exists()
        return
    plot_result(make_result(), target, dpi=50)
    data = target.read_bytes()
    assert data[:8] == PNG_SIGNATURE
    # IHDR is the first chunk: length, type, then width and height as big-endian uint32
    # source: PNG specification (ISO/IEC 15948), 11.2.2 IHDR
    assert data[12:16] == b"IHDR"
    width, height = struct.unpack(">II", data[16:24])
    assert (width, height) == (10 * 50, 9 * 50)  # figure 10 x 9 inches at 50 dpi
    assert [p.name for p in tmp_path.iterdir()] == ["run.png"]


def test_svg_by_suffix(tmp_path: Path) -> None:
    if not HAVE_MATPLOTLIB:
        with pytest.raises(UsageError):
            plot_result(make_result(), tmp_path / "run.svg")
        return
    plot_result(make_result(), tmp_path / "run.svg")
    head = (tmp_path / "run.svg").read_text()[:400]
    assert "<svg" in head


@pytest.mark.parametrize(
    ("name", "expected"),
    [("a.png", "png"), ("A.PNG", "png"), ("b.svg", "svg"), ("c.pdf", "pdf")],
)
def test_plot_format_by_suffix(name: str, expected: str) -> None:
    assert plot_format(name) == expected


@pytest.mark.parametrize(("name", "shown"), [("a.jpg", "'.jpg'"), ("plot", "'(none)'")])
def test_plot_format_rejects_other_suffixes(name: str, shown: str) -> None:
    with pytest.raises(UsageError) as info:
        plot_format(name)
    assert str(info.value) == (f"plot file {name!r} has the suffix {shown}; use .png, .svg or .pdf")


def test_missing_matplotlib_is_a_usage_error(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import now raises ImportError
    with pytest.raises(UsageError) as info:
        require_matplotlib()
    assert str(info.value) == "plots need matplotlib: pip install 'toothcomb[plot]'"
    assert str(info.value) == MISSING_MATPLOTLIB


def test_cli_plot_without_matplotlib_fails_before_decoding(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    capture = tmp_path / "run.wav"
    capture.write_bytes(b"RIFF")
    fake = FakeDecoder()
    monkeypatch.setattr(pipeline, "decode_capture", fake)
    monkeypatch.setitem(sys.modules, "matplotlib", None)
    assert main(["decode", str(capture), "--plot", str(tmp_path / "p.png")]) == 2
    assert capsys.readouterr().err == f"toothcomb: {MISSING_MATPLOTLIB}\n"
    assert fake.calls == []


def test_cli_plot_bad_suffix_exits_2(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    capture = tmp_path / "run.wav"
    capture.write_bytes(b"RIFF")
    monkeypatch.setattr(pipeline, "decode_capture", FakeDecoder())
    assert main(["decode", str(capture), "--plot", str(tmp_path / "p.bmp")]) == 2
    assert "use .png, .svg or .pdf" in capsys.readouterr().err


def test_cli_writes_the_plot_and_says_so(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    capture = tmp_path / "run.wav"
    capture.write_bytes(b"RIFF")
    monkeypatch.setattr(pipeline, "decode_capture", FakeDecoder())
    target = tmp_path / "p.png"
    code = main(["decode", str(capture), "--plot", str(target), "--width", "100"])
    if not HAVE_MATPLOTLIB:
        assert code == 2
        return
    assert code == 0
    assert target.read_bytes()[:8] == PNG_SIGNATURE
    assert f"plot written to {target}" in " ".join(capsys.readouterr().out.split())


def test_panels_hold_speed_references_and_cam_offsets() -> None:
    if not HAVE_MATPLOTLIB:
        with pytest.raises(UsageError):
            build_figure(make_result())
        return
    result = make_result()
    fig = build_figure(result)
    ax_rpm, ax_ang, ax_hist = fig.axes
    speed, refs = ax_rpm.lines
    assert len(speed.get_xdata()) == len(result.crank.rpm_trace)
    np.testing.assert_allclose(refs.get_xdata(), result.crank.reference_times_s)
    # one line per cam edge with events: two on cam_in, one on cam_ex
    assert len(ax_ang.lines) == 3
    lead = result.cams[0].edges[0]
    expected = np.array([a for _, a in lead.events]) - lead.angle.mean
    np.testing.assert_allclose(ax_ang.lines[0].get_ydata(), expected, atol=1e-9)
    # the cam_ex edge sits across 0/360 (359.7 .. 0.25): offsets from its mean 359.9 stay small
    wrapped = np.asarray(ax_ang.lines[2].get_ydata())
    assert wrapped.min() == pytest.approx(359.7 - 359.9)
    assert wrapped.max() == pytest.approx(0.25 + 360.0 - 359.9)
    assert len(ax_hist.patches) == 3
    assert "60-2 VR crank, 805 rpm mean" in fig.get_suptitle()


def test_figure_without_cams_still_draws(tmp_path: Path) -> None:
    from dataclasses import replace

    result = replace(make_result(), cams=())
    if not HAVE_MATPLOTLIB:
        with pytest.raises(UsageError):
            build_figure(result)
        return
    fig = build_figure(result)
    texts = [t.get_text() for t in fig.axes[1].texts]
    assert texts == ["no cam edges measured"]
    plot_result(result, tmp_path / "empty.png", dpi=40)
    assert (tmp_path / "empty.png").read_bytes()[:8] == PNG_SIGNATURE
