"""The crank half of the pattern library: wheel files, the generic wheel decoder, the listing.

A library wheel is a cycle of steps on a grid; its sync matches the ratios of consecutive tooth
intervals with the ratios of consecutive steps. The decodes here are held against the
simulator's truth (tooth-1 times and cam edge angles) and, where a figure can be worked out by
hand, against that figure.
"""

from __future__ import annotations

import contextlib
import io
import itertools
import json
import math
from functools import reduce

import numpy as np
import pytest
from conftest import cam_errors, finding_codes, local_rpm
from test_conditions import decode, engine, vr
from toothcomb.cli.main import main
from toothcomb.decoders.errors import UsageError
from toothcomb.decoders.options import DecodeOptions
from toothcomb.decoders.patterns import ENV, entries, parse_text
from toothcomb.decoders.simulate import (
    Channel,
    ConstantSpeed,
    CrankingSpeed,
    DamagedTooth,
    Dropout,
    HallSensor,
    IgnitionSpikes,
    Instrument,
)
from toothcomb.decoders.wheels.base import ToothTrack
from toothcomb.decoders.wheels.missing_tooth import MissingToothSpec
from toothcomb.decoders.wheels.pattern import (
    PatternSpec,
    PatternTracker,
    PatternWheel,
    decode_pattern,
    spec_from_file,
    steps_from_teeth,
    sync_matches,
)

HEADER = 'format = "toothcomb-pattern"\nversion = 1\nkind = "crank"\n'


def run_cli(argv: list[str]) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    return code, out.getvalue(), err.getvalue()


def wheel_times(spec: PatternSpec, revs: int, rpm: float, t0: float = 0.01) -> np.ndarray:
    """Tooth times of ``revs`` revolutions at constant speed, from tooth 1."""
    ang = np.array([r * 360.0 + a for r in range(revs) for a in spec.teeth_deg] + [revs * 360.0])
    return t0 + ang / (rpm * 6.0)


# -- the files -----------------------------------------------------------------------------------


def test_every_builtin_crank_file_gives_its_wheel():
    wheels = {name: spec_from_file(pf) for name, pf in entries("crank").items()}
    assert len(wheels) >= 10
    for name, spec in wheels.items():
        # source: an N-M wheel has a pitch of 360/N deg (Robert Bosch GmbH, Automotive Handbook,
        # speed sensors)
        assert spec.pitch_deg == pytest.approx(360.0 / spec.positions)
        assert sum(spec.steps) == spec.positions
        if isinstance(spec, MissingToothSpec):
            n, m = (int(v) for v in name.split("-"))
            assert (spec.positions, spec.missing, spec.teeth) == (n, m, n - m)
    # the wheels with several gaps or an extra tooth are decoded by the generic decoder
    kinds = {type(w).__name__ for w in wheels.values()}
    assert kinds == {"MissingToothSpec", "PatternSpec"}


def test_tri_gap_36_geometry_is_the_file_s():
    spec = PatternWheel.parse("tri-gap-36")
    assert isinstance(spec, PatternSpec)
    # 36 places of 10 deg; places 16, 17, 22, 23, 34, 35 have no tooth (worked by hand)
    present = [p for p in range(36) if p not in (16, 17, 22, 23, 34, 35)]
    assert spec.teeth_deg == tuple(10.0 * p for p in present)
    assert spec.teeth == 30 and spec.missing == 6 and spec.gap_deg == 30.0


def test_grid_of_an_extra_tooth_wheel_is_the_gcd_of_its_spacings():
    angles = [30.0 * k for k in range(12)] + [345.0]
    positions, steps = steps_from_teeth(angles)
    # source: the coarsest grid holding every tooth has the greatest common divisor of the
    # spacings as its pitch (arithmetic): gcd(30, 15) = 15 deg, 360 / 15 = 24 places
    gcd = reduce(math.gcd, [int(b - a) for a, b in itertools.pairwise([*angles, 360.0])])
    assert positions == 360 // gcd == 24
    assert steps == (2,) * 11 + (1, 1)


def test_unique_window_is_the_shortest_that_tells_tooth_1_apart():
    steps = (1, 1, 1, 1, 3, 1, 1, 3)
    spec = PatternSpec("two-gaps", 12, steps)
    K = len(steps)

    def seq(r: int, w: int) -> tuple[int, ...]:  # steps before tooth r + 1 and the one after
        return tuple(steps[(r + j) % K] for j in range(-w, 1))

    # brute force on the step sequences themselves (no ratios, no tolerance)
    others = [r for r in range(1, K)]
    shortest = next(w for w in range(1, K + 1) if all(seq(r, w) != seq(0, w) for r in others))
    assert spec.window == shortest == 4


def test_a_wheel_that_repeats_within_a_revolution_is_refused():
    text = HEADER + 'name = "halves"\npositions = 36\nmissing_positions = [16, 17, 34, 35]\n'
    with pytest.raises(UsageError, match="repeats itself within a revolution"):
        spec_from_file(parse_text(text, "halves.toml"))


def test_sync_tolerance_never_lets_two_step_sizes_pass_for_each_other():
    spec = PatternSpec("twos-threes", 35, (2, 2, 2, 3, 3, 2, 2, 2, 3, 3, 2, 2, 2, 2, 3))
    # the sizes differ by log(3/2); each ratio may miss by the tolerance, so two different
    # steps stay apart when the tolerance is under half of it
    assert spec.tolerance < 0.5 * math.log(3.0 / 2.0)
    t = wheel_times(spec, 4, 900.0)
    g, _ = sync_matches(t, spec)
    assert np.diff(g).tolist() == [spec.teeth] * (len(g) - 1)


@pytest.mark.parametrize(
    "text,match",
    [
        ("name = 'w'\nteeth_deg = [0, 10, 25.37, 40]", "do not sit on any grid"),
        ("name = 'w'\nteeth_deg = [5, 10, 30]", "must start at 0"),
        ("name = 'w'\nnotation = '60-2'\nteeth_deg = [0, 6]", "exactly one of"),
        ("name = 'w'\npositions = 36\nmissing_positions = [0, 5]", "distinct whole numbers"),
        ("name = 'w'\nnotation = 'sixty'", "is not N-M"),
        ("name = 'w'\nteeth_deg = 'all'", "is not a list of numbers"),
    ],
)
def test_a_bad_wheel_file_is_refused_naming_it(text, match):
    with pytest.raises(UsageError, match=match) as err:
        spec_from_file(parse_text(HEADER + text, "mine.toml"))
    assert "mine.toml" in str(err.value) or "'w'" in str(err.value)


# -- decoding times ------------------------------------------------------------------------------


def test_constant_speed_decode_gives_every_tooth_its_angle():
    spec = PatternWheel.parse("twin-gap-60")
    t = wheel_times(spec, 5, 1200.0)
    track = decode_pattern(t, spec)
    # every tooth 1 is found: the first, with nothing before it to sync on, is counted back
    # from the second
    assert track.sync_losses == 0 and track.extra == 0 and track.missing == 0
    assert track.reference_times.tolist() == t[:: spec.teeth].tolist()
    assert len(track.reference_times) == 6
    # source: at constant speed, angle = rpm * 6 * t (deg/s = rpm * 360 / 60)
    want = (track.times - track.reference_times[0]) * 1200.0 * 6.0
    assert np.max(np.abs(track.angles - want)) < 1e-6


def test_fed_in_pieces_the_tracker_gives_the_whole_decode():
    spec = PatternWheel.parse("tri-gap-36")
    rng = np.random.default_rng(3)
    base = wheel_times(spec, 12, 300.0)
    # a cranking-like swing of +-20 % twice a revolution
    ang = (base - base[0]) * 1800.0
    t = base[0] + (ang + 0.2 * 360.0 / (4 * math.pi) * np.sin(np.radians(2 * ang))) / 1800.0
    whole = decode_pattern(t, spec)
    tr = PatternTracker(spec)
    cuts = np.sort(rng.choice(np.arange(1, len(t)), 25, replace=False))
    parts = [tr.feed(p) for p in np.split(t, cuts)] + [tr.finish()]
    pieces = ToothTrack.concat(parts, spec.pitch_deg)
    assert np.array_equal(pieces.times, whole.times)
    assert np.array_equal(pieces.angles, whole.angles)
    assert np.array_equal(pieces.reference_times, whole.reference_times)
    assert whole.sync_losses == 0 and len(whole.reference_times) >= 10


def test_a_missing_tooth_event_is_counted_through():
    spec = PatternWheel.parse("tri-gap-36")
    t = wheel_times(spec, 6, 800.0)
    t = np.delete(t, 70)  # one tooth event of revolution 3 lost
    track = decode_pattern(t, spec)
    assert track.missing == 1 and track.sync_losses == 0
    # the 7 tooth-1 events of 6 revolutions and the closing one, the first counted back
    assert len(track.reference_times) == 7 and track.reference_times[0] == t[0]


# -- end to end: simulated captures --------------------------------------------------------------


def window_references(truth: dict, spec: PatternSpec) -> np.ndarray:
    """True tooth-1 events with ``spec.window`` teeth before them and two after in the capture,
    and the capture's first one when its whole revolution and the next sync are there too (it
    is counted back from the next tooth 1)."""
    centres = np.asarray(truth["crank"]["tooth_events"]["centre_s"])
    refs = np.asarray(truth["crank"]["reference_times_s"])
    before = np.searchsorted(centres, refs - 1e-7)
    after = len(centres) - before
    found = (before >= spec.window) & (after >= 3)
    found[:1] |= after[:1] >= spec.teeth + 3
    return refs[found]


CASES = [
    ("tri-gap-36", "vr", "cranking"),
    ("tri-gap-36", "hall", "idle"),
    ("twin-gap-60", "vr", "idle"),
    ("twin-gap-60", "hall", "cranking"),
    ("12+1", "vr", "cranking"),
    ("12+1", "hall", "idle"),
    ("36+1", "vr", "idle"),
    ("36+1", "hall", "cranking"),
]


@pytest.mark.parametrize("wheel,sensor,speed", CASES)
def test_library_wheels_are_identified_and_followed(tmp_path, wheel, sensor, speed):
    """No hint: the wheel is found in the library, every tooth 1 the capture holds is decoded
    within 0.3 deg CA, and the cam edges are within 0.3 deg CA of the truth."""
    sc = engine(
        wheel=wheel,
        crank_sensor=vr() if sensor == "vr" else HallSensor(),
        duration_s=2.0,
        speed=CrankingSpeed(rpm=220.0, ripple=0.2) if speed == "cranking"
        else ConstantSpeed(rpm=900.0, ripple=0.02),
    )
    r, truth = decode(tmp_path, sc)
    spec = PatternWheel.parse(wheel)
    assert r.crank.wheel == wheel, r.choices.get("wheel")
    assert "library wheel" in r.choices["wheel"]
    assert r.crank.sync_losses == 0 and r.crank.extra_teeth == 0 and r.crank.missing_teeth == 0
    want = window_references(truth, spec)
    got = np.asarray(r.crank.reference_times_s)
    assert len(want) >= 2 and len(got) == len(want)
    rpm = local_rpm(truth, want)
    err_deg = np.abs(got - want) * 6.0 * rpm
    assert np.max(err_deg) < 0.3, err_deg
    errs = cam_errors(r, truth)
    assert max(errs.values()) < 0.3, errs
    # a Hall wheel without a gap does not show which flank starts a tooth: said, not hidden
    gapless = wheel in ("12+1", "36+1") and sensor == "hall"
    assert ("hall-flank-assumed" in finding_codes(r)) == gapless


HARSH = {
    "vr-leads-reversed": dict(
        crank_channel=Channel(name="crank", source="crank", noise_v=0.003, reversed=True)
    ),
    "ignition-spikes": dict(
        spikes=IgnitionSpikes(angle_deg=-10.0, amplitude_v=5.0, tau_s=20e-6),
        instrument=Instrument(kind="float", sample_rate=100_000.0),
    ),
    "hall-noise": dict(
        crank_sensor=HallSensor(),
        crank_channel=Channel(name="crank", source="crank", noise_v=0.5),
    ),
    "dropout": dict(
        speed=ConstantSpeed(rpm=250.0, ripple=0.02),
        crank_channel=Channel(
            name="crank", source="crank", noise_v=0.003,
            dropouts=(Dropout(t_s=1.0, duration_s=0.008),),
        ),
    ),
}


@pytest.mark.parametrize(
    "wheel,condition",
    [
        ("tri-gap-36", "vr-leads-reversed"),
        ("tri-gap-36", "ignition-spikes"),
        ("twin-gap-60", "dropout"),
        ("twin-gap-60", "hall-noise"),
        ("12+1", "ignition-spikes"),
        ("36+1", "dropout"),
    ],
)
def test_library_wheels_under_harsh_conditions(tmp_path, wheel, condition):
    """Cranking at 200 rpm with 25 % ripple unless the condition sets its own speed: every
    tooth 1 the capture holds is found within 1 deg CA and the cam within 1 deg CA (the
    tolerance of the harsh N-M cases)."""
    kw: dict = {"speed": CrankingSpeed(rpm=200.0, ripple=0.25), "crank_sensor": vr()}
    kw.update(HARSH[condition])
    r, truth = decode(tmp_path, engine(wheel=wheel, duration_s=2.0, **kw))
    spec = PatternWheel.parse(wheel)
    assert r.crank.wheel == wheel and r.crank.sync_losses == 0
    want = window_references(truth, spec)
    got = np.asarray(r.crank.reference_times_s)
    assert len(want) >= 4 and len(got) == len(want)
    assert np.max(np.abs(got - want) * 6.0 * local_rpm(truth, want)) < 1.0
    assert max(cam_errors(r, truth).values()) < 1.0
    codes = finding_codes(r)
    if condition == "vr-leads-reversed":
        assert r.crank.polarity == "reversed" and "vr-reversed" in codes
    if condition == "dropout":
        assert r.crank.missing_teeth >= 1 and "missing-teeth" in codes


def test_given_by_name_or_by_file_the_wheel_decodes_the_same(tmp_path):
    sc = engine(wheel="12+1", crank_sensor=vr(), duration_s=1.0)
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    by_name, _ = decode(tmp_path / "a", sc, options=DecodeOptions(wheel="12+1"))
    path = tmp_path / "mine.toml"
    path.write_text(
        HEADER + 'name = "my-twelve"\nteeth_deg = [0, 30, 60, 90, 120, 150, 180, 210, 240, 270,'
        " 300, 330, 345]\n"
    )
    by_file, _ = decode(tmp_path / "b", sc, options=DecodeOptions(wheel=str(path)))
    assert by_file.crank.wheel == "my-twelve" and by_name.crank.wheel == "12+1"
    assert by_file.crank.reference_times_s == by_name.crank.reference_times_s


def test_a_damaged_tooth_on_a_library_wheel_is_reported(tmp_path):
    sc = engine(
        wheel="tri-gap-36",
        crank_sensor=vr(),
        duration_s=1.5,
        damaged=(DamagedTooth(tooth=8, kind="missing"),),
    )
    r, _truth = decode(tmp_path, sc)
    assert r.crank.wheel == "tri-gap-36"
    assert "missing-teeth" in finding_codes(r)
    revs = r.crank.revolutions
    assert r.crank.missing_teeth >= revs - 1 and r.crank.sync_losses == 0


def test_a_new_engine_s_wheel_needs_only_a_file(tmp_path, monkeypatch):
    """A wheel that is not built in: one file in a folder named by the environment variable,
    and the simulator, the decoder (without a hint) and the listing all know it."""
    folder = tmp_path / "patterns"
    folder.mkdir()
    (folder / "quad-gap-48.toml").write_text(
        HEADER + 'name = "quad-gap-48"\ndescription = "invented: 48 places, four single gaps"\n'
        "positions = 48\nmissing_positions = [11, 20, 35, 47]\n"
    )
    monkeypatch.setenv(ENV, str(folder))
    sc = engine(wheel="quad-gap-48", crank_sensor=HallSensor(), duration_s=1.5)
    r, truth = decode(tmp_path, sc)
    assert r.crank.wheel == "quad-gap-48"
    assert r.crank.sync_losses == 0
    assert max(cam_errors(r, truth).values()) < 0.3
    code, out, _ = run_cli(["patterns", "--kind", "crank", "--json"])
    rows = {row["name"]: row for row in json.loads(out)["patterns"]}
    assert code == 0 and rows["quad-gap-48"]["origin"] == "user"
    assert rows["quad-gap-48"]["positions"] == 48 and len(rows["quad-gap-48"]["teeth_deg"]) == 44


def test_a_broken_user_file_is_one_sentence_and_exit_2(tmp_path, monkeypatch):
    folder = tmp_path / "patterns"
    folder.mkdir()
    (folder / "bad.toml").write_text(HEADER + 'name = "bad"\npositions = [\n')
    monkeypatch.setenv(ENV, str(folder))
    code, out, err = run_cli(["patterns"])
    assert code == 2 and out == ""
    assert "bad.toml" in err and "not valid TOML" in err and "Traceback" not in err


# -- the listing -----------------------------------------------------------------------------------


def test_patterns_lists_every_built_in_and_shows_one_as_a_file_to_copy(tmp_path):
    code, out, _ = run_cli(["patterns", "--json"])
    rows = json.loads(out)["patterns"]
    names = {(r["kind"], r["name"]) for r in rows}
    assert code == 0
    assert {("crank", n) for n in entries("crank")} <= names
    assert {("cam", n) for n in entries("cam")} <= names
    code, out, _ = run_cli(["patterns", "twin-gap-60", "--width", "120"])
    assert code == 0
    strip = next(line for line in out.splitlines() if set(line) <= {"|", "."} and line)
    # 60 places, 56 teeth: the strip has a mark per place
    assert len(strip) == 60 and strip.count("|") == 56
    text = out[out.index('# 60 tooth positions') :]
    copy = parse_text(text, "copy.toml")
    again, built_in = spec_from_file(copy), PatternWheel.parse("twin-gap-60")
    assert (again.positions, again.steps) == (built_in.positions, built_in.steps)
    code, _, err = run_cli(["patterns", "no-such-thing"])
    assert code == 2 and "no pattern 'no-such-thing'" in err


# -- profiles and verdicts ------------------------------------------------------------------------


def test_a_library_wheel_in_a_profile_and_a_known_good_decode(tmp_path):
    """A profile may name a library wheel; a known-good decode of a library wheel is a
    reference that carries the wheel's teeth, and a second capture of the same engine compares
    as in time."""
    from toothcomb.decoders.profiles import load_reference, loads_profile
    from toothcomb.decoders.verdict import compare

    head = 'format = "toothcomb-profile"\nversion = 1\nname = "p"\n'
    cams = "[[cams]]\nname = \"cam\"\nchannel = \"cam\"\npattern = [[100.0, 200.0]]\n"
    assert loads_profile(head + '[crank]\nwheel = "tri-gap-36"\n' + cams).wheel == "tri-gap-36"
    with pytest.raises(UsageError, match="nor a library wheel"):
        loads_profile(head + '[crank]\nwheel = "no-such-wheel"\n' + cams)

    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    good, _ = decode(tmp_path / "a", engine(wheel="twin-gap-60", duration_s=1.5, seed=1))
    ref = tmp_path / "good.json"
    ref.write_text(json.dumps(good.to_json()))
    profile = load_reference(ref)
    assert profile.wheel == "twin-gap-60"
    assert profile.crank_teeth_deg == PatternWheel.parse("twin-gap-60").teeth_deg
    again, _ = decode(tmp_path / "b", engine(wheel="twin-gap-60", duration_s=1.5, seed=2))
    verdict = compare(again, profile).verdict
    assert verdict is not None and verdict.in_time, verdict.sentences
    assert [c.status for c in verdict.cams] == ["in-time"]
    assert abs(verdict.cams[0].shift_deg) < 0.1
