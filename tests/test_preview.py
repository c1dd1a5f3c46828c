"""`toothcomb preview`: the strip's size, and the reference, gap and tooth marks at the columns
the simulator's truth puts them."""

from __future__ import annotations

import numpy as np
import pytest
from toothcomb.cli.main import main
from toothcomb.cli.preview import (
    MARK_GAP,
    MARK_REFERENCE,
    MARK_TOOTH,
    braille_strip,
    build_preview,
    column_of,
)
from toothcomb.decoders.simulate import (
    Cam,
    Channel,
    ConstantSpeed,
    CrankWheel,
    HallSensor,
    Instrument,
    Scenario,
    VrSensor,
    simulate,
    single_tooth,
)

WIDTH = 120
HEIGHT = 4


def hall_60_2(**changes) -> Scenario:
    sc = Scenario(
        duration_s=0.4,
        speed=ConstantSpeed(rpm=1500.0),
        crank=CrankWheel(wheel="60-2", sensor=HallSensor()),
        cams=(Cam(name="cam", pattern=single_tooth(430.0, 35.0), sensor=HallSensor()),),
        instrument=Instrument(kind="float", sample_rate=100_000.0),
    )
    return sc.replace(**changes)


def is_braille(ch: str) -> bool:
    # source: Unicode Standard, Braille Patterns block U+2800..U+28FF
    return 0x2800 <= ord(ch) <= 0x28FF


def run_preview(capsys, path, *args: str) -> list[str]:
    code = main(["preview", str(path), "--width", str(WIDTH), "--height", str(HEIGHT), *args])
    out = capsys.readouterr()
    assert code == 0, out.err
    return out.out.splitlines()


def expected_columns(times, start: float, span: float) -> set[int]:
    return {int((t - start) / span * WIDTH) for t in times if start <= t < start + span}


@pytest.mark.parametrize(
    ("sensor", "start"), [("hall", 0.05), ("hall", 0.0), ("vr", 0.123)], ids=str
)
def test_strip_size_and_marks_for_a_60_2_crank(sensor: str, start: float, tmp_path, capsys) -> None:
    sc = hall_60_2() if sensor == "hall" else hall_60_2(crank=CrankWheel(wheel="60-2"))
    sim = simulate(sc)
    path = tmp_path / "run.h5"
    sim.write(path)
    lines = run_preview(capsys, path, "--revs", "1", "--start", str(start))

    # title, HEIGHT strip rows, the marks, the time axis, the legend
    assert len(lines) == 1 + HEIGHT + 3
    title, strip = lines[0], lines[1 : 1 + HEIGHT]
    marks, axis = lines[1 + HEIGHT], lines[2 + HEIGHT]
    assert title.startswith(f"crank: {sensor}") and "60-2 wheel, 1500 rpm" in title
    for row in strip:
        assert len(row) == WIDTH and all(is_braille(c) for c in row)
    assert len(marks) == WIDTH and set(marks) <= {" ", MARK_REFERENCE, MARK_GAP, MARK_TOOTH}
    assert axis.startswith(f"{start:.6g} s")

    # one revolution at 1500 rpm is shown
    span = 60.0 / 1500.0
    refs = {k for k, c in enumerate(marks) if c == MARK_REFERENCE}
    want = expected_columns(sim.truth["crank"]["reference_times_s"], start, span)
    assert len(want) == 1 and len(refs) == 1
    (got,) = refs
    (col,) = want
    assert abs(got - col) <= 1

    # the gap runs from the last tooth before it to tooth 1: (M + 1) pitches = 18 deg, i.e.
    # 18/360 of the strip; the marks fill the columns strictly between the two teeth
    gap = [k for k, c in enumerate(marks) if c == MARK_GAP]
    gap_cols = 18.0 / 360.0 * WIDTH
    if col >= gap_cols:  # the whole gap is on the strip
        assert gap == list(range(got - len(gap), got))
        assert gap_cols - 2 <= len(gap) <= gap_cols
    else:
        assert gap == list(range(got))
    # every other tooth event is marked (58 teeth over 120 columns: 2.07 columns apart)
    te = sim.truth["crank"]["tooth_events"]
    events = te["leading_s"] if sensor == "hall" else te["centre_s"]
    teeth = expected_columns(events, start, span)
    marked = {k for k, c in enumerate(marks) if c in (MARK_TOOTH, MARK_REFERENCE)}
    assert len(marked) == len(teeth)
    assert all(min(abs(k - t) for t in teeth) <= 1 for k in marked)


def test_a_cam_channel_under_the_crank_marks(tmp_path, capsys) -> None:
    sim = simulate(hall_60_2())
    path = tmp_path / "run.h5"
    sim.write(path)
    lines = run_preview(capsys, path, "--channel", "cam", "--revs", "2", "--start", "0.1")
    assert lines[0].startswith("cam: hall") and "crank crank: hall 60-2 wheel" in lines[0]
    marks = lines[1 + HEIGHT]
    span = 2 * 60.0 / 1500.0
    want = expected_columns(sim.truth["crank"]["reference_times_s"], 0.1, span)
    refs = [k for k, c in enumerate(marks) if c == MARK_REFERENCE]
    assert len(refs) == len(want) == 2
    assert all(abs(a - b) <= 1 for a, b in zip(sorted(refs), sorted(want), strict=True))
    # 116 teeth do not fit in 120 columns two apart: only the gaps and references are marked
    assert MARK_TOOTH not in marks and "fewer --revs" in lines[-1]
    # the cam window (35 deg of 720, high) lights the top dot row over about 35/720 of the strip
    top = lines[1]
    lit = sum(1 for c in top if (ord(c) - 0x2800) & 0x09)  # dots 1 and 4: the top dot row
    assert abs(lit - 35.0 / 720.0 * 2 * WIDTH / 2) <= 3


def test_without_a_decodable_crank_the_strip_is_drawn_without_marks(tmp_path, capsys) -> None:
    sc = hall_60_2(channels=(Channel(source="cam", name="cam"),))  # the cam alone
    path = tmp_path / "cam.h5"
    simulate(sc).write(path)
    lines = run_preview(capsys, path)
    assert len(lines) == 1 + HEIGHT + 4
    assert lines[1 + HEIGHT].strip() == ""
    assert "the crank was not found in this stretch; showing 0.2 s without tooth marks" in (
        lines[-1]
    )


def test_only_the_revolutions_there_are(tmp_path, capsys) -> None:
    path = tmp_path / "run.h5"
    simulate(hall_60_2()).write(path)
    p = build_preview(str(path), revs=5, start_s=0.3)
    assert p.stop_s == pytest.approx(0.4, abs=1e-4)
    assert p.revolutions == pytest.approx(2.5, abs=0.01)
    assert any("only 2.5 of the 5 revolutions" in n for n in p.notes)


@pytest.mark.parametrize(
    ("args", "words"),
    [
        (["--start", "9"], "--start 9 s is outside the capture, which lasts 0.4 s"),
        (["--channel", "spark"], "channel 'spark' is not in"),
        (["--revs", "0"], "outside 1..50"),
        (["--wheel", "sixty"], "wheel 'sixty' is not in N-M notation"),
    ],
)
def test_bad_options_exit_2_with_one_sentence(args, words, tmp_path, capsys) -> None:
    path = tmp_path / "run.h5"
    simulate(hall_60_2()).write(path)
    assert main(["preview", str(path), *args]) == 2
    assert words in capsys.readouterr().err


def test_braille_strip_draws_levels_and_steps() -> None:
    # a constant lights one dot row; lo at the bottom, hi at the top
    assert braille_strip(np.zeros(10), 3, 1, 0.0, 1.0) == ["⣀⣀⣀"]
    assert braille_strip(np.ones(10), 3, 1, 0.0, 1.0) == ["⠉⠉⠉"]
    # a step draws a vertical line where it happens, across both rows
    rows = braille_strip(np.r_[np.zeros(6), np.ones(6)], 3, 2, 0.0, 1.0)
    assert rows == ["⠀⢸⠉", "⣀⣸⠀"]
    # any number of samples fills exactly width x height characters
    for n in (1, 7, 1000):
        out = braille_strip(np.sin(np.arange(n)), 17, 3, -1.0, 1.0)
        assert len(out) == 3 and all(len(r) == 17 for r in out)


def test_column_of_bounds() -> None:
    assert column_of(0.0, 0.0, 1.0, 10) == 0
    assert column_of(0.999, 0.0, 1.0, 10) == 9
    assert column_of(-0.001, 0.0, 1.0, 10) is None
    assert column_of(0.5, 0.0, 0.0, 10) is None


def test_vr_sensor_scenario_is_a_vr(tmp_path) -> None:
    sc = hall_60_2(crank=CrankWheel(wheel="60-2", sensor=VrSensor()))
    path = tmp_path / "vr.h5"
    simulate(sc).write(path)
    p = build_preview(str(path), revs=1, start_s=0.1)
    assert p.kind == "vr" and p.crank is not None and p.crank.wheel == "60-2"
    assert p.crank.rpm == pytest.approx(1500.0, rel=1e-3)
