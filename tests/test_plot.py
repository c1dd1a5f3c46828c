"""Plots: every kind drawn headless (Agg) to PNG and SVG, the marks checked through the figure's
artists, the span read again from the capture, the options, and a clear error without
matplotlib."""

from __future__ import annotations

import importlib.util
import struct
import sys
import xml.etree.ElementTree as ET
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from toothcomb.cli import style
from toothcomb.cli.main import main
from toothcomb.cli.plot import (
    HEIGHT_IN,
    KINDS,
    MAX_SPAN_SAMPLES,
    MISSING_MATPLOTLIB,
    WIDTH_IN,
    PlotSpan,
    build_figure,
    default_span,
    envelope,
    jitter_residuals,
    panel_axes,
    parse_kinds,
    parse_span,
    plot_format,
    plot_result,
    read_waveforms,
    require_matplotlib,
    resolve_kinds,
)
from toothcomb.decoders import pipeline
from toothcomb.decoders.errors import UsageError
from toothcomb.decoders.pipeline import decode_capture
from toothcomb.decoders.simulate import preset, simulate
from toothcomb.decoders.verdict import compare

try:
    from test_cli import FakeDecoder
    from test_report import make_result
except ImportError:  # tests collected as a package
    from tests.test_cli import FakeDecoder
    from tests.test_report import make_result

HAVE_MATPLOTLIB = importlib.util.find_spec("matplotlib") is not None
needs_mpl = pytest.mark.skipif(not HAVE_MATPLOTLIB, reason="matplotlib is not installed")

# source: PNG specification (ISO/IEC 15948), 5.2 PNG signature
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
SVG_NS = "{http://www.w3.org/2000/svg}"


def png_size(data: bytes) -> tuple[int, int]:
    """Width and height from a PNG's header, checking the signature and the IHDR chunk."""
    assert data[:8] == PNG_SIGNATURE
    # IHDR is the first chunk: length (13), type, then width and height as big-endian uint32
    # source: PNG specification (ISO/IEC 15948), 11.2.2 IHDR
    length, kind = struct.unpack(">I4s", data[8:16])
    assert (length, kind) == (13, b"IHDR")
    return struct.unpack(">II", data[16:24])


def gids(fig: Any) -> set[str]:
    """Every artist id (gid) in the figure."""
    return {a.get_gid() for a in fig.findobj() if a.get_gid()}


def artist(fig: Any, gid: str) -> Any:
    found = [a for a in fig.findobj() if a.get_gid() == gid]
    assert len(found) == 1, f"{len(found)} artists with gid {gid!r}"
    return found[0]


def span_x(patch: Any) -> tuple[float, float]:
    """First and last x of a band drawn by ``axvspan`` (a Rectangle, or a Polygon before
    matplotlib 3.9)."""
    if hasattr(patch, "get_width"):
        return patch.get_x(), patch.get_x() + patch.get_width()
    xy = np.asarray(patch.get_xy())
    return float(xy[:, 0].min()), float(xy[:, 0].max())


def texts(ax: Any) -> list[str]:
    return [t.get_text() for t in ax.texts]


# --------------------------------------------------------------------------- simulated decodes


@pytest.fixture(scope="module")
def belt(tmp_path_factory: pytest.TempPathFactory) -> tuple[Any, dict]:
    """A capture whose cam belt jumped one tooth, decoded and compared with the demo profile
    of the same invented engine (60-2 VR crank at 1500 rpm, 8-bit scope at 500 kS/s)."""
    sim = simulate(preset("belt-jumped-scope", duration_s=0.25))
    path = tmp_path_factory.mktemp("belt") / "belt.h5"
    sim.write(path)
    return compare(decode_capture(str(path)), "demo-belt-60-2-vr"), sim.truth


@pytest.fixture(scope="module")
def phaser(tmp_path_factory: pytest.TempPathFactory) -> tuple[Any, dict]:
    """A 60-2 Hall crank at 2500 rpm whose intake phaser steps 25 deg late at 0.5 s."""
    sim = simulate(preset("phaser-sweep-60-2-hall", duration_s=1.0))
    path = tmp_path_factory.mktemp("phaser") / "phaser.h5"
    sim.write(path)
    return decode_capture(str(path)), sim.truth


# --------------------------------------------------------------------------- options


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


@pytest.mark.parametrize(
    ("text", "kinds"),
    [
        ("all", ("all",)),
        ("waveform", ("waveform",)),
        ("Strip, jitter,strip", ("strip", "jitter")),
        ("phase,speed", ("phase", "speed")),
    ],
)
def test_parse_kinds(text: str, kinds: tuple[str, ...]) -> None:
    assert parse_kinds(text) == kinds


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("", "plot kind '' is not known; choose from waveform, speed, strip, phase, jitter or all"),
        ("strip,wave", "plot kind 'wave' is not known"),
        ("all,strip", "plot kind 'all,strip' names 'all' with others; give 'all' alone"),
    ],
)
def test_parse_kinds_rejects(text: str, message: str) -> None:
    with pytest.raises(UsageError, match="^" + message.replace("(", r"\(").replace(")", r"\)")):
        parse_kinds(text)


def test_parse_span() -> None:
    assert parse_span("0.5:0.75") == PlotSpan(0.5, 0.75)
    assert parse_span("0:2").length_s == 2.0


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("3", "plot span '3' is not START:END in seconds; give it like 0.5:0.7"),
        ("a:b", "plot span 'a:b' is not START:END in seconds; give it like 0.5:0.7"),
        ("-1:2", "plot span '-1:2' must be two finite times from 0 on; give it like 0.5:0.7"),
        ("0:inf", "plot span '0:inf' must be two finite times from 0 on; give it like 0.5:0.7"),
        (
            "2:2",
            "plot span '2:2' ends before it starts; give START:END with START < END, e.g. 0.5:0.7",
        ),
    ],
)
def test_parse_span_rejects(text: str, message: str) -> None:
    with pytest.raises(UsageError) as info:
        parse_span(text)
    assert str(info.value) == message


def test_all_draws_phase_only_when_a_phaser_moved(phaser: tuple[Any, dict]) -> None:
    result, _ = phaser
    assert resolve_kinds(result) == KINDS  # the intake phaser moved
    assert resolve_kinds(make_result()) == ("waveform", "speed", "strip", "jitter")
    assert resolve_kinds(make_result(), ("jitter", "phase")) == ("jitter", "phase")


# --------------------------------------------------------------------------- style


def test_palette_is_okabe_ito() -> None:
    # source: Okabe & Ito, "Color Universal Design", 2008: RGB 0-255 values of the palette
    published = {
        "black": (0, 0, 0),
        "orange": (230, 159, 0),
        "sky blue": (86, 180, 233),
        "bluish green": (0, 158, 115),
        "yellow": (240, 228, 66),
        "blue": (0, 114, 178),
        "vermillion": (213, 94, 0),
        "reddish purple": (204, 121, 167),
    }
    got = {k: tuple(int(v[i : i + 2], 16) for i in (1, 3, 5)) for k, v in style.OKABE_ITO.items()}
    assert got == published


def test_every_series_and_status_differs_in_shape_not_only_colour() -> None:
    # greyscale print keeps shapes and dash patterns, not hues
    shapes = [(s.marker, s.linestyle) for s in style.SERIES]
    assert len(set(shapes)) == len(shapes)
    assert len({s.color for s in style.SERIES}) == len(style.SERIES)
    markers = [s.marker for s in style.STATUS.values()]
    assert len(set(markers)) == len(markers)
    off = style.STATUS["off-by-teeth"]
    assert off.color not in {s.color for k, s in style.STATUS.items() if k != "off-by-teeth"}


# --------------------------------------------------------------------------- missing matplotlib


def test_missing_matplotlib_is_a_usage_error(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import now raises ImportError
    with pytest.raises(UsageError) as info:
        require_matplotlib()
    assert str(info.value) == "plots need matplotlib: pip install 'toothcomb[plot]'"
    assert str(info.value) == MISSING_MATPLOTLIB
    with pytest.raises(UsageError, match=r"pip install 'toothcomb\[plot\]'"):
        build_figure(make_result(), ["speed"])


def test_missing_matplotlib_writes_no_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setitem(sys.modules, "matplotlib", None)
    target = tmp_path / "run.png"
    with pytest.raises(UsageError, match=r"^plots need matplotlib"):
        plot_result(make_result(), target, kinds=["strip"])
    assert list(tmp_path.iterdir()) == []


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


# --------------------------------------------------------------------------- files


@needs_mpl
def test_png_of_all_kinds_has_the_figure_size(tmp_path: Path) -> None:
    target = tmp_path / "run.png"
    plot_result(make_result(), target, dpi=50)
    # make_result: 3 channels, 2 cams with edges, no phaser, 3 edges (one row of histograms)
    inches = (
        HEIGHT_IN["waveform"][0]
        + 3 * HEIGHT_IN["waveform"][1]
        + HEIGHT_IN["speed"][0]
        + HEIGHT_IN["strip"][0]
        + 2 * HEIGHT_IN["strip"][1]
        + HEIGHT_IN["jitter"][0]
        + HEIGHT_IN["jitter"][1]
        + 0.5  # the figure title
    )
    assert inches == pytest.approx(0.8 + 4.5 + 2.6 + 1.3 + 1.6 + 0.6 + 1.9 + 0.5)
    assert png_size(target.read_bytes()) == (round(WIDTH_IN * 50), round(inches * 50))
    assert [p.name for p in tmp_path.iterdir()] == ["run.png"]  # no temporary file left


@needs_mpl
@pytest.mark.parametrize("kind", KINDS)
def test_each_kind_renders_to_png_and_svg(
    kind: str, tmp_path: Path, belt: tuple[Any, dict], phaser: tuple[Any, dict]
) -> None:
    import matplotlib.image

    result = phaser[0] if kind == "phase" else belt[0]
    fig = build_figure(result, [kind])
    width_in, height_in = fig.get_size_inches()
    png = tmp_path / f"{kind}.png"
    plot_result(result, png, kinds=[kind], dpi=40)
    w, h = png_size(png.read_bytes())
    assert (w, h) == (round(width_in * 40), round(height_in * 40))
    pixels = matplotlib.image.imread(png)
    assert pixels.shape[:2] == (h, w)
    assert pixels[..., :3].std() > 0.05  # something is drawn, not a blank page
    svg = tmp_path / f"{kind}.svg"
    plot_result(result, svg, kinds=[kind])
    root = ET.parse(svg).getroot()
    assert root.tag == f"{SVG_NS}svg"
    # matplotlib writes SVG sizes in points, 72 per inch
    assert float(root.get("width", "").removesuffix("pt")) == pytest.approx(width_in * 72)
    ids = {el.get("id") for el in root.iter() if el.get("id")}
    expected = {
        "waveform": "reference-R1",
        "speed": "reference-events",
        "strip": "edge-cam-E1",
        "phase": "phase-cam_intake",
        "jitter": "jitter-cam-E1",
    }[kind]
    assert expected in ids


# --------------------------------------------------------------------------- waveform


@needs_mpl
def test_waveform_marks_teeth_where_the_simulator_put_them(belt: tuple[Any, dict]) -> None:
    result, truth = belt
    span = default_span(result)
    wf = read_waveforms(result)
    # about two revolutions (60 / 1500 rpm = 0.04 s each) from just before the first
    # reference event (at 0.0093 s: the span starts with the capture)
    ref1 = result.crank.reference_times_s[0]
    assert span.length_s == pytest.approx(2 * 0.04, rel=0.03)
    assert span.start_s == 0.0 and span.start_s <= ref1 <= span.end_s
    ev = truth["crank"]["tooth_events"]
    t_true = np.array(ev["centre_s"])  # a VR tooth event is the tooth centre
    n_true = np.array(ev["tooth"])
    # (a crossing at the capture's very first sample has no sample before it to be found from)
    inside = (t_true >= span.start_s + 10 / result.capture.sample_rate) & (t_true <= span.end_s)
    synced = inside & (t_true >= ref1 - 1e-6)
    # every tooth of the span from the first reference event on found again, numbered as on
    # the wheel, within 0.1 deg CA (1 deg CA at 1500 rpm = 1 / 9000 s) ...
    assert wf.tooth_times.size == synced.sum()
    np.testing.assert_allclose(wf.tooth_times, t_true[synced], atol=0.1 / 9000.0)
    np.testing.assert_array_equal(wf.tooth_numbers, n_true[synced])
    # ... and the teeth before it, whose numbers are not known yet, marked apart
    np.testing.assert_allclose(wf.unsynced_times, t_true[inside & ~synced], atol=0.1 / 9000.0)
    # each gap runs from tooth 58 to tooth 1: 3 pitches of 6 deg = 18 deg = 2 ms at 1500 rpm;
    # the span holds two, the first before the first reference event
    assert len(wf.gaps) == 2
    for g0, g1 in wf.gaps:
        assert g1 - g0 == pytest.approx(18.0 / 9000.0, rel=0.05)
        assert min(abs(g1 - r) for r in truth["crank"]["reference_times_s"]) < 0.1 / 9000.0


@needs_mpl
def test_waveform_numbers_reference_and_cam_events(belt: tuple[Any, dict]) -> None:
    result, _ = belt
    span = PlotSpan(0.1, 0.2)
    fig = build_figure(result, ["waveform"], span=span)
    crank_ax, cam_ax = panel_axes(fig, "waveform")
    assert crank_ax.get_label() == "waveform:crank" and cam_ax.get_label() == "waveform:cam"
    refs = np.array(result.crank.reference_times_s)
    numbers = [k + 1 for k, r in enumerate(refs) if 0.1 <= r <= 0.2]
    assert numbers == [4, 5]  # reference events every 0.04 s from 0.0093 s
    assert [t for t in texts(crank_ax) if t.startswith("R")] == ["R4", "R5"]
    for k in numbers:
        x = artist(fig, f"reference-R{k}").get_position()[0]
        assert x == refs[k - 1]
    teeth = artist(fig, "teeth")
    assert np.all((teeth.get_xdata() >= 0.1) & (teeth.get_xdata() <= 0.2))
    # every reference event of the span is one of the teeth found again
    for k in numbers:
        assert np.min(np.abs(teeth.get_xdata() - refs[k - 1])) < 2e-6
    # each cam event of the span marked on the cam trace and labelled by its edge
    cam = result.cams[0]
    for i, edge in enumerate(cam.edges):
        want = [t for t, _ in edge.events if 0.1 <= t <= 0.2]
        got = artist(fig, f"cam-cam-E{i + 1}").get_xdata()
        np.testing.assert_allclose(got, want)
        assert texts(cam_ax).count(f"E{i + 1}") == len(want)
    legend = [t.get_text() for t in cam_ax.get_legend().get_texts()]
    assert legend[0].startswith("E1 W0 leading, rising")


@needs_mpl
def test_waveform_reads_only_up_to_the_span(
    belt: tuple[Any, dict], monkeypatch: pytest.MonkeyPatch
) -> None:
    from toothcomb.decoders import readers

    result, _ = belt
    seen: list[int] = []
    real_open = readers.open_capture

    def spying_open(*args: Any, **kwargs: Any) -> Any:
        src = real_open(*args, **kwargs)
        blocks = src.blocks

        def counted(size: int = 1 << 16) -> Any:
            for b in blocks(size):
                seen.append(b.stop)
                yield b

        src.blocks = counted  # type: ignore[method-assign]
        return src

    monkeypatch.setattr(readers, "open_capture", spying_open)
    read_waveforms(result, PlotSpan(0.05, 0.08))
    fs = result.capture.sample_rate
    # the span ends at sample 40000 (+ a quarter revolution of look-ahead); one block beyond
    assert seen and max(seen) < 0.08 * fs + 0.25 * 0.04 * fs + (1 << 16)
    assert max(seen) < result.capture.n_samples


@needs_mpl
def test_span_outside_the_capture_or_too_long_is_refused(belt: tuple[Any, dict]) -> None:
    result, _ = belt
    with pytest.raises(UsageError) as info:
        read_waveforms(result, PlotSpan(0.2, 0.3))
    assert str(info.value) == (
        f"plot span 0.2:0.3 reaches past the end of {result.capture.path}, which lasts 0.25 s; "
        "give START:END within 0:0.25"
    )
    long = replace(result, capture=replace(result.capture, n_samples=10 * MAX_SPAN_SAMPLES))
    with pytest.raises(
        UsageError,
        match=r"at most 2,097,152 can be drawn, so give a span of "
        r"4\.1943 s or less$",
    ):
        read_waveforms(long, PlotSpan(0.0, 5.0))


@needs_mpl
def test_all_kinds_without_the_capture_say_so_but_waveform_alone_fails() -> None:
    result = make_result(path="no/such/capture.flac")
    fig = build_figure(result)
    assert any(
        "not drawn: capture file 'no/such/capture.flac' does not exist" in t
        for t in texts(panel_axes(fig, "waveform")[0])
    )
    with pytest.raises(ValueError, match="does not exist"):
        build_figure(result, ["waveform"])


def test_envelope_keeps_every_peak() -> None:
    t = np.arange(100_000) / 1e5
    y = np.zeros(100_000)
    y[12_345] = 5.0  # one spike
    y[77_777] = -3.0
    _, yy = envelope(t, y, points=1000)
    assert len(yy) == 1000
    assert yy.max() == 5.0 and yy.min() == -3.0
    short_t, short_y = envelope(t[:10], y[:10])
    assert np.array_equal(short_t, t[:10]) and np.array_equal(short_y, y[:10])


# --------------------------------------------------------------------------- strip


@needs_mpl
def test_strip_marks_off_by_teeth_edges_in_their_own_colour_and_shape(
    belt: tuple[Any, dict],
) -> None:
    result, truth = belt
    fig = build_figure(result, ["strip"])
    (ax,) = panel_axes(fig, "strip")
    assert ax.get_xlim() == (0.0, 720.0)
    # the simulator jumped the belt one tooth of 42 late: 720 / 42 = 17.14 deg CA
    jump = truth["cams"][0]["phase"]
    assert jump["jumped_teeth"] == 1 and jump["jump_deg"] == pytest.approx(720 / 42)
    off = style.STATUS["off-by-teeth"]
    for i, edge in enumerate(result.cams[0].edges):
        comp = edge.comparison
        assert comp is not None and comp.status == "off-by-teeth" and comp.off_by_teeth == 1
        expected = artist(fig, f"expected-cam-E{i + 1}")
        assert expected.get_xdata()[0] == pytest.approx(comp.expected_cycle_deg)
        mark = artist(fig, f"edge-cam-E{i + 1}")
        assert mark.get_color() == off.color and mark.get_marker() == off.marker
        # drawn the jump after the expected bar
        gap = mark.get_xdata()[0] - expected.get_xdata()[0]
        assert gap == pytest.approx(jump["jump_deg"], abs=0.5)
        assert mark.get_xdata()[0] == pytest.approx(edge.cycle_angle, abs=1e-6)
        assert artist(fig, f"off-by-teeth-cam-E{i + 1}").get_text() == "+1"
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert legend == ["expected", "off by whole teeth (+n: n teeth late)"]
    assert artist(fig, "verdict-cam").get_text() == result.verdict.cams[0].sentence


@needs_mpl
def test_strip_without_comparison_shows_measured_and_unknown_revolutions() -> None:
    result = make_result()
    fig = build_figure(result, ["strip"])
    measured = style.STATUS["measured"]
    lead = artist(fig, "edge-cam_in-E1")
    assert lead.get_xdata().tolist() == [112.3456]  # revolution 0
    assert lead.get_marker() == measured.marker and lead.get_color() == measured.color
    trail = artist(fig, "edge-cam_in-E2")
    assert trail.get_xdata().tolist() == pytest.approx([360.0 + 292.1])  # revolution 1
    centre = artist(fig, "edge-cam_ex-E1")  # no cycle phase: both revolutions
    assert centre.get_xdata().tolist() == pytest.approx([359.9, 719.9])
    assert not [a for a in fig.findobj() if str(a.get_gid()).startswith("expected-")]
    assert "revolution unknown: drawn in both" in panel_axes(fig, "strip")[0].get_xlabel()


# --------------------------------------------------------------------------- phase


@needs_mpl
def test_phase_trace_moves_and_holds(phaser: tuple[Any, dict]) -> None:
    result, truth = phaser
    fig = build_figure(result, ["phase"])
    labels = [ax.get_label() for ax in panel_axes(fig, "phase")]
    assert labels == ["phase:cam_intake", "phase:cam_exhaust"]
    for cam in result.cams:
        ph = cam.phaser
        line = artist(fig, f"phase-{cam.channel}")
        np.testing.assert_array_equal(line.get_xdata(), ph.time_s)
        np.testing.assert_array_equal(line.get_ydata(), ph.phase_deg)
        for k, hold in enumerate(ph.holds):
            seg = artist(fig, f"hold-{cam.channel}-{k + 1}").get_segments()[0]
            ends = [[hold.t_start_s, hold.phase_deg], [hold.t_end_s, hold.phase_deg]]
            assert seg.tolist() == ends
    intake = result.cams[0].phaser
    assert len(intake.moves) == 1
    x = span_x(artist(fig, "move-cam_intake-1"))
    assert x == (intake.moves[0].t_start_s, intake.moves[0].t_end_s)
    # the simulator steps the intake phaser 25 deg late at 0.5 s; the band sits on that step
    step = truth["cams"][0]["phaser"]["moves"][0]
    assert step["t_start_s"] == 0.5 and step["target_deg"] == 25.0
    assert x[0] == pytest.approx(step["t_start_s"], abs=0.01)
    # and the plotted trace follows the simulator's phase trajectory (same base: 0 at start)
    traj = np.array(truth["cams"][0]["phaser"]["trajectory"])
    line = artist(fig, "phase-cam_intake")
    err = line.get_ydata() - np.interp(line.get_xdata(), traj[:, 0], traj[:, 1])
    assert np.median(np.abs(err)) < 0.2
    assert not [a for a in fig.findobj() if str(a.get_gid()).startswith("move-cam_exhaust")]


@needs_mpl
def test_hunting_hold_is_drawn_in_its_own_style(phaser: tuple[Any, dict]) -> None:
    result, _ = phaser
    cam = result.cams[1]
    hold = replace(cam.phaser.holds[0], hunting=True)
    hunted = replace(result, cams=(replace(cam, phaser=replace(cam.phaser, holds=(hold,))),))
    fig = build_figure(hunted, ["phase"])
    seg = artist(fig, "hold-cam_exhaust-1")
    assert seg.get_linestyle()[0][1] is not None  # dotted, not solid
    assert tuple(seg.get_color()[0][:3]) == pytest.approx(
        tuple(int(style.HUNTING.color[i : i + 2], 16) / 255 for i in (1, 3, 5))
    )
    legend = [t.get_text() for t in panel_axes(fig, "phase")[0].get_legend().get_texts()]
    assert "hunting" in legend


# --------------------------------------------------------------------------- jitter


@needs_mpl
def test_jitter_histograms_hold_the_residuals_of_the_jitter_figures(
    phaser: tuple[Any, dict],
) -> None:
    result, _ = phaser
    fig = build_figure(result, ["jitter"])
    n_edges = sum(len(c.edges) for c in result.cams)
    assert len([ax for ax in panel_axes(fig, "jitter") if ax.get_visible()]) == n_edges
    for cam in result.cams:
        for i, edge in enumerate(cam.edges):
            res = jitter_residuals(edge)
            assert res is not None and res.size == len(edge.events)
            # the same residuals analysis.jitter turns into the report's figures: its TIE
            # peak-to-peak in degrees is the spread of exactly these values
            assert np.ptp(res) == pytest.approx(edge.jitter.tie_pp_deg, rel=1e-9, abs=1e-12)
            label = f"jitter:{cam.channel} E{i + 1}"
            (ax,) = [a for a in panel_axes(fig, "jitter") if a.get_label() == label]
            heights = [p.get_height() for p in ax.patches]
            assert sum(heights) == len(edge.events)  # every event counted once
            assert f"n {len(edge.events)}" in texts(ax)[0]


def test_jitter_residuals_unwrap_across_zero() -> None:
    from toothcomb.decoders.result import AngleStats, CamEdge

    events = tuple((0.05 * i, (359.95 + (0.1 if i % 2 else 0.0)) % 360.0) for i in range(12))
    edge = CamEdge("centre", "falling", AngleStats(0.0, 0.05, 359.95, 0.05, 12), None, events)
    res = jitter_residuals(edge)
    assert res is not None
    # alternating +-0.05 around a flat trend; no 360 deg jumps
    assert np.abs(res).max() < 0.1
    assert jitter_residuals(replace(edge, events=events[:2])) is None


# --------------------------------------------------------------------------- command line


def test_cli_plot_bad_suffix_exits_2(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    capture = tmp_path / "run.wav"
    capture.write_bytes(b"RIFF")
    monkeypatch.setattr(pipeline, "decode_capture", FakeDecoder())
    assert main(["decode", str(capture), "--plot", str(tmp_path / "p.bmp")]) == 2
    assert "use .png, .svg or .pdf" in capsys.readouterr().err


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (
            ["--plot-kind", "strip"],
            "toothcomb: --plot-kind strip says what to draw but not "
            "where; add --plot PATH (e.g. run.png)\n",
        ),
        (
            ["--plot-span", "0.5:0.7"],
            "toothcomb: --plot-span 0.5:0.7 says what to draw but not "
            "where; add --plot PATH (e.g. run.png)\n",
        ),
    ],
)
def test_cli_plot_options_need_plot(
    args: list[str],
    message: str,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    capture = tmp_path / "run.wav"
    capture.write_bytes(b"RIFF")
    fake = FakeDecoder()
    monkeypatch.setattr(pipeline, "decode_capture", fake)
    assert main(["decode", str(capture), *args]) == 2
    assert capsys.readouterr().err == message
    assert fake.calls == []


def test_cli_rejects_an_unknown_kind(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    capture = tmp_path / "run.wav"
    capture.write_bytes(b"RIFF")
    monkeypatch.setattr(pipeline, "decode_capture", FakeDecoder())
    code = main(["decode", str(capture), "--plot", str(tmp_path / "p.png"), "--plot-kind", "pie"])
    assert code == 2
    assert "plot kind 'pie' is not known" in capsys.readouterr().err


@needs_mpl
def test_cli_writes_the_kinds_asked_for_and_says_so(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    capture = tmp_path / "run.wav"
    capture.write_bytes(b"RIFF")
    monkeypatch.setattr(pipeline, "decode_capture", FakeDecoder())
    target = tmp_path / "p.png"
    code = main(
        [
            "decode",
            str(capture),
            "--plot",
            str(target),
            "--plot-kind",
            "strip,jitter",
            "--width",
            "100",
        ]
    )
    assert code == 0
    # strip (2 cams) + jitter (3 edges, one row) + title, at the default 110 dpi
    inches = 1.3 + 2 * 0.8 + 0.6 + 1.9 + 0.5
    assert png_size(target.read_bytes()) == (1100, round(inches * 110))
    assert f"plot written to {target}" in " ".join(capsys.readouterr().out.split())


@needs_mpl
def test_cli_span_reaches_the_plot(
    belt: tuple[Any, dict], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    result, _ = belt
    capture = tmp_path / "run.wav"
    capture.write_bytes(b"RIFF")
    monkeypatch.setattr(pipeline, "decode_capture", FakeDecoder(result))
    target = tmp_path / "w.svg"
    code = main(
        [
            "decode",
            str(capture),
            "--plot",
            str(target),
            "--plot-kind",
            "waveform",
            "--plot-span",
            "0.1:0.2",
            "--quiet",
        ]
    )
    assert code == 1  # the belt is a tooth out
    ids = {el.get("id") for el in ET.parse(target).getroot().iter() if el.get("id")}
    assert {"reference-R4", "reference-R5"} <= ids and "reference-R3" not in ids
