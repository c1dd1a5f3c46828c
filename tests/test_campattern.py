"""The cam half of the pattern library: data files, the matcher, the simulator's library cams,
and the decode's ``library`` matches (result, JSON, report)."""

from __future__ import annotations

import io
import math
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from conftest import make_capture
from rich.console import Console
from toothcomb.cli.main import main
from toothcomb.cli.report import library_line, render_decode
from toothcomb.decoders import patterns
from toothcomb.decoders.analysis.campattern import (
    TOLERANCE_DEG,
    CamPatternSpec,
    cam_pattern_spec,
    cam_patterns,
    describe_cam,
    fixes_phase,
    match_cam,
    repeat_deg,
    spec_from_file,
)
from toothcomb.decoders.errors import UsageError
from toothcomb.decoders.pipeline import decode_capture
from toothcomb.decoders.result import AngleStats, CamEdge, CamPatternMatch, CamResult
from toothcomb.decoders.simulate import (
    Cam,
    Channel,
    ConstantSpeed,
    CrankWheel,
    HallSensor,
    Instrument,
    Phaser,
    PhaserMove,
    Scenario,
    VrSensor,
    cam_pattern,
    preset,
)
from toothcomb.decoders.simulate.wheel import library_pattern

BUILT_IN = {
    # name: fixes the cycle phase (worked out by hand from each file's windows)
    "single-tooth": True,
    "half-moon": True,
    "quad-even": False,
    "three-plus-one": True,
    "quad-two-width": True,
    "triple-window": True,
    "twin-180-unequal": True,
    "twin-360-even": False,
}

HEAD = 'format = "toothcomb-pattern"\nversion = 1\n'


def write_pattern(folder: Path, stem: str, body: str) -> Path:
    path = folder / f"{stem}.toml"
    path.write_text(HEAD + body, encoding="utf-8")
    return path


def cam_file(name: str, windows: str, kind: str = "cam") -> str:
    return f'kind = "{kind}"\nname = "{name}"\ndescription = "test"\nwindows_deg = {windows}\n'


# --------------------------------------------------------------------------- library files


def test_every_built_in_cam_pattern_loads() -> None:
    lib = cam_patterns()
    assert set(BUILT_IN) <= set(lib)
    assert 6 <= len(lib) <= 12
    for name, spec in lib.items():
        assert spec.name == name
        assert spec.source == f"<built-in>/cam/{name}.toml"
        assert spec.description
        for s, e in spec.windows:
            assert 0 <= s < 720 and s < e < s + 720


@pytest.mark.parametrize("name,fixes", sorted(BUILT_IN.items()))
def test_fixes_phase_is_the_360_degree_test(name: str, fixes: bool) -> None:
    """A pattern fixes the cycle phase exactly when turning it by 360 deg CA does not give it
    back (the camshaft turns once per 720 deg cycle; DESIGN.md)."""
    spec = cam_patterns()[name]
    turned = sorted(((s + 360.0) % 720.0, (e - s)) for s, e in spec.windows)
    same = turned == sorted((s % 720.0, e - s) for s, e in spec.windows)
    assert same is (not fixes)  # brute force, by hand
    assert fixes_phase(spec) is fixes
    text = describe_cam(spec)
    assert text.endswith("fixes the cycle phase") is fixes
    assert text.startswith(f"{len(spec.windows)} ")


def test_describe_and_repeat_on_inline_patterns() -> None:
    quad = CamPatternSpec("q", ((0.0, 20.0), (180.0, 200.0), (360.0, 380.0), (540.0, 560.0)))
    # four equal teeth every 180 deg: turning by 180 gives the same teeth (by hand)
    assert repeat_deg(quad) == 180.0
    assert describe_cam(quad) == (
        "4 teeth, 20 deg each; repeats every 180 deg CA, cannot fix the cycle phase"
    )
    two = CamPatternSpec("t", ((0.0, 15.0), (180.0, 225.0), (360.0, 405.0), (540.0, 555.0)))
    assert repeat_deg(two) == 720.0
    assert describe_cam(two) == "4 teeth, 2 widths (15, 45 deg); fixes the cycle phase"
    assert describe_cam(CamPatternSpec("h", ((0.0, 360.0),))) == (
        "1 window, 360 deg; fixes the cycle phase"
    )


def test_a_user_folder_adds_and_replaces_patterns(tmp_path, monkeypatch) -> None:
    write_pattern(tmp_path, "five-even", cam_file(
        "five-even", "[[0, 10], [144, 154], [288, 298], [432, 442], [576, 586]]"))
    write_pattern(tmp_path, "single-tooth", cam_file("single-tooth", "[[0, 45]]"))
    monkeypatch.setenv(patterns.ENV, str(tmp_path))
    lib = cam_patterns()
    assert lib["five-even"].windows[1] == (144.0, 154.0)
    # five teeth: no turn of 360 deg can give them back, so it fixes the phase (by hand)
    assert fixes_phase(lib["five-even"]) and repeat_deg(lib["five-even"]) == 144.0
    assert lib["single-tooth"].windows == ((0.0, 45.0),)
    assert lib["single-tooth"].source == str(tmp_path / "single-tooth.toml")
    assert patterns.entries("cam")["single-tooth"].shadows == "<built-in>/cam/single-tooth.toml"
    assert cam_pattern_spec("single-tooth").windows == ((0.0, 45.0),)
    assert lib["quad-even"].source.startswith("<built-in>")


def test_a_pattern_given_by_path(tmp_path) -> None:
    path = write_pattern(tmp_path, "mine", cam_file("mine", "[[650, 760]]"))
    spec = cam_pattern_spec(str(path))
    assert spec.name == "mine" and spec.windows == ((650.0, 760.0),)


@pytest.mark.parametrize(
    "body,expect",
    [
        (cam_file("b", "[[0, 20]") , "is not valid TOML"),
        (cam_file("b", "[[0, 100], [90, 120]]"), "overlap or touch"),
        (cam_file("b", "[[0, 100], [100, 120]]"), "overlap or touch"),
        (cam_file("b", "[[600, 100], [300, 310]]"), "0 <= start < 720"),
        (cam_file("b", "[[720, 730]]"), "0 <= start < 720"),
        (cam_file("b", "[[0, 20, 30]]"), "is not a pair of numbers"),
        (cam_file("b", '[["a", 20]]'), "is not a pair of numbers"),
        (cam_file("b", "[]"), "is not a list of windows"),
        ('kind = "cam"\nname = "b"\n', "has no windows_deg"),
        ('kind = "valve"\nname = "b"\nwindows_deg = [[0, 20]]\n', "has kind 'valve'"),
    ],
    ids=["bad-toml", "overlap", "touch", "end-before-start", "start-720", "triple", "text",
         "empty", "missing", "unknown-kind"],
)
def test_broken_files_are_named_in_the_error(tmp_path, monkeypatch, body: str, expect: str) -> None:
    path = write_pattern(tmp_path, "b", body)
    with pytest.raises(UsageError, match=expect) as exc:
        cam_pattern_spec(str(path))
    assert str(path) in str(exc.value)
    assert "\n" not in str(exc.value)
    # the same file in a user folder stops the library from loading, naming it
    monkeypatch.setenv(patterns.ENV, str(tmp_path))
    with pytest.raises(UsageError, match=expect) as exc:
        cam_patterns()
    assert str(path) in str(exc.value)


def test_a_crank_file_is_not_a_cam_pattern(tmp_path) -> None:
    path = write_pattern(tmp_path, "w", 'kind = "crank"\nname = "w"\nnotation = "36-1"\n')
    with pytest.raises(UsageError, match="is a crank pattern, not a cam one"):
        cam_pattern_spec(str(path))
    with pytest.raises(UsageError, match=r"has kind 'crank'.*\"cam\"") as exc:
        spec_from_file(patterns.load_file(path))
    assert str(path) in str(exc.value)


def test_an_unknown_name_lists_the_known_ones() -> None:
    with pytest.raises(UsageError) as exc:
        cam_pattern_spec("no-such-cam")
    msg = str(exc.value)
    assert "'no-such-cam' is unknown" in msg
    for name in BUILT_IN:
        assert name in msg


# --------------------------------------------------------------------------- the matcher


def edge(direction: str, cycle_deg: float | None, flank: str = "leading",
         per_rev: float | None = None) -> CamEdge:
    """A measured edge at ``cycle_deg`` (phase known) or at ``per_rev`` (phase unknown)."""
    if cycle_deg is not None:
        c = cycle_deg % 720.0
        rev, a = int(c // 360.0), c % 360.0
    else:
        assert per_rev is not None
        rev, a = None, per_rev % 360.0
    return CamEdge(flank, direction, AngleStats(a, 0.01, a, a, 20), rev, ())


def hall_cam(windows, shift: float, *, inverted: bool = False, noise=None) -> CamResult:
    """The edges a Hall cam with ``windows`` turned by ``shift`` gives on the 720 deg cycle."""
    rise, fall = ("falling", "rising") if inverted else ("rising", "falling")
    ang = [(rise, s + shift) for s, _ in windows] + [(fall, e + shift) for _, e in windows]
    noise = np.zeros(len(ang)) if noise is None else np.asarray(noise, dtype=float)
    edges = tuple(edge(d, a + n) for (d, a), n in zip(ang, noise, strict=True))
    return CamResult("cam", "hall", edges)


@pytest.mark.parametrize("name", [n for n, f in BUILT_IN.items() if f])
@pytest.mark.parametrize("shift", [0.0, 37.25, 359.0, 611.5])
def test_the_turn_is_recovered_with_its_least_squares_misfit(name: str, shift: float) -> None:
    spec = cam_patterns()[name]
    n = 2 * len(spec.windows)
    rng = np.random.default_rng(7)
    noise = rng.uniform(-0.4, 0.4, n)
    best = match_cam(hall_cam(spec.windows, shift, noise=noise))[0]
    assert (best.name, best.inverted, best.phase_known) == (name, False, True)
    # source: the least-squares common offset of paired points is the mean of their
    # differences, and the rms misfit their population standard deviation (Gauss; e.g.
    # NIST/SEMATECH e-Handbook of Statistical Methods, 4.1.4.1)
    want = (shift + noise.mean()) % 720.0
    assert best.shift_deg == pytest.approx(want, abs=1e-9)
    assert best.rms_deg == pytest.approx(noise.std(), abs=1e-9)
    assert best.max_deg == pytest.approx(np.max(np.abs(noise - noise.mean())), abs=1e-9)


def test_an_inverted_sensor_is_recovered() -> None:
    spec = cam_patterns()["triple-window"]
    matches = match_cam(hall_cam(spec.windows, 250.0, inverted=True))
    assert [(m.name, m.inverted) for m in matches] == [("triple-window", True)]
    assert matches[0].shift_deg == pytest.approx(250.0, abs=1e-9)


def test_a_half_moon_cannot_tell_inversion_from_a_360_degree_turn() -> None:
    """Swapping window and gap of a 360 deg window gives the same window turned by 360 deg (by
    hand), so both readings fit; the normal one is listed first."""
    matches = [m for m in match_cam(hall_cam(((0.0, 360.0),), 100.0)) if m.name == "half-moon"]
    assert [(m.inverted, m.shift_deg) for m in matches] == [(False, 100.0), (True, 460.0)]


def test_a_pattern_repeating_every_360_with_the_phase_unknown() -> None:
    # per revolution only: the four teeth fold onto two (by hand: 0 and 180, 20 and 200)
    shift = 75.5
    edges = tuple(
        edge(d, None, per_rev=a + shift)
        for d, a in (("rising", 0.0), ("falling", 20.0), ("rising", 180.0), ("falling", 200.0))
    )
    matches = match_cam(CamResult("cam", "hall", edges))
    assert [(m.name, m.phase_known) for m in matches][:1] == [("quad-even", False)]
    # repeats every 180: the smallest turn is given
    assert matches[0].shift_deg == pytest.approx(shift % 180.0, abs=1e-9)
    # a pattern that fixes the phase is not tried: single-tooth's two edges would fit mod 360
    one = CamResult("cam", "hall", (edge("rising", None, per_rev=10.0),
                                    edge("falling", None, per_rev=30.0)))
    assert match_cam(one) == []
    twin = match_cam(hall_cam(cam_patterns()["twin-360-even"].windows[:1], 300.0))
    assert twin == []  # on the cycle, one tooth is not two


def test_twin_360_matches_per_revolution() -> None:
    edges = (edge("rising", None, per_rev=300.0), edge("falling", None, per_rev=330.0))
    matches = match_cam(CamResult("cam", "hall", edges))
    assert [(m.name, m.shift_deg, m.phase_known) for m in matches] == [
        ("twin-360-even", 300.0, False)
    ]


@pytest.mark.parametrize("off,fits", [(2.0, True), (3.6, False)])
def test_one_edge_off_by_more_than_the_tolerance_fails(off: float, fits: bool) -> None:
    spec = cam_patterns()["quad-two-width"]
    noise = np.zeros(8)
    noise[3] = off
    matches = match_cam(hall_cam(spec.windows, 123.0, noise=noise))
    assert any(m.name == "quad-two-width" for m in matches) is fits
    if fits:
        # the least-squares turn moves by off/8, so that edge keeps off * 7/8 (by hand)
        m = matches[0]
        assert m.shift_deg == pytest.approx(123.0 + off / 8.0)
        assert m.max_deg == pytest.approx(off * 7.0 / 8.0)
        assert m.max_deg <= TOLERANCE_DEG
    else:
        assert off * 7.0 / 8.0 > TOLERANCE_DEG  # the misfit left is past the tolerance


def test_edge_counts_must_be_equal() -> None:
    spec = cam_patterns()["three-plus-one"]
    cam = hall_cam(spec.windows, 10.0)
    extra = replace(cam, edges=(*cam.edges, edge("rising", 700.0)))
    assert [m.name for m in match_cam(cam)] == ["three-plus-one"]
    assert match_cam(extra) == []


def test_vr_centres_are_matched() -> None:
    spec = cam_patterns()["quad-two-width"]
    shift = 401.0
    centres = [((s + e) / 2.0 + shift) for s, e in spec.windows]
    cam = CamResult("cam", "vr", tuple(edge("falling", c, "centre") for c in centres))
    matches = match_cam(cam)
    assert [(m.name, m.inverted) for m in matches] == [("quad-two-width", False)]
    assert matches[0].shift_deg == pytest.approx(shift)
    # one centre is all a single tooth gives: any one-window pattern fits it
    one = CamResult("cam", "vr", (edge("falling", 100.0, "centre"),))
    names = {m.name: m.shift_deg for m in match_cam(one)}
    # (a tooth's centre is half its width after its leading flank)
    assert names == {
        "single-tooth": 90.0,
        "half-moon": 100.0 - 180.0 + 720.0,
        "wide-window": 100.0 - 90.0,
    }


def test_nothing_to_match_and_a_bad_tolerance() -> None:
    assert match_cam(CamResult("cam", "hall", ())) == []
    with pytest.raises(UsageError, match="tolerance -1"):
        match_cam(CamResult("cam", "hall", ()), tolerance_deg=-1)


# --------------------------------------------------------------------------- simulator


def test_simulator_library_cam() -> None:
    assert cam_pattern({"kind": "library", "name": "three-plus-one", "shift_deg": 700}) == (
        (700.0, 720.0), (20.0, 40.0), (220.0, 240.0), (460.0, 480.0)
    )
    sc = Scenario.from_dict(
        {"cams": [{"name": "cam_a", "pattern": {"kind": "library", "name": "single-tooth"}}]}
    )
    assert sc.cams[0].pattern == ((0.0, 20.0),)
    with pytest.raises(UsageError, match=r"pattern\.name is missing"):
        cam_pattern({"kind": "library", "shift_deg": 3})
    with pytest.raises(UsageError, match=r"pattern\.name 3 is not a pattern name"):
        cam_pattern({"kind": "library", "name": 3})
    with pytest.raises(UsageError, match="'nope' is unknown"):
        cam_pattern({"kind": "library", "name": "nope"})


# --------------------------------------------------------------------------- end to end


def engine(cam: Cam, *, hall_crank: bool = False, rpm: float = 3000.0,
           duration_s: float = 0.6) -> Scenario:
    crank_sensor = HallSensor(tau_s=2e-6) if hall_crank else VrSensor()
    return Scenario(
        duration_s=duration_s,
        seed=4,
        start_angle_deg=37.0,
        speed=ConstantSpeed(rpm=rpm, ripple=0.005),
        crank=CrankWheel(wheel="36-1", tooth1_deg=96.0, duty=0.5, sensor=crank_sensor),
        cams=(cam,),
        channels=(
            Channel(name="crank", source="crank", noise_v=0.003),
            Channel(name="cam", source=cam.name, noise_v=0.003),
        ),
        instrument=Instrument(kind="float", sample_rate=200_000.0),
    )


def reference_angle(sc: Scenario) -> float:
    """Engine angle of the crank reference event (DESIGN.md): tooth 1's leading flank for a
    Hall sensor (its centre less half the tooth width, duty * pitch), its centre for VR."""
    cr = sc.crank
    if isinstance(cr.sensor, HallSensor):
        return cr.tooth1_deg - cr.duty * cr.pitch_deg / 2.0
    return cr.tooth1_deg


def expected_shifts(
    spec: CamPatternSpec, sc: Scenario, shift_deg: float, vr: bool
) -> list[float]:
    """The turn(s) the decode may report for a library cam simulated at ``shift_deg``.

    The simulator puts a pattern angle ``a`` at engine angle ``a + offset_deg`` (scenario.Cam);
    the library pattern is turned by ``shift_deg``; the decode measures angles after the crank
    reference event (engine angle ``ref``), on a cycle whose revolution 0 starts at ``ref`` or
    ``ref + 360``. So cycle angle = library angle + shift_deg + offset_deg - ref - 360 k, and the
    reported turn is ``shift_deg + offset_deg - ref - 360 k`` (mod the pattern's repeat). The
    decoder's documented convention (analysis/cams.py) picks k: revolution 0 holds more leading
    flanks, then more events, then the earlier first leading flank, then the wider teeth
    (quad-two-width: each revolution has a tooth at the same two places, only their widths
    differ); angles within 2 deg count as equal. When even that ties (a VR cam shows no widths)
    the decoder's revolution 0 is the first one of its sync run, so both turns are accepted.
    """
    cam = sc.cams[0]
    base = (shift_deg + cam.offset_deg - reference_angle(sc)) % 720.0

    def key(turn: float) -> tuple[int, int, float, float]:
        if vr:
            lead = [((s + e) / 2.0 + turn) % 720.0 for s, e in spec.windows]
            events = lead
            widths = [0.0 for _ in lead]
        else:  # narrow teeth: the window's start is the leading flank, whatever the polarity
            lead = [(s + turn) % 720.0 for s, _ in spec.windows]
            events = lead + [(e + turn) % 720.0 for _, e in spec.windows]
            widths = [e - s for s, e in spec.windows]
        lead0 = [a for a in lead if a < 360.0]
        tooth0 = sum(w for a, w in zip(lead, widths, strict=True) if a < 360.0)
        return len(lead0), sum(a < 360.0 for a in events), min(lead0, default=720.0), tooth0

    if not fixes_phase(spec):
        return [base % repeat_deg(spec)]
    turns = (base, (base + 360.0) % 720.0)
    a, b = key(turns[0]), key(turns[1])
    if a[:2] != b[:2]:
        return [turns[0] if a[:2] > b[:2] else turns[1]]
    if abs(a[2] - b[2]) > 2.0:
        return [turns[0] if a[2] < b[2] else turns[1]]
    if abs(a[3] - b[3]) > 2.0:
        return [turns[0] if a[3] > b[3] else turns[1]]
    return list(turns)


def circ(a: float, b: float, period: float) -> float:
    return (a - b + period / 2.0) % period - period / 2.0


E2E = [
    # name, shift_deg, offset_deg, cam sensor, Hall crank
    ("three-plus-one", 40.0, 0.0, HallSensor(), False),
    ("quad-two-width", 300.0, 12.5, HallSensor(), True),
    ("triple-window", 100.0, -20.0, HallSensor(tooth_level="low"), False),
    ("twin-180-unequal", 515.0, 3.0, HallSensor(), True),
    ("three-plus-one", 250.0, 0.0, VrSensor(peak_v_at_200rpm=0.5), False),
    ("quad-even", 40.0, 7.0, HallSensor(), False),
]


@pytest.mark.parametrize(
    "name,shift_deg,offset,sensor,hall_crank", E2E,
    ids=["3+1", "two-width-hall-crank", "inverted", "twin-180", "vr-3+1", "quad-no-phase"],
)
def test_a_decoded_library_cam_names_its_pattern_and_turn(
    tmp_path, name, shift_deg, offset, sensor, hall_crank
) -> None:
    cam = Cam(name="cam_a", pattern=library_pattern(name, shift_deg), sensor=sensor,
              offset_deg=offset)
    sc = engine(cam, hall_crank=hall_crank)
    path, truth = make_capture(tmp_path, sc, "h5")
    r = decode_capture(str(path))
    spec = cam_patterns()[name]
    vr = isinstance(sensor, VrSensor)
    best = r.cams[0].library[0]
    assert best.name == name
    assert best.inverted is (isinstance(sensor, HallSensor) and sensor.tooth_level == "low")
    assert best.phase_known is fixes_phase(spec)
    wants = expected_shifts(spec, sc, shift_deg, vr)
    period = 720.0 if fixes_phase(spec) else repeat_deg(spec)
    # common practice, no source: a clean simulated cam's edges within a tenth of a degree
    # (tests/test_decode.py), so their common turn well within 0.2 deg
    assert min(abs(circ(best.shift_deg, w, period)) for w in wants) < 0.2
    assert best.rms_deg < 0.1
    # the same turn read from the simulator's truth instead of the formula: the true angle after
    # the reference of window 0's leading flank (VR: centre), less its library angle (mod 360:
    # the truth gives the angle within a revolution)
    first = next(e for e in truth["cams"][0]["edges"] if e["window"] == 0 and e["flank"] in
                 ("leading", "centre"))
    lib0 = spec.windows[0][0] if not vr else sum(spec.windows[0]) / 2.0
    sim_turn = first["angle_after_ref_deg"] - lib0
    assert abs(circ(best.shift_deg, sim_turn, min(360.0, repeat_deg(spec)))) < 0.2


def test_a_moving_phaser_is_matched_at_its_mean_position(tmp_path) -> None:
    """A phaser turns every edge by the same angle, so the pattern still fits, at the static turn
    plus the mean phase over the events the decode measured."""
    phaser = Phaser(moves=(PhaserMove("step", t_s=0.35, to_deg=20.0, tau_s=0.05),))
    cam = Cam(name="cam_a", pattern=library_pattern("quad-two-width", 200.0), phaser=phaser)
    sc = engine(cam, duration_s=0.8)
    path, truth = make_capture(tmp_path, sc, "h5")
    r = decode_capture(str(path))
    best = r.cams[0].library[0]
    assert best.name == "quad-two-width"
    ev = truth["cams"][0]["events"]
    t_true = np.array([e["time_s"] for e in ev])
    phase = np.array([e["phase_deg"] for e in ev])
    per_edge = []
    for e in r.cams[0].edges:
        t = np.array([x for x, _ in e.events])
        k = np.argmin(np.abs(t_true[None, :] - t[:, None]), axis=1)
        assert np.max(np.abs(t_true[k] - t)) < 1e-4
        per_edge.append(phase[k].mean())
    moved = float(np.mean(per_edge))
    assert 5.0 < moved < 15.0  # the cam really moved during the capture
    wants = expected_shifts(cam_patterns()["quad-two-width"], sc, 200.0, False)
    assert min(abs(circ(best.shift_deg, w + moved, 720.0)) for w in wants) < 0.2


def test_a_cam_that_fits_no_library_pattern(tmp_path) -> None:
    """The preset's intake cam has four 30 deg teeth (quad-even's are 20: each end 10 deg off)
    and its exhaust cam's extra tooth sits 45 deg after the first (three-plus-one's at 40): no
    library pattern fits either, and the report says so."""
    path, _ = make_capture(tmp_path, preset("hall-36-1-two-cams-scope", duration_s=0.3), "h5")
    r = decode_capture(str(path))
    assert [c.library for c in r.cams] == [(), ()]
    text = render(r)
    assert text.count("pattern: no library pattern fits") == 2


def render(result) -> str:
    buf = io.StringIO()
    render_decode(result, Console(file=buf, width=100, color_system=None))
    return buf.getvalue()


def test_json_and_report_carry_the_matches(tmp_path) -> None:
    cam = Cam(name="cam_a", pattern=library_pattern("three-plus-one", 40.0))
    path, _ = make_capture(tmp_path, engine(cam), "h5")
    r = decode_capture(str(path))
    js = r.to_json()["cams"][0]["library_matches"]
    assert js and set(js[0]) == {"name", "shift_deg", "inverted", "rms_deg", "max_deg",
                                 "phase_known"}
    assert js[0]["name"] == "three-plus-one" and js[0]["inverted"] is False
    assert js[0]["shift_deg"] == r.cams[0].library[0].shift_deg
    text = render(r)
    line = next(x for x in text.splitlines() if x.startswith("pattern: library"))
    want = f"pattern: library 'three-plus-one' shifted +{r.cams[0].library[0].shift_deg:.1f}° CA"
    assert line.startswith(want)


def test_report_line_wording() -> None:
    m = CamPatternMatch("quad-even", 24.0, True, 0.031, 0.05, False)
    other = CamPatternMatch("twin-360-even", 5.0, False, 0.2, 0.3, False)
    assert library_line([m, other]) == (
        "pattern: library 'quad-even' shifted +24.0° CA (rms 0.03°), sensor output low on a "
        "tooth; cycle phase unknown, so the shift is known modulo 360°; 1 other pattern(s) fit "
        "too"
    )
    assert library_line([m.to_json()]).startswith("pattern: library 'quad-even'")


def test_a_broken_user_folder_stops_the_decode_with_exit_2(tmp_path, monkeypatch, capsys) -> None:
    cam = Cam(name="cam_a", pattern=library_pattern("single-tooth", 90.0))
    path, _ = make_capture(tmp_path, engine(cam, duration_s=0.3), "h5")
    lib = tmp_path / "lib"
    lib.mkdir()
    bad = write_pattern(lib, "bad", cam_file("bad", "[[0, 100], [50, 120]]"))
    monkeypatch.setenv(patterns.ENV, str(lib))
    with pytest.raises(UsageError, match="overlap"):
        decode_capture(str(path))
    assert main(["decode", str(path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and str(bad) in err[0] and "overlap" in err[0]
    # with the folder fixed the same capture decodes and names the user's pattern
    bad.unlink()
    write_pattern(lib, "single-copy", cam_file("single-copy", "[[0, 20]]"))
    r = decode_capture(str(path))
    assert {m.name for m in r.cams[0].library} >= {"single-tooth", "single-copy"}
    assert all(math.isclose(m.rms_deg, r.cams[0].library[0].rms_deg) for m in r.cams[0].library
               if m.name in ("single-tooth", "single-copy"))
