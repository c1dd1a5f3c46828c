"""The terminal report, rendered at a fixed width into a string and checked as text."""

from __future__ import annotations

import io
import math
from dataclasses import dataclass, replace

import numpy as np
import pytest
from rich.console import Console
from toothcomb.cli.report import (
    SAFETY_CAUTION,
    edge_label,
    fmt_deg,
    fmt_fixed,
    fmt_rate,
    fmt_rpm,
    fmt_us,
    level_decimals,
    marks_out_of_time,
    render_decode,
    render_description,
)
from toothcomb.decoders.describe import CaptureDescription, ChannelGuess
from toothcomb.decoders.model import CaptureInfo, ChannelLevels
from toothcomb.decoders.result import (
    AngleStats,
    CamEdge,
    CamResult,
    CrankResult,
    DecodeResult,
    Finding,
    JitterStats,
    RpmStats,
)

WIDTH = 100


@dataclass(frozen=True)
class ComparedEdge(CamEdge):
    """A cam edge carrying the comparison fields DESIGN.md names (expected angle, status)."""

    expected_deg: float | None = None
    deviation_deg: float | None = None
    status: str | None = None
    off_by_teeth: int | None = None


def make_jitter() -> JitterStats:
    return JitterStats(
        n=3000,
        tie_rms_s=2.1e-6,
        tie_pp_s=9.8e-6,
        period_rms_s=1.2e-6,
        period_pp_s=6.0e-6,
        c2c_rms_s=1.5e-6,
        c2c_pp_s=8.0e-6,
        tie_rms_deg=0.010,
        tie_pp_deg=0.047,
        period_rms_deg=0.006,
        period_pp_deg=0.030,
        c2c_rms_deg=0.008,
        c2c_pp_deg=0.040,
        detrend="speed trend per revolution",
    )


def make_result(
    *,
    polarity: str = "reversed",
    sensor: str = "vr",
    path: str = "captures/idle.flac",
    lead_std: float = 0.041,
) -> DecodeResult:
    """A hand-built decode: 60-2 crank, one Hall cam with two edges, one VR cam without phase."""
    info = CaptureInfo(
        path, 48000.0, 192000, ("crank", "cam_in", "cam_ex"), "flac", "PCM_16", notes=("AC",)
    )
    lead_events = tuple((0.10 + 0.15 * i, 112.30 + 0.01 * (i % 5)) for i in range(26))
    lead = CamEdge(
        "leading",
        "rising",
        AngleStats(112.3456, lead_std, 112.28, 112.44, 26),
        0,
        lead_events,
        make_jitter(),
        0,
    )
    trail = CamEdge(
        "trailing",
        "falling",
        AngleStats(292.1, 0.05, 292.0, 292.2, 26),
        1,
        tuple((t + 0.05, a + 179.8) for t, a in lead_events),
        None,
        0,
    )
    centre = CamEdge(
        "centre",
        "falling",
        AngleStats(359.9, 0.2, 359.6, 0.3, 12),
        None,
        tuple((0.2 + 0.3 * i, (359.7 + 0.05 * i) % 360.0) for i in range(12)),
        None,
        None,
    )
    crank = CrankResult(
        channel="crank",
        sensor=sensor,  # type: ignore[arg-type]
        wheel="60-2",
        positions=60,
        missing=2,
        polarity=polarity,  # type: ignore[arg-type]
        event_direction="falling",
        rpm=RpmStats(781.2, 805.4, 830.9),
        revolutions=53,
        sync_losses=1,
        reference_times_s=tuple(0.05 + 0.0745 * i for i in range(53)),
        extra_teeth=0,
        missing_teeth=2,
        jitter=make_jitter(),
        findings=(Finding("warning", "sync-lost", "sync lost for one revolution", 2.5),),
        rpm_trace=tuple((0.004 * i, 800.0 + 30.0 * math.sin(i / 50.0)) for i in range(1000)),
    )
    cams = (
        CamResult(
            "cam_in",
            "hall",
            (lead, trail),
            ((95.0, 275.0),),
            True,
            (Finding("info", "weak-edge", "one cam edge is weaker than the others"),),
        ),
        CamResult("cam_ex", "vr", (centre,), (), False, ()),
    )
    return DecodeResult(
        info,
        crank,
        cams,
        (Finding("error", "clipping", "channel crank clips at full scale"),),
        {"crank": "hint", "wheel": "identified (confidence 0.98)"},
    )


def render(obj: object, *, color: bool = False) -> str:
    buf = io.StringIO()
    console = Console(
        file=buf, width=WIDTH, force_terminal=color, color_system="standard" if color else None
    )
    if isinstance(obj, DecodeResult):
        render_decode(obj, console)
    else:
        assert isinstance(obj, CaptureDescription)
        render_description(obj, console)
    return buf.getvalue()


def lines_of(text: str) -> list[str]:
    return [line.rstrip() for line in text.splitlines()]


# --------------------------------------------------------------------------- decode report


def test_capture_section_lists_file_rate_duration_and_channels() -> None:
    text = render(make_result())
    assert "captures/idle.flac" in text
    assert "flac, PCM_16" in text
    assert "48 kHz" in text
    # 192000 samples / 48000 Hz
    assert "4.000 s (192,000 samples per channel)" in text
    assert "0 crank   1 cam_in   2 cam_ex" in text


def test_crank_section_shows_wheel_pitch_speed_and_counts() -> None:
    lines = lines_of(render(make_result()))
    assert "wheel         60-2  (60 positions, 2 missing, pitch 6.00° CA)" in lines
    assert "engine speed  min 781  mean 805  max 831 rpm" in lines
    assert "revolutions   53" in lines
    assert "sync losses   1" in lines
    assert "teeth         0 extra, 2 missing" in lines
    assert "event         tooth centre, falling zero crossing" in lines
    assert "ref. events   53 found, first at 0.0500 s, last at 3.9240 s" in lines


def test_hall_crank_event_is_described_as_leading_flank() -> None:
    text = render(make_result(sensor="hall", polarity="normal"))
    assert "leading flank of each tooth, falling" in text
    assert "sensor        Hall" in text


def test_reversed_polarity_is_spelled_out_and_highlighted() -> None:
    plain = render(make_result(polarity="reversed"))
    assert "polarity      REVERSED - the sensor leads appear swapped" in plain
    coloured = render(make_result(polarity="reversed"), color=True)
    # bold (1), reverse video (7), red (31): ECMA-48 SGR parameters
    # source: ECMA-48 5th edition, 8.3.117 SGR
    assert "\x1b[1;7;31mREVERSED" in coloured


def test_normal_polarity_is_not_flagged() -> None:
    text = render(make_result(polarity="normal"))
    assert "polarity      normal" in text
    assert "REVERSED" not in text


def test_jitter_table_in_microseconds_and_degrees() -> None:
    lines = lines_of(render(make_result()))
    assert "Tooth-period jitter, 3000 teeth (IEEE 2414 terms)" in lines
    row = {ln.split()[0]: ln.split()[1:] for ln in lines if ln.startswith(("TIE", "period"))}
    assert row["TIE"] == ["2.10", "9.80", "0.010", "0.047"]
    assert row["period"] == ["1.20", "6.00", "0.006", "0.030"]
    c2c = next(line for line in lines if line.startswith("cycle-to-cycle"))
    assert c2c.split()[1:] == ["1.50", "8.00", "0.008", "0.040"]


def test_cam_table_rows_carry_angles_spread_and_revolution() -> None:
    lines = lines_of(render(make_result()))
    lead = next(line for line in lines if line.startswith("W0 leading"))
    assert lead.split() == [
        "W0",
        "leading",
        "rising",
        "0",
        "112.35",
        "112.35",
        "0.041",
        "112.28",
        "112.44",
        "26",
        "0.047",
    ]
    trail = next(line for line in lines if line.startswith("W0 trailing"))
    # revolution 1: the cycle angle adds 360
    assert trail.split()[3:5] == ["1", "292.10"]
    assert trail.split()[5] == "652.10"
    centre = next(line for line in lines if line.startswith("W? centre"))
    assert centre.split()[3:6] == ["?", "359.90", "n/a"]
    assert "deg CA after the crank reference (0-360); cycle = angle + 360 in revolution 1" in lines


def test_cam_notes_tell_phase_source_and_unknown_revolution() -> None:
    text = render(make_result())
    assert "this cam fixed the cycle phase" in text
    assert "rev '?': the cycle phase is unknown" in text
    assert "pattern (720° frame): 95.0-275.0°" in text
    # without a known revolution the pattern is per revolution
    result = make_result()
    ex = replace(result.cams[1], pattern=((350.0, 355.5),))
    text = render(replace(result, cams=(ex,)))
    assert "pattern (360° frame): 350.0-355.5°" in text


def test_findings_are_sorted_errors_first_with_place_and_time() -> None:
    lines = lines_of(render(make_result()))
    start = lines.index(next(line for line in lines if line.startswith("Findings")))
    rows = [line for line in lines[start + 1 :] if line][:3]
    assert rows[0].split()[:2] == ["ERROR", "capture"]
    assert rows[1].split()[:5] == ["warning", "crank", "crank", "2.500", "s"]
    assert rows[2].split()[:3] == ["info", "cam", "cam_in"]
    assert rows[0].endswith("channel crank clips at full scale")


def test_choices_and_verdict_without_expectation() -> None:
    text = render(make_result())
    assert "wheel  identified (confidence 0.98)" in text
    assert "decoded 53 revolutions of a 60-2 wheel at 805 rpm mean; 2 cam channels, 3 edges." in (
        " ".join(text.split())
    )
    assert "No expected angles were given, so no timing verdict." in " ".join(text.split())


def test_safety_caution_ends_the_report_in_two_lines() -> None:
    lines = [line for line in lines_of(render(make_result())) if line]
    assert lines[-2:] == list(SAFETY_CAUTION)
    assert "back-probe" in lines[-2] and "sound card" in lines[-1]
    assert all(len(line) <= 80 for line in SAFETY_CAUTION)


def test_no_line_is_wider_than_the_console() -> None:
    text = render(make_result())
    assert max(len(line) for line in text.splitlines()) <= WIDTH


@pytest.mark.parametrize("status", ["in-time", "off-by-teeth", None])
def test_cam_tables_fit_80_columns_without_cutting_numbers(status: str | None) -> None:
    result = make_result() if status is None else _compared(status, 1)
    buf = io.StringIO()
    render_decode(result, Console(file=buf, width=80, color_system=None))
    rows = [line for line in buf.getvalue().splitlines() if line.startswith(("W0", "W?"))]
    assert rows
    assert all("…" not in row and len(row) <= 80 for row in rows)
    assert all("112.35" in row for row in rows if row.startswith("W0 leading"))


def test_markup_in_names_is_printed_literally() -> None:
    text = render(make_result(path="run [bold]x[/bold].flac"))
    assert "run [bold]x[/bold].flac" in text


def test_not_finite_statistics_print_as_na() -> None:
    text = render(make_result(lead_std=float("nan")))
    lead = next(line for line in lines_of(text) if line.startswith("W0 leading"))
    assert lead.split()[6] == "n/a"


def test_report_without_cams_says_so() -> None:
    result = replace(make_result(), cams=())
    text = render(result)
    assert "no cam channel was decoded" in text
    assert "0 cam channels, 0 edges" in " ".join(text.split())


def _compared(status: str, off: int | None = None) -> DecodeResult:
    result = make_result()
    cam = result.cams[0]
    lead = cam.edges[0]
    edge = ComparedEdge(
        lead.flank,
        lead.direction,
        lead.angle,
        lead.revolution,
        lead.events,
        lead.jitter,
        lead.window,
        expected_deg=95.2,
        deviation_deg=17.1456,
        status=status,
        off_by_teeth=off,
    )
    return replace(result, cams=(replace(cam, edges=(edge,)), *result.cams[1:]))


def test_compared_edge_shows_expected_deviation_and_status() -> None:
    result = _compared("off-by-teeth", 1)
    lead = next(line for line in lines_of(render(result)) if line.startswith("W0 leading"))
    assert lead.split()[-4:] == ["95.20", "+17.15", "OFF", "+1"]
    # the cycle angle, min and max give way to the comparison
    assert lead.split()[3:8] == ["0", "112.35", "0.041", "26", "0.047"]
    assert [e for _, e in marks_out_of_time(result)] == [result.cams[0].edges[0]]
    verdict = " ".join(render(result).split())
    assert "1 mark out of tolerance: cam_in W0 leading." in verdict


def test_in_time_edge_gives_a_clean_verdict() -> None:
    result = _compared("in-time")
    assert marks_out_of_time(result) == []
    assert "Every compared mark is in time." in " ".join(render(result).split())


def test_moving_cam_phase_gets_a_note() -> None:
    result = make_result()
    cam = result.cams[0]
    lead = replace(cam.edges[0], angle=AngleStats(120.0, 9.0, 101.5, 126.5, 26))
    moved = replace(result, cams=(replace(cam, edges=(lead, cam.edges[1])),))
    text = " ".join(render(moved).split())
    assert "edge angles span up to 25.0° CA: the cam phase moved during the capture" in text
    # the still cam of make_result (spread 0.16 deg) gets no such note
    assert "span up to" not in render(result)


def test_phaser_strip_and_move_table_are_drawn() -> None:
    from toothcomb.decoders.analysis.phaser import analyse_phase_trace

    result = make_result()
    cam = result.cams[0]
    # a straight 25 deg CA move from 1.0 s to 1.25 s (100 deg CA/s), events every 5 ms
    t = np.arange(0.0, 2.0, 0.005)
    phase = np.clip((t - 1.0) * 100.0, 0.0, 25.0)
    phaser = analyse_phase_trace(t, phase, np.zeros(len(t), dtype=int))
    text = render(replace(result, cams=(replace(cam, phaser=phaser),)))
    lines = lines_of(text)
    assert (
        "phaser: 1 move, largest travel 25.0° CA; phase relative to where the cam sat first "
        "(+ = retarded)" in " ".join(lines)
    )
    # the move row: 1.00-1.25 s, 0 -> 25, +25.0, 100 deg CA/s mean (0.8 * 25 / 0.2 s)
    row = next(line for line in lines if line.startswith("M1"))
    assert row.split()[:5] == ["M1", "1.00-1.25", "+0.0->+25.0", "+25.0", "100"]
    # the strip: top label +25.0, bottom +0.0, moves drawn with their own character
    top = next(i for i, line in enumerate(lines) if line.strip().startswith("+25.0 ┤"))
    assert lines[top + 6].strip().startswith("+0.0 ┤")
    assert "▓" in "".join(lines[top : top + 7])
    assert all(len(line) <= WIDTH for line in lines)


def test_a_cam_that_did_not_move_gets_one_line() -> None:
    from toothcomb.decoders.analysis.phaser import analyse_phase_trace

    result = make_result()
    cam = result.cams[0]
    t = np.arange(0.0, 2.0, 0.01)
    still = analyse_phase_trace(t, 0.05 * np.sin(t * 37.0), np.zeros(len(t), dtype=int))
    text = render(replace(result, cams=(replace(cam, phaser=still),)))
    assert "phaser: the cam did not move during the capture (hold jitter 0.035° rms)" in text
    assert "┤" not in text


# --------------------------------------------------------------------------- formatting


@pytest.mark.parametrize(
    ("value", "kwargs", "expected"),
    [
        (112.3456, {}, "112.35°"),
        (0.0, {"digits": 1}, "0.0°"),
        (17.14, {"sign": True}, "+17.14°"),
        (-0.5, {"sign": True, "digits": 1}, "-0.5°"),
        (3.0, {"unit": False}, "3.00"),
        (float("nan"), {}, "n/a"),
        (None, {}, "n/a"),
        (float("inf"), {}, "n/a"),
    ],
)
def test_fmt_deg(value: float | None, kwargs: dict, expected: str) -> None:
    assert fmt_deg(value, **kwargs) == expected


def test_other_formatters() -> None:
    assert fmt_rpm(805.5) == "806"
    assert fmt_rpm(float("nan")) == "n/a"
    assert fmt_us(9.8e-6) == "9.80"
    assert fmt_us(None) == "n/a"
    assert [fmt_rate(x) for x in (44100.0, 48000.0, 96000.0, 200000.0, 1.25e6, 8.0)] == [
        "44.1 kHz",
        "48 kHz",
        "96 kHz",
        "200 kHz",
        "1.25 MHz",
        "8 Hz",
    ]
    assert fmt_fixed(-2.1e-5, 3) == "0.000"
    assert fmt_fixed(-0.46, 3) == "-0.460"
    assert fmt_fixed(float("nan"), 1) == "n/a"


@pytest.mark.parametrize(
    ("lo", "hi", "decimals"),
    [(-0.46, 0.47, 3), (-0.05, 5.02, 2), (0.0, 250.0, 0), (0.0, 0.004, 5), (1.0, 1.0, 3)],
)
def test_level_decimals_give_three_digits_of_the_span(lo: float, hi: float, decimals: int) -> None:
    assert level_decimals(lo, hi) == decimals


def test_edge_label_with_and_without_window() -> None:
    result = make_result()
    assert edge_label(result.cams[0].edges[1]) == "W0 trailing"
    assert edge_label(result.cams[1].edges[0]) == "W? centre"


# --------------------------------------------------------------------------- describe


def make_description() -> CaptureDescription:
    info = CaptureInfo("scope.csv", 200000.0, 200000, ("CH1", "CH2"), "csv", "text", units=("V",))
    pct = (0.0, 0.0, 0.1, 0.2, 2.5, 4.8, 4.9, 5.0, 5.0)
    levels = (
        ChannelLevels("CH1", 200000, -0.05, 5.02, 2.5, 2.4, pct, 0.01, 0.0),
        ChannelLevels("CH2", 200000, -0.04, 5.01, 1.2, 2.1, pct, 0.02, 0.25, non_finite=3),
    )
    guesses = (
        ChannelGuess("CH1", "hall", "crank", 0.95, "square wave with a regular gap", 3000.0),
        ChannelGuess("CH2", "hall", "cam", 0.8, "few edges per revolution", 50.0),
    )
    return CaptureDescription(info, levels, guesses)


def test_description_table_shows_levels_and_guesses() -> None:
    lines = lines_of(render(make_description()))
    row = next(line for line in lines if line.split()[:2] == ["0", "CH1"])
    assert row.split() == [
        "0",
        "CH1",
        "[V]",
        "-0.05",
        "5.02",
        "2.50",
        "0.01",
        "0.0",
        "%",
        "Hall",
        "crank",
        "(0.95)",
        "3000",
    ]
    row2 = next(line for line in lines if line.split()[:2] == ["1", "CH2"])
    # clipped fraction 0.25 -> 25.0 %
    assert row2.split()[2:8] == ["-0.04", "5.01", "1.20", "0.02", "25.0", "%"]
    assert "CH1  square wave with a regular gap" in lines
    assert "CH2: 3 samples are not finite numbers" in lines
    assert "0 CH1 [V]   1 CH2" in " ".join(lines)
    assert all("…" not in line and len(line) <= WIDTH for line in lines)


def test_description_table_fits_80_columns() -> None:
    buf = io.StringIO()
    render_description(make_description(), Console(file=buf, width=80, color_system=None))
    rows = [ln for ln in buf.getvalue().splitlines() if ln.split()[:1] in (["0"], ["1"])]
    assert len(rows) == 2
    assert all("…" not in row and len(row) <= 80 for row in rows)


def test_description_ends_with_the_safety_caution() -> None:
    lines = [line for line in lines_of(render(make_description())) if line]
    assert lines[-2:] == list(SAFETY_CAUTION)
