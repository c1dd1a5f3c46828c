"""Engine profiles: reading, checking (one clear sentence per mistake), writing, learning, and
the demo profiles that ship with toothcomb."""

from __future__ import annotations

import copy
import json
import math
from pathlib import Path
from typing import Any

import pytest
from toothcomb.decoders.errors import UsageError
from toothcomb.decoders.model import CaptureInfo
from toothcomb.decoders.profiles import (
    CamDrive,
    EngineProfile,
    ExpectedEdge,
    dumps_profile,
    edge_uncertainty,
    learn_profile,
    load_profile,
    load_reference,
    loads_profile,
    parse_profile,
    profile_from_decode_json,
    save_profile,
    shipped_profile,
    shipped_profiles,
)
from toothcomb.decoders.result import (
    AngleStats,
    CamEdge,
    CamResult,
    CrankResult,
    DecodeResult,
    RpmStats,
)

FULL = """
format = "toothcomb-profile"
version = 1
name = "demo-full"
description = "every key once"
cylinders = 4
tolerance_deg = 2.5
tdc_after_reference_deg = -84.0

[crank]
wheel = "36-1"
sensor = "hall"

[drive]
kind = "chain"
sprocket_teeth = 40

[learned]
capture = "good.flac"
rpm = 812.5
sample_rate = 48000.0

[[cams]]
name = "intake"
channel = 1
sensor = "hall"
frame = "cycle"
tolerance_deg = 2.0
sprocket_teeth = 38
bank = 1
sensor_letter = "A"
leading_direction = "falling"
pattern = [[690.0, 750.0], [100.0, 130.0]]

[[cams]]
name = "exhaust"
channel = "cam_ex"
sensor = "vr"
frame = "revolution"
pattern = [[350.0, 370.0]]

[[cams.edges]]
flank = "centre"
angle_deg = 0.0
direction = "falling"
uncertainty_deg = 0.05
window = 0
"""


def base() -> dict[str, Any]:
    """A small valid profile as plain data, to be spoiled by each error test."""
    return {
        "name": "demo",
        "tolerance_deg": 3.0,
        "crank": {"wheel": "60-2"},
        "drive": {"kind": "belt", "sprocket_teeth": 42},
        "cams": [
            {
                "name": "intake",
                "pattern": [[20.0, 200.0]],
                "edges": [{"flank": "leading", "angle_deg": 20.0}],
            }
        ],
    }


# --------------------------------------------------------------------------- reading


def test_full_profile_reads_every_key() -> None:
    p = loads_profile(FULL, "full.toml")
    assert (p.name, p.description, p.cylinders, p.tolerance_deg) == (
        "demo-full", "every key once", 4, 2.5
    )
    # -84 deg (TDC before the reference) is the same place as 276 deg after it
    assert p.tdc_after_reference_deg == pytest.approx(276.0)
    assert (p.wheel, p.crank_sensor) == ("36-1", "hall")
    assert p.drive == CamDrive(40, "chain")
    assert p.learned is not None and p.learned.rpm == 812.5
    intake, exhaust = p.cams
    assert (intake.channel, intake.tolerance_deg, intake.sprocket_teeth) == ("1", 2.0, 38)
    assert (intake.bank, intake.sensor_letter, intake.period_deg) == (1, "A", 720.0)
    # edges from the pattern: the window wrapping past 720 ends at 750 -> 30; the leading
    # direction given, the trailing one is the other
    assert [(e.flank, e.direction, e.angle_deg, e.window) for e in intake.edges] == [
        ("leading", "falling", 690.0, 0),
        ("trailing", "rising", 30.0, 0),
        ("leading", "falling", 100.0, 1),
        ("trailing", "rising", 130.0, 1),
    ]
    assert exhaust.period_deg == 360.0
    assert exhaust.edges == (ExpectedEdge("centre", 0.0, "falling", 0.05, 0),)
    assert p.source == "full.toml"


def test_vr_cam_pattern_gives_tooth_centres() -> None:
    data = base()
    data["cams"] = [{"name": "cam", "sensor": "vr", "pattern": [[10.0, 30.0], [700.0, 740.0]]}]
    p = parse_profile(data)
    assert [(e.flank, e.angle_deg) for e in p.cams[0].edges] == [
        ("centre", 20.0), ("centre", 0.0)
    ]


def test_drive_tooth_in_crank_degrees() -> None:
    # source: a four-stroke camshaft turns once per two crank revolutions, so one tooth of a
    # T-tooth cam sprocket is 720/T deg CA; 720/42 = 17.142857
    assert CamDrive(42).tooth_deg == pytest.approx(17.142857, abs=1e-6)
    assert CamDrive(40).tooth_deg == pytest.approx(18.0)


@pytest.mark.parametrize("text", [FULL, 'name = "x"\n[[cams]]\nname = "c"\npattern = [[1, 2]]\n'])
def test_toml_round_trip(text: str, tmp_path: Path) -> None:
    p = loads_profile(text)
    again = loads_profile(dumps_profile(p))
    assert again == p
    path = tmp_path / "p.toml"
    save_profile(p, path)
    assert load_profile(path) == p
    assert sorted(x.name for x in tmp_path.iterdir()) == ["p.toml"]


def test_dumped_text_is_plain_toml_with_the_format_line() -> None:
    text = dumps_profile(loads_profile(FULL))
    assert 'format = "toothcomb-profile"' in text and "version = 1" in text
    assert "[[cams.edges]]" in text
    assert text.startswith("# toothcomb engine profile 'demo-full'")


def test_names_with_quotes_survive_writing() -> None:
    data = base()
    data["description"] = 'a "quoted" word, a backslash \\ and ° signs'
    p = parse_profile(data)
    assert loads_profile(dumps_profile(p)).description == data["description"]


# --------------------------------------------------------------------------- checking


def spoil(path: str, value: Any) -> dict[str, Any]:
    """``base()`` with the value at ``path`` ("cams.0.edges.0.flank") replaced (or deleted when
    ``value`` is ``...``)."""
    data = copy.deepcopy(base())
    keys = [int(k) if k.isdigit() else k for k in path.split(".")]
    here: Any = data
    for k in keys[:-1]:
        here = here[k]
    if value is ...:
        del here[keys[-1]]
    else:
        here[keys[-1]] = value
    return data


@pytest.mark.parametrize(
    ("path", "value", "message"),
    [
        ("tolerence_deg", 3.0, "tolerence_deg is not a key toothcomb knows; did you mean "
                               "'tolerance_deg'?"),
        ("tolerance_deg", -1.0, "tolerance_deg -1.0 is outside (0, 90] deg CA"),
        ("tolerance_deg", "3", "tolerance_deg '3' is not a number"),
        ("tolerance_deg", float("nan"), "tolerance_deg nan is outside"),
        ("name", ..., "name is missing"),
        ("name", "  ", "name is empty"),
        ("cams", [], "cams is empty; describe at least one cam"),
        ("cams", {"name": "x"}, "cams is {'name': 'x'}, not a list"),
        ("format", "other", "format 'other' is not one of 'toothcomb-profile'"),
        ("version", 2, "version 2 is outside 1..1"),
        ("cylinders", True, "cylinders True is not a whole number"),
        ("tdc_after_reference_deg", 400.0, "tdc_after_reference_deg 400.0 is outside (-360, "
                                           "360)"),
        ("crank.wheel", "60/2", "crank.wheel '60/2' is not in N-M"),
        ("crank.wheel", "60-59", "crank.wheel '60-59' is not a usable N-M wheel"),
        ("crank.teeth_deg", [0.0, 20.0, 10.0], "crank.teeth_deg [0.0, 20.0, 10.0] must start"),
        ("crank.sensor", "optical", "crank.sensor 'optical' is not one of 'hall', 'vr'"),
        ("drive.sprocket_teeth", 1, "drive.sprocket_teeth 1 is outside 2..400"),
        ("drive.sprocket_teeth", 42.5, "drive.sprocket_teeth 42.5 is not a whole number"),
        ("drive.sprocket_teeth", ..., "drive.sprocket_teeth is missing"),
        ("drive.kind", "rope", "drive.kind 'rope' is not one of 'belt', 'chain', 'gear'"),
        ("cams.0.frame", "half", "cams[0].frame 'half' is not one of 'cycle', 'revolution'"),
        ("cams.0.bank", 3, "cams[0].bank 3 is outside 1..2"),
        ("cams.0.sensor_letter", "C", "cams[0].sensor_letter 'C' is not one of 'A', 'B'"),
        ("cams.0.colour", "red", "cams[0].colour is not a key toothcomb knows"),
        ("cams.0.pattern", [[200.0, 20.0]], "cams[0].pattern[0] [200.0, 20.0] must have start "
                                            "< end < start + 720"),
        ("cams.0.pattern", [[720.0, 730.0]], "cams[0].pattern[0] 720.0 is outside [0, 720)"),
        ("cams.0.pattern", [[1.0]], "cams[0].pattern[0] [1.0] is not a [start, end] pair"),
        ("cams.0.edges.0.flank", "leadin", "cams[0].edges[0].flank 'leadin' is not one of "
                                           "'leading', 'trailing', 'centre'"),
        ("cams.0.edges.0.angle_deg", 720.0, "cams[0].edges[0].angle_deg 720.0 is outside "
                                            "[0, 720) deg CA"),
        ("cams.0.edges.0.direction", "up", "cams[0].edges[0].direction 'up' is not one of"),
        ("cams.0.edges.0.uncertainty_deg", -0.1, "cams[0].edges[0].uncertainty_deg -0.1 is "
                                                 "outside [0, 90]"),
        ("cams.0.edges", [], "cams[0].edges is empty"),
        ("cams.0.edges.0.angle_deg", ..., "cams[0].edges[0].angle_deg is missing"),
    ],
)
def test_profile_errors_name_the_key_and_quote_the_value(
    path: str, value: Any, message: str
) -> None:
    with pytest.raises(UsageError) as info:
        parse_profile(spoil(path, value), "engine.toml")
    text = str(info.value)
    assert text.startswith("profile 'engine.toml': ")
    assert message in text
    assert "\n" not in text


def test_revolution_frame_limits_angles_to_one_revolution() -> None:
    data = spoil("cams.0.frame", "revolution")
    data["cams"][0]["pattern"] = [[20.0, 200.0]]
    data["cams"][0]["edges"] = [{"flank": "leading", "angle_deg": 400.0}]
    with pytest.raises(UsageError, match=r"angle_deg 400.0 is outside \[0, 360\)"):
        parse_profile(data)


def test_cam_needs_pattern_or_edges_and_names_are_unique() -> None:
    with pytest.raises(UsageError, match="gives neither pattern nor edges"):
        parse_profile({"name": "x", "cams": [{"name": "a"}]})
    two = {"name": "x", "cams": [{"name": "a", "pattern": [[1, 2]]},
                                 {"name": "a", "pattern": [[5, 6]]}]}
    with pytest.raises(UsageError, match=r"cams\[1\].name 'a' is used twice"):
        parse_profile(two)


def test_an_edge_listed_twice_is_refused() -> None:
    data = base()
    data["cams"][0]["edges"] = [{"flank": "leading", "angle_deg": 20.0},
                                {"flank": "leading", "angle_deg": 20.0}]
    with pytest.raises(UsageError, match=r"edges\[1\] \(leading at 20.0\) is listed twice"):
        parse_profile(data)


def test_bad_toml_and_bad_files(tmp_path: Path) -> None:
    with pytest.raises(UsageError, match=r"profile 'x.toml' is not valid TOML \(.*line 1"):
        loads_profile("name = \n", "x.toml")
    with pytest.raises(UsageError, match="does not exist; check the path"):
        load_profile(tmp_path / "missing.toml")
    binary = tmp_path / "b.toml"
    binary.write_bytes(b"\xff\xfe\x00name")
    with pytest.raises(UsageError, match="is not UTF-8 text"):
        load_profile(binary)
    with pytest.raises(UsageError, match="cannot be written"):
        save_profile(parse_profile(base()), tmp_path / "no" / "dir" / "p.toml")


# --------------------------------------------------------------------------- shipped profiles


def test_every_shipped_profile_reads_and_is_invented() -> None:
    names = shipped_profiles()
    assert set(names) == {"demo-belt-60-2-vr", "demo-dohc-36-1-hall", "demo-idle-60-2-vr"}
    for name, description in names.items():
        p = shipped_profile(name)
        assert p.name == name and description.startswith("invented")
        assert p.drive is not None and p.tdc_after_reference_deg is not None
        assert loads_profile(dumps_profile(p)) == p
    with pytest.raises(UsageError, match="there is no shipped profile 'nope'; the shipped ones"):
        shipped_profile("nope")


@pytest.mark.parametrize(
    ("preset", "name", "changes"),
    [
        ("belt-jumped-scope", "demo-belt-60-2-vr", {"duration_s": 0.2}),
        ("hall-36-1-two-cams-scope", "demo-dohc-36-1-hall", {"duration_s": 0.3}),
        ("idle-60-2-vr-soundcard", "demo-idle-60-2-vr", {"duration_s": 1.0}),
    ],
)
def test_shipped_profiles_match_their_simulated_engines(
    preset: str, name: str, changes: dict, tmp_path: Path
) -> None:
    """Each demo profile describes a simulator preset; the belt preset is taken before its
    belt jumped (which then shows as one tooth late)."""
    from dataclasses import replace

    from toothcomb.decoders.pipeline import decode_capture
    from toothcomb.decoders.simulate import preset as make
    from toothcomb.decoders.simulate import simulate
    from toothcomb.decoders.verdict import compare

    scenario = make(preset, **changes)
    jumped = any(c.jumped_teeth for c in scenario.cams)
    if jumped:
        scenario = scenario.replace(cams=tuple(replace(c, jumped_teeth=0) for c in scenario.cams))
    path = tmp_path / "c.h5"
    simulate(scenario).write(path)
    r = compare(decode_capture(str(path)), shipped_profile(name))
    assert r.verdict is not None and r.verdict.in_time
    assert all(abs(c.shift_deg) < 0.1 for c in r.verdict.cams)
    assert all(c.matched == c.expected for c in r.verdict.cams)
    if jumped:
        path2 = tmp_path / "j.h5"
        simulate(make(preset, **changes)).write(path2)
        r2 = compare(decode_capture(str(path2)), name)
        assert r2.verdict is not None and r2.verdict.cams[0].off_by_teeth == 1


# --------------------------------------------------------------------------- learning


def hand_decode(revolution: int | None = 1, std: float = 0.3, n: int = 9) -> DecodeResult:
    info = CaptureInfo("good.h5", 100_000.0, 50_000, ("crank", "cam"), "hdf5")
    crank = CrankResult("crank", "vr", "60-2", 60, 2, "normal", "falling",
                        RpmStats(2990.0, 3000.0, 3010.0), 24, 0, (0.01,))
    edges = (
        CamEdge("leading", "rising", AngleStats(336.0, std, 335.0, 337.0, n), revolution, (),
                None, 0),
        CamEdge("trailing", "falling", AngleStats(156.0, std, 155.0, 157.0, n),
                None if revolution is None else 1 - revolution, (), None, 0),
        CamEdge("leading", "rising", AngleStats(float("nan"), float("nan"), 0, 0, 0), None, ()),
    )
    cam = CamResult("cam", "hall", edges, ((696.0, 876.0),) if revolution == 1 else ())
    return DecodeResult(info, crank, (cam,))


def test_edge_uncertainty_adds_spread_and_sampling() -> None:
    # std 0.3 over 9 events: 0.1; 3000 rpm at 100 kHz: 0.18 deg CA per sample, each of the cam
    # event and the crank reference uncertain by 0.18 / sqrt(12)
    # source: rms of a uniform error over one quantisation step is step/sqrt(12) (Widrow &
    # Kollar, Quantization Noise, 2008, ch. 4)
    q = 0.18 / math.sqrt(12.0)
    assert edge_uncertainty(0.3, 9, 3000.0, 100_000.0) == pytest.approx(
        math.sqrt(0.1**2 + 2 * q**2)
    )
    assert edge_uncertainty(0.3, 9, 0.0, 100_000.0) == pytest.approx(0.1)
    assert edge_uncertainty(float("nan"), 0, 0.0, 0.0) == 0.0


def test_learn_keeps_cycle_angles_and_their_uncertainty() -> None:
    p = learn_profile(hand_decode(), name="good", sprocket_teeth=42, drive="belt",
                      tolerance_deg=2.0, tdc_after_reference_deg=276.0, cylinders=4)
    assert (p.name, p.cylinders, p.tolerance_deg, p.tdc_after_reference_deg) == (
        "good", 4, 2.0, 276.0
    )
    assert p.drive == CamDrive(42, "belt") and p.wheel == "60-2" and p.crank_sensor == "vr"
    cam = p.cams[0]
    assert (cam.name, cam.channel, cam.frame, cam.leading_direction) == (
        "cam", "cam", "cycle", "rising"
    )
    # revolution 1 at 336 is cycle angle 696; the trailing edge in revolution 0 stays 156; the
    # edge that was never seen is left out
    assert [(e.flank, e.angle_deg) for e in cam.edges] == [("leading", 696.0),
                                                           ("trailing", 156.0)]
    u = edge_uncertainty(0.3, 9, 3000.0, 100_000.0)
    assert cam.edges[0].uncertainty_deg == pytest.approx(u, abs=1e-4)
    assert cam.pattern == ((696.0, 876.0),)
    assert p.learned is not None and p.learned.capture == "good.h5"


def test_learn_without_cycle_phase_uses_the_revolution_frame() -> None:
    p = learn_profile(hand_decode(revolution=None))
    assert p.cams[0].frame == "revolution"
    assert [e.angle_deg for e in p.cams[0].edges] == [336.0, 156.0]


def test_learn_refuses_a_drive_kind_without_teeth_and_a_decode_without_cams() -> None:
    with pytest.raises(UsageError, match="drive 'chain' needs the sprocket's tooth count"):
        learn_profile(hand_decode(), drive="chain")
    empty = hand_decode()
    from dataclasses import replace

    with pytest.raises(UsageError, match="holds no measured cam edge"):
        learn_profile(replace(empty, cams=()))


def test_reference_json_becomes_a_known_good_profile(tmp_path: Path) -> None:
    data = json.loads(json.dumps(hand_decode().to_json(), allow_nan=True))
    p = profile_from_decode_json(data, "good.json")
    assert isinstance(p, EngineProfile) and p.kind == "known-good capture"
    assert p.cams[0].edges[0].angle_deg == 696.0
    path = tmp_path / "good.json"
    path.write_text(json.dumps(data))
    assert load_reference(path) == p


@pytest.mark.parametrize(
    ("body", "message"),
    [
        ('{"cams": []}', "is not the JSON of a toothcomb decode"),
        ('{"crank": {}, "cams": [{"edges": []}]}', "cams[0].channel is missing"),
        ('{"crank": {}, "cams": [{"channel": "c", "edges": [{"flank": "x", "direction": '
         '"up", "angle_deg": {"mean": 1.0, "n": 3}}]}]}', "has an edge with flank 'x'"),
        ('{"crank": {}, "cams": [{"channel": "c", "edges": []}]}', "holds no measured cam edge"),
        ("{not json", "is not valid JSON (line 1"),
    ],
)
def test_bad_reference_json(body: str, message: str, tmp_path: Path) -> None:
    path = tmp_path / "ref.json"
    path.write_text(body)
    with pytest.raises(UsageError) as info:
        load_reference(path)
    assert message in str(info.value)


def test_reference_by_shipped_name_and_missing(tmp_path: Path) -> None:
    assert load_reference("demo-idle-60-2-vr").name == "demo-idle-60-2-vr"
    with pytest.raises(UsageError, match=r"reference 'nope\.toml' does not exist; give an engine"):
        load_reference("nope.toml")
    with pytest.raises(UsageError, match="is a folder"):
        load_reference(tmp_path)
