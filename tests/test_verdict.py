"""Timing verdicts: simulated captures of one engine compared with its profile, with a learned
profile and with a known-good decode; the whole-tooth rule; the report and the command line."""

from __future__ import annotations

import io
import json
import math
import re
from dataclasses import replace
from pathlib import Path
from typing import Any

import pytest
from rich.console import Console
from toothcomb.cli.main import main
from toothcomb.cli.report import marks_out_of_time, render_decode, timing_ruler
from toothcomb.decoders.errors import UsageError
from toothcomb.decoders.model import CaptureInfo
from toothcomb.decoders.pipeline import decode_capture
from toothcomb.decoders.profiles import (
    dumps_profile,
    learn_profile,
    load_profile,
    parse_profile,
    save_profile,
)
from toothcomb.decoders.result import (
    AngleStats,
    CamEdge,
    CamResult,
    CrankResult,
    DecodeResult,
    RpmStats,
)
from toothcomb.decoders.simulate import (
    Cam,
    Channel,
    ConstantSpeed,
    CrankWheel,
    HallSensor,
    Instrument,
    Scenario,
    n_plus_one,
    simulate,
    single_tooth,
)
from toothcomb.decoders.verdict import (
    REPEAT_FRACTION,
    Mark,
    compare,
    fit_shift,
    from_tdc,
    sentence,
    status_of,
    wrap_deviation,
)

# source: a four-stroke camshaft turns once per two crank revolutions (720 deg CA), so one tooth
# of a T-tooth cam sprocket is 720/T deg CA; T = 42 gives 17.142857 deg CA
DRIVE_TOOTH = 720.0 / 42
# source: an N-M crank wheel has N equally spaced positions, pitch 360/N; 60-2 gives 6 deg CA
PITCH = 360.0 / 60
TOOTH1_DEG = 84.0


def engine(*, tooth1_deg: float = TOOTH1_DEG, **intake: Any) -> Scenario:
    """The engine every simulated capture here comes from: a four-cylinder at 3000 rpm, 60-2
    Hall crank, a 4+1 intake cam and a single-tooth exhaust cam, 42-tooth belt sprockets;
    ``intake`` changes the intake cam (``jumped_teeth``, ``offset_deg``)."""
    return Scenario(
        name="verdict-engine",
        duration_s=0.5,
        seed=3,
        n_cyl=4,
        start_angle_deg=10.0,
        speed=ConstantSpeed(rpm=3000.0, ripple=0.01),
        crank=CrankWheel(wheel="60-2", tooth1_deg=tooth1_deg, sensor=HallSensor(tau_s=1e-6)),
        cams=(
            Cam(
                name="cam_intake",
                pattern=n_plus_one(4, first_deg=20.0, width_deg=15.0, extra_after_deg=40.0),
                sprocket_teeth=42,
                **intake,
            ),
            Cam(name="cam_exhaust", pattern=single_tooth(400.0, 40.0), sprocket_teeth=42),
        ),
        channels=(
            Channel(name="crank", source="crank", noise_v=0.02),
            Channel(name="intake", source="cam_intake", noise_v=0.02),
            Channel(name="exhaust", source="cam_exhaust", noise_v=0.02),
        ),
        instrument=Instrument(kind="float", sample_rate=100_000.0),
    )


SCENARIOS: dict[str, dict[str, Any]] = {
    "good": {},
    "jumped+1": {"jumped_teeth": 1},
    "jumped-1": {"jumped_teeth": -1},
    # a stretched chain lets the cam lag by a fraction of a tooth: half a drive tooth here
    "stretched": {"offset_deg": 0.5 * DRIVE_TOOTH},
    # the crank wheel pressed on one trigger tooth late: tooth 1 comes a pitch later, so every
    # cam edge is a pitch earlier after the reference
    "wheel+1": {"tooth1_deg": TOOTH1_DEG + PITCH},
}


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, tuple[Path, DecodeResult, dict]]:
    """Each scenario simulated, written as HDF5 and decoded once for the whole module."""
    folder = tmp_path_factory.mktemp("verdict")
    out = {}
    for name, change in SCENARIOS.items():
        sim = simulate(engine(**change))
        path = folder / f"{name}.h5"
        sim.write(path)
        out[name] = (path, decode_capture(str(path)), sim.truth)
    return out


def truth_profile(truth: dict, **extra: Any) -> dict[str, Any]:
    """A profile of the engine written from the simulator's true geometry alone (not from any
    decode): each cam edge at its true cycle angle after the crank reference."""
    cams = []
    for cam in truth["cams"]:
        edges = [
            {
                "flank": e["flank"],
                "direction": e["direction"],
                "angle_deg": e["revolution"] * 360.0 + e["angle_after_ref_deg"],
                "window": e["window"],
            }
            for e in cam["edges"]
        ]
        cams.append({"name": cam["channel"], "channel": cam["channel"], "edges": edges})
    return {
        "name": "verdict-engine",
        "crank": {"wheel": "60-2", "sensor": "hall"},
        "drive": {"kind": "belt", "sprocket_teeth": 42},
        "tdc_after_reference_deg": (0.0 - truth["crank"]["reference_angle_deg"]) % 360.0,
        "cams": cams,
        **extra,
    }


@pytest.fixture(scope="module")
def profile(runs: dict) -> Any:
    return parse_profile(truth_profile(runs["good"][2]), "verdict-engine.toml")


def cam_of(result: DecodeResult, channel: str) -> CamResult:
    return next(c for c in result.cams if c.channel == channel)


def verdict_cam(result: DecodeResult, name: str) -> Any:
    assert result.verdict is not None
    return next(c for c in result.verdict.cams if c.name == name)


def compared(cam: CamResult) -> list[CamEdge]:
    return [e for e in cam.edges if e.comparison is not None]


# --------------------------------------------------------------------------- simulated engine


def test_in_time_engine_is_in_time_everywhere(runs: dict, profile: Any) -> None:
    r = compare(runs["good"][1], profile)
    for channel in ("intake", "exhaust"):
        edges = compared(cam_of(r, channel))
        # every edge of the pattern was matched: 10 intake edges (5 windows), 2 exhaust edges
        assert len(edges) == (10 if channel == "intake" else 2)
        for e in edges:
            c = e.comparison
            assert c is not None
            assert c.status == "in-time" and c.off_by_teeth is None
            assert abs(c.deviation_deg) < 0.1
            assert 0 < c.uncertainty_deg < 0.2
    assert marks_out_of_time(r) == []
    assert r.verdict is not None and r.verdict.in_time
    assert verdict_cam(r, "intake").sentence.startswith("intake cam in time")


@pytest.mark.parametrize(("run", "teeth"), [("jumped+1", 1), ("jumped-1", -1)])
def test_belt_jumped_one_tooth_is_called_with_count_and_direction(
    runs: dict, profile: Any, run: str, teeth: int
) -> None:
    r = compare(runs[run][1], profile)
    intake = compared(cam_of(r, "intake"))
    assert len(intake) == 10
    for e in intake:
        c = e.comparison
        assert c is not None
        assert c.status == "off-by-teeth"
        assert c.off_by_teeth == teeth and c.tooth_kind == "drive"
        # 17.14 deg CA per tooth of the 42-tooth sprocket, late for +1, early for -1
        assert c.deviation_deg == pytest.approx(teeth * DRIVE_TOOTH, abs=0.3)
        assert c.deviation_drive_teeth == pytest.approx(teeth, abs=0.02)
        assert c.deviation_trigger_teeth == pytest.approx(teeth * DRIVE_TOOTH / PITCH, abs=0.05)
    vc = verdict_cam(r, "intake")
    assert (vc.status, vc.off_by_teeth, vc.tooth_kind) == ("off-by-teeth", teeth, "drive")
    assert vc.shift_deg == pytest.approx(teeth * DRIVE_TOOTH, abs=0.15)
    late, retarded = ("late", "retarded") if teeth > 0 else ("early", "advanced")
    assert re.fullmatch(
        rf"intake cam 1 drive tooth {late} \(17\.[12] deg CA {retarded}\)", vc.sentence
    )
    # the exhaust cam, on its own belt here, stayed put
    assert verdict_cam(r, "exhaust").status == "in-time"
    assert {c.channel for c, _ in marks_out_of_time(r)} == {"intake"}


def test_jumped_edge_is_paired_with_its_own_expected_edge(runs: dict, profile: Any) -> None:
    """The 4+1 pattern has a leading flank 40 deg after another: after a 17 deg jump, pairing
    each edge with its nearest expected edge would still be right here, but pairing after the
    common shift must give each measured edge the expected edge of its own window."""
    r = compare(runs["jumped+1"][1], profile)
    for e in compared(cam_of(r, "intake")):
        c = e.comparison
        assert c is not None and c.expected_cycle_deg is not None
        assert e.cycle_angle is not None
        assert wrap_deviation(e.cycle_angle - c.expected_cycle_deg, 720.0) == pytest.approx(
            c.deviation_deg
        )
        assert abs(c.deviation_deg - DRIVE_TOOTH) < 0.3


def test_stretched_chain_half_a_tooth_is_drifted(runs: dict, profile: Any) -> None:
    r = compare(runs["stretched"][1], profile)
    for e in compared(cam_of(r, "intake")):
        c = e.comparison
        assert c is not None
        assert c.status == "drifted" and c.off_by_teeth is None and c.tooth_kind is None
        assert c.deviation_deg == pytest.approx(0.5 * DRIVE_TOOTH, abs=0.3)
        assert c.deviation_drive_teeth == pytest.approx(0.5, abs=0.02)
    vc = verdict_cam(r, "intake")
    assert vc.status == "drifted"
    assert vc.sentence.startswith("intake cam drifted 8.6 deg CA late (retarded; +0.50 drive")
    assert verdict_cam(r, "exhaust").status == "in-time"


def test_crank_wheel_one_trigger_tooth_off_moves_every_cam(runs: dict, profile: Any) -> None:
    r = compare(runs["wheel+1"][1], profile)
    for channel in ("intake", "exhaust"):
        for e in compared(cam_of(r, channel)):
            c = e.comparison
            assert c is not None
            assert (c.status, c.off_by_teeth, c.tooth_kind) == ("off-by-teeth", -1, "trigger")
            assert c.deviation_deg == pytest.approx(-PITCH, abs=0.2)
            assert c.deviation_trigger_teeth == pytest.approx(-1.0, abs=0.03)
            # a pitch of 6 deg is 0.35 of a drive tooth: no whole number of drive teeth
            assert c.deviation_drive_teeth == pytest.approx(-PITCH / DRIVE_TOOTH, abs=0.02)
    assert r.verdict is not None
    joint = [s for s in r.verdict.sentences if s.startswith("every cam")]
    assert joint == [
        "every cam is 1 crank trigger tooth early: the crank trigger wheel (or the crank "
        "sensor's mounting) sits a tooth out, not the cam drive"
    ]
    assert verdict_cam(r, "intake").sentence == (
        "intake cam 1 crank trigger tooth early (6.0 deg CA advanced)"
    )


def test_trigger_tooth_call_needs_every_cam(runs: dict, profile: Any) -> None:
    """One cam a pitch off while the other is in time is not the crank wheel: drifted."""
    moved = replace(runs["good"][1], cams=(cam_of(runs["wheel+1"][1], "intake"),
                                           cam_of(runs["good"][1], "exhaust")))
    r = compare(moved, profile)
    intake = verdict_cam(r, "intake")
    assert intake.status == "drifted" and intake.off_by_teeth is None
    assert all(e.comparison.status == "drifted" for e in compared(cam_of(r, "intake")))  # type: ignore[union-attr]


def test_angles_from_tdc_follow_the_profile(runs: dict, profile: Any) -> None:
    r = compare(runs["good"][1], profile)
    e = next(e for e in compared(cam_of(r, "intake")) if e.flank == "leading" and e.window == 0)
    c = e.comparison
    assert c is not None and c.from_tdc_deg is not None
    # the simulator puts firing TDC of cylinder 1 at engine angle 0 and the intake windows at
    # 20, 200, 380, 560 (+ the extra one at 240); the window measured first after the reference
    # begins at engine angle 200, which is 160 deg before the next TDC at 360
    assert c.from_tdc_deg == pytest.approx(-160.0, abs=0.1)
    assert c.expected_from_tdc_deg == pytest.approx(-160.0, abs=0.01)


def test_learned_profile_round_trip_through_a_file(runs: dict, tmp_path: Path) -> None:
    good = runs["good"][1]
    learned = learn_profile(good, name="learned", sprocket_teeth=42, drive="belt",
                            tolerance_deg=2.5)
    path = tmp_path / "engine.toml"
    save_profile(learned, path)
    again = load_profile(path)
    assert again == learned
    assert again.drive is not None and again.drive.sprocket_teeth == 42
    # the learned angles are the decode's own
    lead = next(e for e in again.cam("intake").edges if e.flank == "leading" and e.window == 0)
    measured = next(e for e in cam_of(good, "intake").edges if e.flank == "leading"
                    and e.window == 0)
    assert lead.angle_deg == pytest.approx(measured.cycle_angle, abs=1e-4)
    assert lead.uncertainty_deg > 0
    same = compare(good, again)
    assert all(
        e.comparison is not None and abs(e.comparison.deviation_deg) < 1e-3
        and e.comparison.tolerance_deg == 2.5
        for c in same.cams for e in c.edges
    )
    jumped = compare(runs["jumped-1"][1], again)
    assert verdict_cam(jumped, "intake").off_by_teeth == -1
    # the learned reference's own uncertainty is part of each deviation's
    c = next(iter(compared(cam_of(jumped, "intake")))).comparison
    assert c is not None and c.uncertainty_deg > lead.uncertainty_deg


def test_known_good_decode_json_is_a_reference(runs: dict) -> None:
    reference = json.loads(json.dumps(runs["good"][1].to_json()))
    r = compare(runs["jumped+1"][1], reference, sprocket_teeth=42)
    assert r.verdict is not None and r.verdict.reference_kind == "known-good capture"
    vc = verdict_cam(r, "intake")
    assert (vc.status, vc.off_by_teeth) == ("off-by-teeth", 1)
    # without the sprocket's tooth count the jump is 2.86 trigger teeth: no whole tooth
    r2 = compare(runs["jumped+1"][1], reference)
    vc2 = verdict_cam(r2, "intake")
    assert vc2.status == "drifted" and vc2.shift_drive_teeth is None
    assert vc2.shift_trigger_teeth == pytest.approx(DRIVE_TOOTH / PITCH, abs=0.03)


def test_json_of_a_compared_decode_carries_the_design_fields(runs: dict, profile: Any) -> None:
    data = json.loads(json.dumps(compare(runs["jumped+1"][1], profile).to_json()))
    intake = next(c for c in data["cams"] if c["channel"] == "intake")
    edge = intake["edges"][0]
    assert {
        "expected_deg", "deviation_deg", "deviation_trigger_teeth", "deviation_drive_teeth",
        "uncertainty_deg", "status", "off_by_teeth",
    } <= set(edge)
    assert edge["status"] == "off-by-teeth" and edge["off_by_teeth"] == 1
    assert edge["deviation_drive_teeth"] == pytest.approx(1.0, abs=0.02)
    assert 0 <= edge["expected_deg"] < 360
    assert data["verdict"]["in_time"] is False
    assert data["verdict"]["sprocket_teeth"] == 42


def test_tolerance_argument_overrides_the_profile(runs: dict, profile: Any) -> None:
    r = compare(runs["stretched"][1], profile, tolerance_deg=10.0)
    assert verdict_cam(r, "intake").status == "in-time"
    assert marks_out_of_time(r) == []


# --------------------------------------------------------------------------- the whole-tooth rule


def test_half_a_drive_tooth_with_large_jitter_is_not_off_by_one() -> None:
    """An edge 0.5 drive tooth late whose events scatter by 6 deg CA (a phaser hunting, a bad
    sensor) must not be called one tooth off: the evidence cannot tell 0 from 1."""
    half = 0.5 * DRIVE_TOOTH
    result = hand_result(
        [CamEdge("leading", "rising", AngleStats(100.0 + half, 6.0, 90.0, 115.0, 5), 0, ())]
    )
    profile = parse_profile(
        {
            "name": "one-window",
            "drive": {"sprocket_teeth": 42},
            "cams": [{"name": "intake", "edges": [{"flank": "leading", "angle_deg": 100.0}]}],
        }
    )
    c = compare(result, profile).cams[0].edges[0].comparison
    assert c is not None
    assert c.status == "drifted" and c.off_by_teeth is None
    assert c.deviation_drive_teeth == pytest.approx(0.5)
    # the uncertainty comes from the spread: 6 / sqrt(5) = 2.68 deg CA (plus the sampling)
    assert c.uncertainty_deg == pytest.approx(6.0 / math.sqrt(5), rel=0.01)
    # the same mean with a steady edge is still no whole tooth
    steady = hand_result(
        [CamEdge("leading", "rising", AngleStats(100.0 + half, 0.01, 100.0, 109.0, 50), 0, ())]
    )
    assert compare(steady, profile).cams[0].edges[0].comparison.status == "drifted"  # type: ignore[union-attr]


@pytest.mark.parametrize(
    ("deviation", "u", "teeth", "expected"),
    [
        (2.9, 0.05, 42, ("in-time", None, None)),
        (-3.0, 0.05, 42, ("in-time", None, None)),
        (17.2, 0.05, 42, ("off-by-teeth", 1, "drive")),
        (-34.3, 0.05, 42, ("off-by-teeth", -2, "drive")),
        (12.0, 0.05, 42, ("off-by-teeth", 2, "trigger")),
        (12.0, 0.05, None, ("off-by-teeth", 2, "trigger")),
        # 17.14 is 2.86 trigger teeth: no whole number of them
        (17.14, 0.05, None, ("drifted", None, None)),
        # a whole tooth, but so uncertain that 0 cannot be ruled out
        (17.14, 4.0, 42, ("drifted", None, None)),
        # 0.79 drive tooth (2.25 trigger teeth): near no whole tooth of either kind
        (13.5, 0.05, 42, ("drifted", None, None)),
        (float("nan"), 0.05, 42, ("drifted", None, None)),
    ],
)
def test_status_rule(deviation: float, u: float, teeth: int | None, expected: tuple) -> None:
    drive = 720.0 / teeth if teeth else None
    got = status_of(deviation, u, tolerance_deg=3.0, trigger_pitch_deg=PITCH,
                    drive_tooth_deg=drive)
    assert got == expected


def test_whole_tooth_allowance_is_a_few_percent_of_a_tooth() -> None:
    # within Z_MATCH = 3 of hypot(u, 3 % of a tooth) of one drive tooth: called
    allowance = 3 * REPEAT_FRACTION * DRIVE_TOOTH
    inside = status_of(DRIVE_TOOTH + 0.9 * allowance, 0.0, tolerance_deg=3.0,
                       trigger_pitch_deg=PITCH, drive_tooth_deg=DRIVE_TOOTH)
    outside = status_of(DRIVE_TOOTH + 1.1 * allowance, 0.0, tolerance_deg=3.0,
                        trigger_pitch_deg=PITCH, drive_tooth_deg=DRIVE_TOOTH)
    assert inside == ("off-by-teeth", 1, "drive")
    assert outside[0] == "drifted"


# --------------------------------------------------------------------------- helpers and fit


@pytest.mark.parametrize(
    ("x", "period", "wrapped"),
    [(0.0, 720.0, 0.0), (360.0, 720.0, 360.0), (-360.0, 720.0, 360.0), (361.0, 720.0, -359.0),
     (180.0, 360.0, 180.0), (-180.0, 360.0, 180.0), (725.0, 720.0, 5.0), (-17.0, 360.0, -17.0)],
)
def test_wrap_deviation_half_open_range(x: float, period: float, wrapped: float) -> None:
    assert wrap_deviation(x, period) == pytest.approx(wrapped)


def test_from_tdc_sign_is_before_negative() -> None:
    assert from_tdc(250.0, 276.0) == pytest.approx(-26.0)
    assert from_tdc(10.0, 276.0) == pytest.approx(94.0)


def test_fit_does_not_let_a_jump_pair_an_edge_with_its_neighbour() -> None:
    """Leading flanks 30 deg apart moved 17 deg: each is then 13 deg from the next expected
    flank, nearer than its own; the common shift keeps every pair right."""
    expected = [Mark("leading", "rising", a) for a in (100.0, 130.0, 160.0, 400.0)]
    measured = [Mark("leading", "rising", a + 17.14) for a in (100.0, 130.0, 160.0, 400.0)]
    fit = fit_shift(expected, measured, 720.0)
    assert fit.shift == pytest.approx(17.14)
    assert [(i, j) for i, j, _ in fit.pairs] == [(0, 0), (1, 1), (2, 2), (3, 3)]
    assert all(abs(r) < 1e-9 for *_, r in fit.pairs)


def test_fit_of_a_symmetric_pattern_takes_the_smallest_shift() -> None:
    expected = [Mark("leading", None, a) for a in (10.0, 190.0, 370.0, 550.0)]
    measured = [Mark("leading", "rising", a + 5.0) for a in (10.0, 190.0, 370.0, 550.0)]
    assert fit_shift(expected, measured, 720.0).shift == pytest.approx(5.0)


def test_fit_with_nothing_measured_pairs_nothing() -> None:
    fit = fit_shift([Mark("leading", None, 10.0)], [], 720.0)
    assert fit.pairs == () and fit.shift == 0.0


def test_sentences_in_the_trade_words() -> None:
    assert sentence("intake", "off-by-teeth", 17.14, off_by_teeth=1, tooth_kind="drive") == (
        "intake cam 1 drive tooth late (17.1 deg CA retarded)"
    )
    assert sentence("exhaust", "off-by-teeth", -34.29, off_by_teeth=-2, tooth_kind="drive") == (
        "exhaust cam 2 drive teeth early (34.3 deg CA advanced)"
    )
    assert sentence("cam_b", "drifted", 5.0, trigger_teeth=0.83).startswith(
        "cam b drifted 5.0 deg CA late (retarded; +0.83 trigger teeth"
    )


# --------------------------------------------------------------------------- hand-built results


def hand_result(
    edges: list[CamEdge], *, channel: str = "cam", wheel: str = "60-2", sensor: str = "hall"
) -> DecodeResult:
    """A decode made by hand: a 60-2 crank at 3000 rpm, one cam with ``edges``."""
    info = CaptureInfo("hand.h5", 100_000.0, 50_000, ("crank", channel), "hdf5")
    n, m = (int(x) for x in wheel.split("-"))
    crank = CrankResult("crank", "hall", wheel, n, m, "normal", "rising",
                        RpmStats(2990.0, 3000.0, 3010.0), 24, 0, (0.004,))
    cam = CamResult(channel, sensor, tuple(edges))  # type: ignore[arg-type]
    return DecodeResult(info, crank, (cam,))


def two_edges(lead: float, trail: float, revolution: int | None = 0) -> list[CamEdge]:
    lead_stats = AngleStats(lead, 0.01, lead, lead, 20)
    trail_stats = AngleStats(trail, 0.01, trail, trail, 20)
    return [
        CamEdge("leading", "rising", lead_stats, revolution, (), None, 0),
        CamEdge("trailing", "falling", trail_stats, revolution, (), None, 0),
    ]


PROFILE_TWO = {
    "name": "two-edges",
    "crank": {"wheel": "60-2"},
    "drive": {"sprocket_teeth": 42},
    "cams": [{"name": "intake", "channel": "cam", "leading_direction": "rising",
              "pattern": [[100.0, 150.0]]}],
}


def test_revolution_labels_turned_by_the_decode_are_put_back() -> None:
    # the profile's revolution 0 is the decode's revolution 1 (a 360 deg turn of the labels)
    profile = parse_profile({**PROFILE_TWO, "cams": [
        {"name": "intake", "channel": "cam", "pattern": [[460.0, 510.0]]}]})
    r = compare(hand_result(two_edges(100.0, 150.0, revolution=0)), profile)
    assert r.verdict is not None
    assert "cycle-labels-turned" in {f.code for f in r.verdict.findings}
    c = r.cams[0].edges[0].comparison
    assert c is not None
    assert c.status == "in-time" and c.deviation_deg == pytest.approx(0.0)
    # the expected edge is given in the decode's own frame
    assert (c.expected_revolution, c.expected_deg) == (0, pytest.approx(100.0))


def test_unknown_revolution_compares_per_revolution() -> None:
    profile = parse_profile(PROFILE_TWO)
    r = compare(hand_result(two_edges(117.0, 167.0, revolution=None)), profile)
    c = r.cams[0].edges[0].comparison
    assert c is not None
    assert c.period_deg == 360.0 and c.expected_revolution is None
    assert c.off_by_teeth == 1 and c.deviation_deg == pytest.approx(17.0)


def test_inverted_signal_is_matched_on_flanks_and_reported() -> None:
    edges = [
        CamEdge("leading", "falling", AngleStats(100.0, 0.01, 100, 100, 20), 0, (), None, 0),
        CamEdge("trailing", "rising", AngleStats(150.0, 0.01, 150, 150, 20), 0, (), None, 0),
    ]
    r = compare(hand_result(edges), parse_profile(PROFILE_TWO))
    assert r.verdict is not None
    assert "cam-signal-inverted" in {f.code for f in r.verdict.findings}
    assert all(e.comparison is not None and e.comparison.status == "in-time"
               for e in r.cams[0].edges)


def test_cams_are_paired_by_pattern_when_the_channel_names_differ() -> None:
    info = CaptureInfo("hand.wav", 48000.0, 48000, ("ch0", "ch1", "ch2"), "wav")
    crank = CrankResult("ch0", "vr", "60-2", 60, 2, "normal", "falling",
                        RpmStats(800.0, 800.0, 800.0), 10, 0, (0.01,))
    a = CamResult("ch1", "hall", tuple(two_edges(400.0 - 360.0, 420.0 - 360.0, 1)))
    b = CamResult("ch2", "hall", tuple(two_edges(100.0, 150.0, 0)))
    profile = parse_profile({
        "name": "pairs",
        "cams": [
            {"name": "intake", "channel": "intake", "pattern": [[100.0, 150.0]]},
            {"name": "exhaust", "channel": "exhaust", "pattern": [[400.0, 420.0]]},
        ],
    })
    r = compare(DecodeResult(info, crank, (a, b)), profile)
    assert r.verdict is not None
    assert {c.name: c.channel for c in r.verdict.cams} == {"intake": "ch2", "exhaust": "ch1"}
    assert r.verdict.in_time
    assert r.choices["against intake cam"] == "ch2: its edge pattern fits best"


def test_a_profile_cam_without_a_decoded_cam_is_not_measured() -> None:
    profile = parse_profile({
        "name": "two",
        "cams": [
            {"name": "intake", "channel": "cam", "pattern": [[100.0, 150.0]]},
            {"name": "exhaust", "channel": "9", "pattern": [[400.0, 420.0]]},
        ],
    })
    r = compare(hand_result(two_edges(100.0, 150.0)), profile)
    assert r.verdict is not None
    ex = next(c for c in r.verdict.cams if c.name == "exhaust")
    assert ex.status == "not-measured" and ex.channel is None
    assert "cam-not-found" in {f.code for f in r.verdict.findings}
    assert r.verdict.in_time and marks_out_of_time(r) == []


def test_a_profile_for_another_wheel_is_refused() -> None:
    with pytest.raises(UsageError, match=r"shows a 36-1 crank wheel but 'two-edges' is for a "
                                         r"60-2 wheel"):
        compare(hand_result(two_edges(100.0, 150.0), wheel="36-1"), parse_profile(PROFILE_TWO))


@pytest.mark.parametrize(
    ("kwargs", "words"),
    [({"sprocket_teeth": 1}, "sprocket teeth 1"), ({"tolerance_deg": -2.0}, "tolerance -2.0"),
     ({"sprocket_teeth": True}, "sprocket teeth True")],
)
def test_bad_arguments_are_named(kwargs: dict, words: str) -> None:
    with pytest.raises(UsageError, match=re.escape(words)):
        compare(hand_result(two_edges(100.0, 150.0)), parse_profile(PROFILE_TWO), **kwargs)


def test_correlation_code_named_when_the_profile_gives_bank_and_sensor() -> None:
    profile = parse_profile({**PROFILE_TWO, "cams": [
        {"name": "exhaust", "channel": "cam", "bank": 2, "sensor_letter": "B",
         "pattern": [[100.0, 150.0]]}]})
    r = compare(hand_result(two_edges(117.14, 167.14)), profile)
    assert r.verdict is not None
    # source: SAE J2012, P0019 = Crankshaft Position - Camshaft Position Correlation Bank 2
    # Sensor B (P0016..P0019: bank 1 A, bank 1 B, bank 2 A, bank 2 B)
    assert r.verdict.cams[0].correlation_code == "P0019"
    assert "P0016-P0019" in r.verdict.context[0] and "P0019" in r.verdict.context[0]
    assert compare(hand_result(two_edges(100.0, 150.0)), profile).verdict.context == ()  # type: ignore[union-attr]


# --------------------------------------------------------------------------- report


def render(result: DecodeResult, *, color: bool = False, width: int = 100) -> str:
    buf = io.StringIO()
    console = Console(file=buf, width=width, force_terminal=color,
                      color_system="standard" if color else None)
    render_decode(result, console)
    return buf.getvalue()


def test_report_shows_the_verdict_line_and_the_highlighted_mark(
    runs: dict, profile: Any
) -> None:
    r = compare(runs["jumped+1"][1], profile)
    text = render(r)
    lines = [line.rstrip() for line in text.splitlines()]
    assert any(re.fullmatch(r"  intake cam 1 drive tooth late \(17\.[12] deg CA retarded\)", x)
               for x in lines)
    assert "  exhaust cam in time (+0.0 deg CA, tolerance ±3 deg CA)" in lines
    assert "  measured at 3000 rpm mean engine speed, 2940-3031 rpm" in lines
    # the ruler: expected marks over measured ones, the intake's marked X (off by teeth), the
    # exhaust's o (in time)
    exp_row = next(x for x in lines if x.startswith("intake exp"))
    meas_row = lines[lines.index(exp_row) + 1]
    assert meas_row.lstrip().startswith("meas")
    assert set(meas_row.split(None, 1)[1]) == {"X", " "}
    assert meas_row.count("X") >= 8 and exp_row.count("|") >= 8
    # each X sits about 17 deg CA right of its expected mark: 2 columns of 80 over 720 deg
    first_exp, first_x = exp_row.index("|"), meas_row.index("X")
    assert 1 <= first_x - first_exp <= 3
    ex_row = next(x for x in lines if x.startswith("exhaust exp"))
    assert set(lines[lines.index(ex_row) + 1].split(None, 1)[1]) == {"o", " "}
    assert "| expected   o in time   ~ drifted   X off by whole teeth   T TDC cyl. 1" in lines
    assert "P0016-P0019" in " ".join(text.split())
    assert max(len(x) for x in lines) <= 100
    # in colour the X marks are highlighted: white on red
    colored = render(r, color=True)
    assert "\x1b[1;37;41mX" in colored


def test_ruler_shows_tdc_and_the_scale(runs: dict, profile: Any) -> None:
    r = compare(runs["good"][1], profile)
    rows = [t.plain for t in timing_ruler(r, 92)]
    assert rows[0] == "Timing ruler: deg CA after the crank reference, 0-720 (revolutions 0 and 1)"
    scale, axis = rows[1], rows[2]
    assert scale.split() == ["0", "180", "360", "540", "720"]
    # TDC of cylinder 1 at 277.5 and 637.5 deg CA after the reference
    assert axis.count("T") == 2
    columns = len(axis) - axis.index("|")
    assert axis.index("T") - axis.index("|") == round(277.5 / 720 * (columns - 1))


def test_report_table_gives_btdc(runs: dict, profile: Any) -> None:
    text = render(compare(runs["good"][1], profile))
    row = next(x for x in text.splitlines() if x.startswith("intake W0 lead"))
    assert "160.0 BTDC" in row and "in time" in row


# --------------------------------------------------------------------------- command line


def test_learn_then_decode_against_the_learned_profile(
    runs: dict, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    good, jumped = runs["good"][0], runs["jumped-1"][0]
    out = tmp_path / "engine.toml"
    code = main(["learn", str(good), str(out), "--sprocket-teeth", "42", "--drive", "belt",
                 "--tdc-after-reference", "277.5", "--quiet"])
    assert code == 0
    assert load_profile(out).tdc_after_reference_deg == 277.5
    assert main(["decode", str(good), "--against", str(out), "--quiet"]) == 0
    assert main(["decode", str(jumped), "--against", str(out), "--json", "-", "--quiet"]) == 1
    data = json.loads(capsys.readouterr().out)
    assert data["verdict"]["cams"][0]["sentence"].startswith("intake cam 1 drive tooth early")


def test_decode_against_a_known_good_json(
    runs: dict, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    ref = tmp_path / "good.json"
    assert main(["learn", str(runs["good"][0]), str(ref), "--quiet"]) == 0
    assert json.loads(ref.read_text())["cams"]
    code = main(["decode", str(runs["wheel+1"][0]), "--against", str(ref), "--width", "100"])
    assert code == 1
    out = " ".join(capsys.readouterr().out.split())
    assert "Timing against known-good capture good" in out
    assert "every cam is 1 crank trigger tooth early" in out


@pytest.mark.parametrize(
    ("argv", "words"),
    [
        (["--tolerance", "2"], "--tolerance 2.0 needs something to compare with"),
        (["--sprocket-teeth", "42"], "--sprocket-teeth 42 needs something to compare with"),
        (["--against", "nowhere.toml"], "reference 'nowhere.toml' does not exist"),
        (["--against", "BAD"], "reference 'BAD' does not exist"),
    ],
)
def test_decode_verdict_usage_errors_exit_2(
    runs: dict, argv: list[str], words: str, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["decode", str(runs["good"][0]), *argv]) == 2
    err = capsys.readouterr().err
    assert words in err and len(err.strip().splitlines()) == 1


def test_bad_profile_fails_before_the_decode(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    bad = tmp_path / "bad.toml"
    bad.write_text('name = "x"\ntolerance_deg = "3"\n[[cams]]\nname = "in"\npattern = [[1, 2]]\n')
    capture = tmp_path / "none.wav"
    capture.write_bytes(b"RIFF")  # never read: the profile is refused first
    assert main(["decode", str(capture), "--against", str(bad)]) == 2
    err = capsys.readouterr().err.strip()
    assert err == f"toothcomb: profile '{bad}': tolerance_deg '3' is not a number; give e.g. 1"


def test_learn_refuses_other_suffixes_and_profile_options_for_json(
    runs: dict, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["learn", str(runs["good"][0]), str(tmp_path / "x.yaml")]) == 2
    assert "name it .toml" in capsys.readouterr().err
    assert main(["learn", str(runs["good"][0]), str(tmp_path / "x.json"), "--drive", "chain"]) == 2
    assert "--drive is recorded only in a profile" in capsys.readouterr().err


def test_profiles_command_lists_and_prints(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["profiles"]) == 0
    listing = capsys.readouterr().out.splitlines()
    assert [x.split()[0] for x in listing] == [
        "demo-belt-60-2-vr", "demo-dohc-36-1-hall", "demo-idle-60-2-vr"
    ]
    assert main(["profiles", "demo-belt-60-2-vr"]) == 0
    text = capsys.readouterr().out
    assert 'name = "demo-belt-60-2-vr"' in text and "sprocket_teeth = 42" in text
    assert main(["profiles", "no-such"]) == 2


def test_dumped_profile_of_a_comparison_reference_reads_back(profile: Any) -> None:
    from toothcomb.decoders.profiles import loads_profile

    assert loads_profile(dumps_profile(profile)) == profile
