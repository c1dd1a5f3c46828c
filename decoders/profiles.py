"""Engine profiles: an engine's timing set-up in a small TOML file of toothcomb's own format.

A profile says what a decode of an engine in time should show: the crank wheel, the angle from
the crank reference event to TDC of cylinder 1, each cam with its pattern and the expected angle
of each edge, the tolerance, and the cam drive (teeth on the cam sprocket, belt or chain).
:func:`toothcomb.decoders.verdict.compare` holds a decode against it.

Every angle is in crank degrees (deg CA) and uses the frame of a decode (see DESIGN.md): a cam
edge's expected ``angle_deg`` is its *cycle angle*, ``revolution * 360 + angle after the most
recent crank reference event`` (0 <= angle < 720), exactly the ``cycle_angle_deg`` a decode
reports. A cam whose pattern repeats every revolution cannot fix the cycle phase; give it
``frame = "revolution"`` and angles 0 <= angle < 360.

The format, with every key (only ``name`` and ``cams`` are required)::

    format = "toothcomb-profile"      # when present: this exact text, with version = 1
    version = 1
    name = "demo-engine"
    description = "what engine, which set-up"
    cylinders = 4
    tolerance_deg = 3.0               # for every cam without its own
    tdc_after_reference_deg = 276.0   # TDC of cylinder 1 comes this far after the reference

    [crank]
    wheel = "60-2"                    # N-M, or teeth_deg = [0.0, 30.0, ...] for other shapes
    sensor = "vr"                     # "hall" or "vr"

    [drive]
    kind = "belt"                     # "belt", "chain" or "gear"
    sprocket_teeth = 42               # one drive tooth = 720 / 42 = 17.14 deg CA

    [learned]                         # written by ``toothcomb learn``; for people only
    capture = "good.flac"
    rpm = 812.0
    sample_rate = 48000.0

    [[cams]]
    name = "intake"
    channel = "cam"                   # channel name or 0-based index in the capture (a hint)
    sensor = "hall"
    frame = "cycle"                   # "cycle" (0..720, default) or "revolution" (0..360)
    tolerance_deg = 2.0
    sprocket_teeth = 42               # only when this cam's drive differs from [drive]
    bank = 1                          # bank and sensor letter name the SAE J2012
    sensor_letter = "A"               # correlation code (P0016 for bank 1 sensor A)
    leading_direction = "rising"      # signal direction of a leading flank
    pattern = [[336.0, 516.0]]        # teeth/windows [start, end], for the ruler

    [[cams.edges]]                    # expected edges; when left out: from the pattern
    flank = "leading"                 # "leading", "trailing" (Hall) or "centre" (VR)
    angle_deg = 336.0
    direction = "rising"
    uncertainty_deg = 0.02            # how well the expected angle itself is known (1 sigma)
    window = 0

Without ``edges`` the pattern gives them: each window's start is a leading flank and its end a
trailing flank (a VR cam: its middle is a tooth centre).

A profile can also be *learned*: :func:`learn_profile` turns the decode of a capture of an engine
known to be in time into a profile; :func:`profile_from_decode_json` reads the JSON of such a
decode directly. Either records each edge's own uncertainty, which a comparison adds to the new
capture's.

>>> p = loads_profile('''
... name = "demo"
... [[cams]]
... name = "intake"
... pattern = [[20.0, 200.0]]
... ''')
>>> [(e.flank, e.angle_deg) for e in p.cams[0].edges]
[('leading', 20.0), ('trailing', 200.0)]
"""

from __future__ import annotations

import difflib
import itertools
import json
import math
import os
import re
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from importlib import resources
from pathlib import Path
from typing import Any

from .errors import UsageError

#: value of the optional ``format`` key, and the version this module reads and writes
FORMAT = "toothcomb-profile"
VERSION = 1

FLANKS = ("leading", "trailing", "centre")
DIRECTIONS = ("rising", "falling")
SENSORS = ("hall", "vr")
FRAMES = ("cycle", "revolution")
DRIVES = ("belt", "chain", "gear")
SENSOR_LETTERS = ("A", "B")

#: largest tolerance a profile may give, deg CA (more than a quarter revolution says nothing)
MAX_TOLERANCE_DEG = 90.0
#: two expected edges of one kind closer than this (deg CA) are the same edge listed twice
SAME_EDGE_DEG = 0.01

_NM = re.compile(r"^\s*(\d+)\s*-\s*(\d+)\s*$")


# --------------------------------------------------------------------------- the profile


@dataclass(frozen=True)
class ExpectedEdge:
    """Where one cam edge should be."""

    #: "leading" / "trailing" (Hall flanks) or "centre" (VR tooth centre)
    flank: str
    #: cycle angle (0..720) or, for a cam with ``frame = "revolution"``, angle (0..360), deg CA
    angle_deg: float
    #: signal direction, "rising" or "falling"; None: match on the flank alone
    direction: str | None = None
    #: standard uncertainty (1 sigma) of the expected angle itself, deg CA (0 for a spec)
    uncertainty_deg: float = 0.0
    #: index of the tooth/window in the pattern, for people
    window: int | None = None


@dataclass(frozen=True)
class CamProfile:
    """One camshaft of a profile."""

    name: str
    edges: tuple[ExpectedEdge, ...]
    #: channel name or 0-based index in the capture (a hint for matching)
    channel: str | None = None
    sensor: str | None = None
    #: "cycle" (angles 0..720) or "revolution" (0..360, the pattern repeats every revolution)
    frame: str = "cycle"
    #: teeth/windows [start, end] in the frame's degrees
    pattern: tuple[tuple[float, float], ...] = ()
    tolerance_deg: float | None = None
    #: teeth on this cam's drive sprocket when it differs from the profile's drive
    sprocket_teeth: int | None = None
    #: bank (1 or 2) and sensor letter ("A" or "B") in the naming of SAE J2012
    bank: int | None = None
    sensor_letter: str | None = None
    #: signal direction of a leading flank
    leading_direction: str | None = None
    #: phaser limits that differ from the defaults (``analysis.phaser.PhaserLimits`` fields)
    phaser: tuple[tuple[str, float], ...] = ()
    #: valve-command limits that differ from the defaults (``analysis.actuator.ValveLimits``)
    valve: tuple[tuple[str, float | bool], ...] = ()

    @property
    def period_deg(self) -> float:
        """720 for the cycle frame, 360 for the revolution frame."""
        return 720.0 if self.frame == "cycle" else 360.0


@dataclass(frozen=True)
class CamDrive:
    """The belt, chain or gear train that turns the camshafts.

    >>> round(CamDrive(42, "belt").tooth_deg, 2)
    17.14
    """

    #: teeth T on the cam sprocket
    sprocket_teeth: int
    #: "belt", "chain" or "gear"; None when not said
    kind: str | None = None

    @property
    def tooth_deg(self) -> float:
        """One drive tooth in crank degrees: the camshaft turns once per 720 deg CA."""
        return 720.0 / self.sprocket_teeth


@dataclass(frozen=True)
class LearnedFrom:
    """Which capture a learned profile came from (for people; comparisons do not use it)."""

    capture: str = ""
    rpm: float | None = None
    sample_rate: float | None = None


@dataclass(frozen=True)
class EngineProfile:
    """An engine's timing set-up: what a decode of it in time shows."""

    name: str
    cams: tuple[CamProfile, ...]
    description: str = ""
    cylinders: int | None = None
    #: crank wheel in N-M notation (None: not said, or given by ``crank_teeth_deg``)
    wheel: str | None = None
    #: crank tooth angles after tooth 1 for wheels that are not N-M
    crank_teeth_deg: tuple[float, ...] = ()
    crank_sensor: str | None = None
    #: angle from the crank reference event to TDC of cylinder 1, 0 <= angle < 360
    tdc_after_reference_deg: float | None = None
    #: tolerance for every cam without its own, deg CA
    tolerance_deg: float | None = None
    drive: CamDrive | None = None
    learned: LearnedFrom | None = None
    #: "profile", or "known-good capture" for the JSON of an earlier decode
    kind: str = "profile"
    #: where it was read from (a path or a shipped profile's name); not part of the profile
    source: str = field(default="", compare=False)

    def cam(self, name: str) -> CamProfile:
        """The cam called ``name``."""
        for c in self.cams:
            if c.name == name:
                return c
        have = ", ".join(c.name for c in self.cams)
        raise UsageError(f"profile {self.name!r} has no cam {name!r}; it has {have}")


# --------------------------------------------------------------------------- checking


class _Checker:
    """Small checkers that name the key (with its path) and quote the value."""

    def __init__(self, source: str) -> None:
        self.source = source

    def fail(self, where: str, message: str) -> UsageError:
        return UsageError(f"profile {self.source!r}: {where} {message}")

    def table(
        self, value: Any, where: str, known: Sequence[str], required: Sequence[str] = ()
    ) -> Mapping[str, Any]:
        if not isinstance(value, Mapping):
            raise self.fail(where, f"is {_show(value)}, not a table; write it as [{where}]")
        for key in value:
            if key not in known:
                near = difflib.get_close_matches(str(key), known, n=1)
                hint = f"did you mean {near[0]!r}? " if near else ""
                raise self.fail(
                    _join(where, str(key)),
                    f"is not a key toothcomb knows; {hint}known keys here: {', '.join(known)}",
                )
        for key in required:
            if key not in value:
                raise self.fail(_join(where, key), "is missing; every profile gives it")
        return value

    def text(self, value: Any, where: str, choices: Sequence[str] = ()) -> str:
        if not isinstance(value, str):
            raise self.fail(where, f"{_show(value)} is not text; write it in quotes")
        if choices and value not in choices:
            raise self.fail(
                where, f"{value!r} is not one of {', '.join(repr(c) for c in choices)}"
            )
        if not choices and not value.strip():
            raise self.fail(where, "is empty; give a name")
        return value

    def number(
        self, value: Any, where: str, lo: float, hi: float, *, lo_open: bool = False,
        hi_open: bool = False, unit: str = "deg CA",
    ) -> float:
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise self.fail(where, f"{_show(value)} is not a number; give e.g. {lo + 1:g}")
        x = float(value)
        ok = math.isfinite(x) and (x > lo if lo_open else x >= lo) and (
            x < hi if hi_open else x <= hi
        )
        if not ok:
            left = "(" if lo_open else "["
            right = ")" if hi_open else "]"
            raise self.fail(
                where, f"{value!r} is outside {left}{lo:g}, {hi:g}{right} {unit}; give a value "
                "inside"
            )
        return x

    def integer(self, value: Any, where: str, lo: int, hi: int) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.fail(where, f"{_show(value)} is not a whole number; give e.g. {lo}")
        if not lo <= value <= hi:
            raise self.fail(where, f"{value!r} is outside {lo}..{hi}; give a value inside")
        return int(value)

    def array(self, value: Any, where: str) -> list[Any]:
        if not isinstance(value, list):
            raise self.fail(where, f"is {_show(value)}, not a list; write it as [...]")
        return value


def _show(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def _join(where: str, key: str | int) -> str:
    if isinstance(key, int):
        return f"{where}[{key}]"
    return f"{where}.{key}" if where else key


# --------------------------------------------------------------------------- parsing

_TOP = (
    "format", "version", "name", "description", "cylinders", "tolerance_deg",
    "tdc_after_reference_deg", "crank", "drive", "learned", "cams",
)
_CRANK = ("wheel", "teeth_deg", "sensor")
_DRIVE = ("kind", "sprocket_teeth")
_LEARNED = ("capture", "rpm", "sample_rate")
_CAM = (
    "name", "channel", "sensor", "frame", "tolerance_deg", "sprocket_teeth", "bank",
    "sensor_letter", "leading_direction", "pattern", "edges", "phaser", "valve",
)
_EDGE = ("flank", "angle_deg", "direction", "uncertainty_deg", "window")


def parse_profile(data: Mapping[str, Any], source: str = "profile") -> EngineProfile:
    """Check a profile given as plain data (the tables of its TOML) and build it.

    Raises :class:`~toothcomb.decoders.errors.UsageError` naming the key, quoting the value and
    saying what would work.

    >>> data = {"name": "x", "cams": [{"name": "in", "pattern": [[0, 9]]}], "tolerance_deg": -1}
    >>> try:
    ...     parse_profile(data, "x.toml")
    ... except UsageError as e:
    ...     print(e)
    profile 'x.toml': tolerance_deg -1 is outside (0, 90] deg CA; give a value inside
    """
    ck = _Checker(source)
    top = ck.table(data, "", _TOP, required=("name", "cams"))
    if "format" in top:
        ck.text(top["format"], "format", (FORMAT,))
    if "version" in top:
        ck.integer(top["version"], "version", VERSION, VERSION)
    name = ck.text(top["name"], "name")
    description = ck.text(top["description"], "description", ()) if "description" in top else ""
    cylinders = ck.integer(top["cylinders"], "cylinders", 1, 24) if "cylinders" in top else None
    tolerance = _tolerance(ck, top, "tolerance_deg")
    tdc = None
    if "tdc_after_reference_deg" in top:
        tdc = ck.number(
            top["tdc_after_reference_deg"], "tdc_after_reference_deg", -360.0, 360.0,
            lo_open=True, hi_open=True,
        ) % 360.0
    wheel, teeth, crank_sensor = None, (), None
    if "crank" in top:
        crank = ck.table(top["crank"], "crank", _CRANK)
        if "wheel" in crank:
            wheel = _wheel(ck, crank["wheel"], "crank.wheel", strict="teeth_deg" not in crank)
        if "teeth_deg" in crank:
            teeth = _crank_teeth(ck, crank["teeth_deg"], "crank.teeth_deg")
        if "sensor" in crank:
            crank_sensor = ck.text(crank["sensor"], "crank.sensor", SENSORS)
    drive = None
    if "drive" in top:
        d = ck.table(top["drive"], "drive", _DRIVE, required=("sprocket_teeth",))
        kind = ck.text(d["kind"], "drive.kind", DRIVES) if "kind" in d else None
        drive = CamDrive(_sprocket(ck, d["sprocket_teeth"], "drive.sprocket_teeth"), kind)
    learned = None
    if "learned" in top:
        lt = ck.table(top["learned"], "learned", _LEARNED)
        learned = LearnedFrom(
            capture=ck.text(lt["capture"], "learned.capture", ()) if "capture" in lt else "",
            rpm=ck.number(lt["rpm"], "learned.rpm", 0.0, 1e5, lo_open=True, unit="rpm")
            if "rpm" in lt else None,
            sample_rate=ck.number(
                lt["sample_rate"], "learned.sample_rate", 0.0, 1e12, lo_open=True, unit="Hz"
            ) if "sample_rate" in lt else None,
        )
    cams_raw = ck.array(top["cams"], "cams")
    if not cams_raw:
        raise ck.fail("cams", "is empty; describe at least one cam as [[cams]]")
    cams = tuple(_cam(ck, c, f"cams[{i}]") for i, c in enumerate(cams_raw))
    seen: set[str] = set()
    for i, c in enumerate(cams):
        if c.name in seen:
            raise ck.fail(f"cams[{i}].name", f"{c.name!r} is used twice; give each cam its own")
        seen.add(c.name)
    return EngineProfile(
        name=name,
        cams=cams,
        description=description,
        cylinders=cylinders,
        wheel=wheel,
        crank_teeth_deg=teeth,
        crank_sensor=crank_sensor,
        tdc_after_reference_deg=tdc,
        tolerance_deg=tolerance,
        drive=drive,
        learned=learned,
        source=source,
    )


def _tolerance(ck: _Checker, table: Mapping[str, Any], key: str, where: str = "") -> float | None:
    if key not in table:
        return None
    return ck.number(table[key], _join(where, key), 0.0, MAX_TOLERANCE_DEG, lo_open=True)


def _sprocket(ck: _Checker, value: Any, where: str) -> int:
    return ck.integer(value, where, 2, 400)


def _wheel(ck: _Checker, value: Any, where: str, *, strict: bool) -> str:
    text = ck.text(value, where, ())
    m = _NM.match(text)
    if not m:
        if strict and text not in _library_wheel_names():
            raise ck.fail(
                where, f"{text!r} is not in N-M notation nor a library wheel; write it like "
                "'60-2' or '36-1', name a wheel that `toothcomb patterns` lists, or give "
                "crank.teeth_deg for other shapes"
            )
        return text
    n, k = int(m.group(1)), int(m.group(2))
    if not (2 <= n <= 360 and 1 <= k <= n - 2):
        raise ck.fail(where, f"{text!r} is not a usable N-M wheel; N must be 2..360, M 1..N-2")
    return f"{n}-{k}"


def _library_wheel_names() -> set[str]:
    from .patterns import entries

    return set(entries("crank"))


def _crank_teeth(ck: _Checker, value: Any, where: str) -> tuple[float, ...]:
    raw = ck.array(value, where)
    teeth = tuple(
        ck.number(v, _join(where, i), 0.0, 360.0, hi_open=True) for i, v in enumerate(raw)
    )
    if len(teeth) < 2 or teeth[0] != 0.0 or any(b <= a for a, b in itertools.pairwise(teeth)):
        raise ck.fail(
            where, f"{list(raw)!r} must start at 0 and rise strictly, with at least 2 teeth below "
            "360 (angles of each tooth after tooth 1)"
        )
    return teeth


def _cam(ck: _Checker, value: Any, where: str) -> CamProfile:
    c = ck.table(value, where, _CAM, required=("name",))
    name = ck.text(c["name"], _join(where, "name"))
    channel = None
    if "channel" in c:
        ch = c["channel"]
        if isinstance(ch, int) and not isinstance(ch, bool):
            channel = str(ck.integer(ch, _join(where, "channel"), 0, 10_000))
        else:
            channel = ck.text(ch, _join(where, "channel"))
    sensor = ck.text(c["sensor"], _join(where, "sensor"), SENSORS) if "sensor" in c else None
    frame = ck.text(c["frame"], _join(where, "frame"), FRAMES) if "frame" in c else "cycle"
    period = 720.0 if frame == "cycle" else 360.0
    tolerance = _tolerance(ck, c, "tolerance_deg", where)
    sprocket = (
        _sprocket(ck, c["sprocket_teeth"], _join(where, "sprocket_teeth"))
        if "sprocket_teeth" in c else None
    )
    bank = ck.integer(c["bank"], _join(where, "bank"), 1, 2) if "bank" in c else None
    letter = (
        ck.text(c["sensor_letter"], _join(where, "sensor_letter"), SENSOR_LETTERS)
        if "sensor_letter" in c else None
    )
    leading = (
        ck.text(c["leading_direction"], _join(where, "leading_direction"), DIRECTIONS)
        if "leading_direction" in c else None
    )
    pattern = _pattern(ck, c["pattern"], _join(where, "pattern"), period) if "pattern" in c else ()
    phaser = _phaser_limits(ck, c["phaser"], _join(where, "phaser")) if "phaser" in c else ()
    valve = _valve_limits(ck, c["valve"], _join(where, "valve")) if "valve" in c else ()
    if "edges" in c:
        raw = ck.array(c["edges"], _join(where, "edges"))
        edges = tuple(_edge(ck, e, f"{where}.edges[{i}]", period) for i, e in enumerate(raw))
    elif pattern:
        edges = _edges_from_pattern(pattern, sensor, leading, period)
    else:
        raise ck.fail(
            where, f"(cam {name!r}) gives neither pattern nor edges; give pattern = [[start, end]] "
            "or [[cams.edges]] tables"
        )
    if not edges:
        raise ck.fail(_join(where, "edges"), "is empty; give at least one expected edge")
    for i, a in enumerate(edges):
        for b in edges[:i]:
            same_kind = a.flank == b.flank and a.direction == b.direction
            if same_kind and abs(_wrap_half(a.angle_deg - b.angle_deg, period)) < SAME_EDGE_DEG:
                raise ck.fail(
                    f"{where}.edges[{i}]",
                    f"({a.flank} at {a.angle_deg!r}) is listed twice; list each edge once",
                )
    return CamProfile(
        name=name,
        edges=edges,
        channel=channel,
        sensor=sensor,
        frame=frame,
        pattern=pattern,
        tolerance_deg=tolerance,
        sprocket_teeth=sprocket,
        bank=bank,
        sensor_letter=letter,
        leading_direction=leading,
        phaser=phaser,
        valve=valve,
    )


def _valve_limits(ck: _Checker, value: Any, where: str) -> tuple[tuple[str, float | bool], ...]:
    """A cam's ``valve`` table: overrides of the valve-command limits, checked now."""
    from .analysis.actuator import ValveLimits

    if not isinstance(value, Mapping):
        raise ck.fail(where, f"is {_show(value)}; give a table of limits")
    try:
        ValveLimits.from_mapping(dict(value), where)
    except ValueError as exc:
        raise UsageError(f"profile {ck.source!r}: {exc}") from None
    return tuple(sorted(
        (str(k), v if isinstance(v, bool) else float(v)) for k, v in value.items()
    ))


def _phaser_limits(ck: _Checker, value: Any, where: str) -> tuple[tuple[str, float], ...]:
    """A cam's ``phaser`` table: overrides of the phaser limits, checked now."""
    from .analysis.phaser import PhaserLimits

    if not isinstance(value, Mapping):
        raise ck.fail(where, f"is {_show(value)}; give a table of limits")
    try:
        PhaserLimits.from_mapping(dict(value), where)
    except ValueError as exc:
        raise UsageError(f"profile {ck.source!r}: {exc}") from None
    return tuple(sorted((str(k), float(v)) for k, v in value.items()))


def _pattern(
    ck: _Checker, value: Any, where: str, period: float
) -> tuple[tuple[float, float], ...]:
    raw = ck.array(value, where)
    out = []
    for i, w in enumerate(raw):
        here = _join(where, i)
        if not isinstance(w, list) or len(w) != 2:
            raise ck.fail(here, f"{_show(w)} is not a [start, end] pair of angles")
        s = ck.number(w[0], here, 0.0, period, hi_open=True)
        e = ck.number(w[1], here, -math.inf, math.inf)
        if not s < e < s + period:
            raise ck.fail(
                here, f"{w!r} must have start < end < start + {period:g} (a window wrapping past "
                f"{period:g} ends above it)"
            )
        out.append((s, e))
    return tuple(out)


def _edge(ck: _Checker, value: Any, where: str, period: float) -> ExpectedEdge:
    e = ck.table(value, where, _EDGE, required=("flank", "angle_deg"))
    return ExpectedEdge(
        flank=ck.text(e["flank"], _join(where, "flank"), FLANKS),
        angle_deg=ck.number(e["angle_deg"], _join(where, "angle_deg"), 0.0, period, hi_open=True),
        direction=(
            ck.text(e["direction"], _join(where, "direction"), DIRECTIONS)
            if "direction" in e else None
        ),
        uncertainty_deg=(
            ck.number(e["uncertainty_deg"], _join(where, "uncertainty_deg"), 0.0, 90.0)
            if "uncertainty_deg" in e else 0.0
        ),
        window=ck.integer(e["window"], _join(where, "window"), 0, 1000) if "window" in e else None,
    )


def _opposite(direction: str | None) -> str | None:
    if direction is None:
        return None
    return "falling" if direction == "rising" else "rising"


def _edges_from_pattern(
    pattern: Sequence[tuple[float, float]], sensor: str | None, leading: str | None, period: float
) -> tuple[ExpectedEdge, ...]:
    edges: list[ExpectedEdge] = []
    for w, (s, e) in enumerate(pattern):
        if sensor == "vr":
            edges.append(ExpectedEdge("centre", ((s + e) / 2.0) % period, None, 0.0, w))
        else:
            edges.append(ExpectedEdge("leading", s % period, leading, 0.0, w))
            edges.append(ExpectedEdge("trailing", e % period, _opposite(leading), 0.0, w))
    return tuple(edges)


def _wrap_half(x: float, period: float) -> float:
    return (x + period / 2.0) % period - period / 2.0


# --------------------------------------------------------------------------- reading


def loads_profile(text: str, source: str = "profile") -> EngineProfile:
    """A profile from TOML text (``source`` names it in error messages)."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise UsageError(
            f"profile {source!r} is not valid TOML ({exc}); fix that line"
        ) from None
    return parse_profile(data, source)


def load_profile(path: str | os.PathLike[str]) -> EngineProfile:
    """Read and check a profile file."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise UsageError(f"profile {str(p)!r} does not exist; check the path") from None
    except UnicodeDecodeError:
        raise UsageError(
            f"profile {str(p)!r} is not UTF-8 text; a profile is a TOML text file"
        ) from None
    except OSError as exc:
        raise UsageError(
            f"profile {str(p)!r} cannot be read ({exc.strerror or exc}); check the permissions"
        ) from None
    return loads_profile(text, str(p))


def shipped_profiles() -> dict[str, str]:
    """The demo profiles that ship with toothcomb: name -> description.

    >>> "demo-belt-60-2-vr" in shipped_profiles()
    True
    """
    out: dict[str, str] = {}
    folder = resources.files(__package__ or "toothcomb.decoders") / "engine_profiles"
    for item in sorted(folder.iterdir(), key=lambda x: x.name):
        if item.name.endswith(".toml"):
            name = item.name[: -len(".toml")]
            out[name] = loads_profile(item.read_text(encoding="utf-8"), name).description
    return out


def shipped_profile(name: str) -> EngineProfile:
    """A demo profile that ships with toothcomb, by name."""
    folder = resources.files(__package__ or "toothcomb.decoders") / "engine_profiles"
    item = folder / f"{name}.toml"
    if not re.match(r"^[A-Za-z0-9_.-]+$", name) or not item.is_file():
        have = ", ".join(shipped_profiles())
        raise UsageError(f"there is no shipped profile {name!r}; the shipped ones are {have}")
    return loads_profile(item.read_text(encoding="utf-8"), name)


def load_reference(ref: str | os.PathLike[str]) -> EngineProfile:
    """What ``--against REF`` names: a profile (.toml), the JSON of an earlier decode (.json),
    or the name of a shipped profile. A JSON reference becomes a profile of kind
    ``"known-good capture"``."""
    text = str(ref)
    p = Path(text)
    if not p.exists():
        if re.match(r"^[A-Za-z0-9_.-]+$", text) and text in shipped_profiles():
            return shipped_profile(text)
        raise UsageError(
            f"reference {text!r} does not exist; give an engine profile (.toml), the --json "
            f"output of a decode of a known-good capture, or a shipped profile "
            f"({', '.join(shipped_profiles())})"
        )
    if p.is_dir():
        raise UsageError(f"reference {text!r} is a folder; give a profile or a decode's JSON file")
    try:
        body = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise UsageError(f"reference {text!r} cannot be read as text ({exc})") from None
    if p.suffix.lower() == ".json" or body.lstrip().startswith("{"):
        try:
            data = json.loads(body)
        except json.JSONDecodeError as exc:
            raise UsageError(
                f"reference {text!r} is not valid JSON (line {exc.lineno}, column {exc.colno}: "
                f"{exc.msg}); give the --json output of a decode"
            ) from None
        return profile_from_decode_json(data, text)
    return loads_profile(body, text)


# --------------------------------------------------------------------------- learning


def edge_uncertainty(std: float, n: int, rpm: float, sample_rate: float) -> float:
    """Standard uncertainty (1 sigma) of a decoded edge's mean angle, deg CA.

    Three parts, added in quadrature: the spread of the edge's events over their number
    (``std / sqrt(n)``: every random effect, jitter included), and the sample interval at the
    measured speed for the cam event and for the crank reference it is measured from, each
    ``Ts * deg_per_s / sqrt(12)`` (the rms of a uniform error over one sample). The sample parts
    are not divided by ``sqrt(n)``: at a steady speed the events fall at the same place between
    samples cycle after cycle, so that error need not average out.

    >>> round(edge_uncertainty(0.0, 10, 3000.0, 100_000.0), 4)  # 0.18 deg per sample
    0.0735
    """
    # source: rms of a uniform error over one quantisation step is step/sqrt(12)
    # (Widrow & Kollar, Quantization Noise, 2008, ch. 4)
    q = (6.0 * rpm / sample_rate) / math.sqrt(12.0) if rpm > 0 and sample_rate > 0 else 0.0
    spread = std / math.sqrt(n) if n > 0 and math.isfinite(std) else 0.0
    return math.sqrt(spread**2 + 2.0 * q**2)


def _get(data: Any, key: str, where: str, source: str, kind: type | tuple[type, ...]) -> Any:
    if not isinstance(data, Mapping) or key not in data:
        raise UsageError(
            f"reference {source!r}: {_join(where, key)} is missing; give the --json output of a "
            "toothcomb decode"
        )
    value = data[key]
    if not isinstance(value, kind) or (isinstance(value, bool) and kind is not bool):
        raise UsageError(
            f"reference {source!r}: {_join(where, key)} is {_show(value)}, which a toothcomb "
            "decode never writes there"
        )
    return value


def _finite_or_none(x: Any) -> float | None:
    if isinstance(x, int | float) and not isinstance(x, bool) and math.isfinite(x):
        return float(x)
    return None


def profile_data_from_decode_json(
    data: Mapping[str, Any], source: str, *, digits: int = 4
) -> dict[str, Any]:
    """The plain data (TOML tables) of a profile that expects what a decode's JSON shows.

    Each cam becomes a ``[[cams]]`` table named after its channel, each edge an expected edge
    with its measured cycle angle (``frame = "cycle"``) or, when the cycle phase was unknown,
    its angle per revolution (``frame = "revolution"``), and its own uncertainty
    (:func:`edge_uncertainty`). Angles are rounded to ``digits`` decimals.
    """
    if not isinstance(data, Mapping) or "cams" not in data or "crank" not in data:
        raise UsageError(
            f"reference {source!r} is not the JSON of a toothcomb decode (it has no 'crank' and "
            "'cams'); give an engine profile (.toml) or the --json output of a decode"
        )
    crank = _get(data, "crank", "", source, Mapping)
    capture = data.get("capture", {}) if isinstance(data.get("capture"), Mapping) else {}
    rate = _finite_or_none(capture.get("sample_rate")) or 0.0
    rpm_table = crank.get("rpm", {}) if isinstance(crank.get("rpm"), Mapping) else {}
    rpm = _finite_or_none(rpm_table.get("mean")) or 0.0
    cams_out: list[dict[str, Any]] = []
    for i, cam in enumerate(_get(data, "cams", "", source, list)):
        where = f"cams[{i}]"
        channel = str(_get(cam, "channel", where, source, str))
        edges = [e for e in _get(cam, "edges", where, source, list) if isinstance(e, Mapping)]
        usable = []
        for k, e in enumerate(edges):
            stats = _get(e, "angle_deg", f"{where}.edges[{k}]", source, Mapping)
            mean = _finite_or_none(stats.get("mean"))
            n = stats.get("n", 0)
            if mean is None or not isinstance(n, int) or n <= 0:
                continue
            usable.append((e, stats, mean, n))
        if not usable:
            continue
        cycle = all(isinstance(e.get("revolution"), int) for e, *_ in usable)
        period = 720.0 if cycle else 360.0
        out_edges = []
        leading = None
        for e, stats, mean, n in usable:
            flank = e.get("flank")
            direction = e.get("direction")
            if flank not in FLANKS or direction not in DIRECTIONS:
                raise UsageError(
                    f"reference {source!r}: {where} has an edge with flank {flank!r} and direction "
                    f"{direction!r}; a toothcomb decode writes {', '.join(FLANKS)} and "
                    f"{', '.join(DIRECTIONS)}"
                )
            angle = mean % 360.0 + (360.0 * e["revolution"] if cycle else 0.0)
            std = _finite_or_none(stats.get("std")) or 0.0
            u = edge_uncertainty(std, n, rpm, rate)
            item: dict[str, Any] = {
                "flank": flank,
                "direction": direction,
                "angle_deg": round(angle, digits) % period,
                "uncertainty_deg": round(u, digits),
            }
            if isinstance(e.get("window"), int) and not isinstance(e.get("window"), bool):
                item["window"] = e["window"]
            if flank == "leading":
                leading = direction
            out_edges.append(item)
        entry: dict[str, Any] = {"name": channel, "channel": channel}
        if cam.get("sensor") in SENSORS:
            entry["sensor"] = cam["sensor"]
        entry["frame"] = "cycle" if cycle else "revolution"
        if leading is not None:
            entry["leading_direction"] = leading
        pattern = []
        for w in cam.get("pattern_deg", []) or []:
            if (
                isinstance(w, list | tuple) and len(w) == 2
                and all(_finite_or_none(x) is not None for x in w)
            ):
                s, e = float(w[0]) % period, float(w[1]) - float(w[0])
                if 0.0 < e < period:
                    pattern.append([round(s, digits) % period, round(s + e, digits)])
        if pattern:
            entry["pattern"] = pattern
        entry["edges"] = out_edges
        cams_out.append(entry)
    if not cams_out:
        raise UsageError(
            f"reference {source!r} holds no measured cam edge, so there is nothing to compare "
            "with; decode a capture that has the cam channels"
        )
    wheel = crank.get("wheel")
    out: dict[str, Any] = {"format": FORMAT, "version": VERSION, "name": Path(source).stem}
    teeth = crank.get("teeth_deg")
    if isinstance(wheel, str) and _NM.match(wheel):
        out["crank"] = {"wheel": wheel}
    elif isinstance(wheel, str) and isinstance(teeth, list) and len(teeth) >= 2:
        # a library wheel: its name, and its teeth so that the profile stands on its own
        out["crank"] = {"wheel": wheel, "teeth_deg": teeth}
    if "crank" in out and crank.get("sensor") in SENSORS:
        out["crank"]["sensor"] = crank["sensor"]
    learned: dict[str, Any] = {}
    if isinstance(capture.get("path"), str):
        learned["capture"] = capture["path"]
    if rpm > 0:
        learned["rpm"] = round(rpm, 1)
    if rate > 0:
        learned["sample_rate"] = rate
    if learned:
        out["learned"] = learned
    out["cams"] = cams_out
    return out


def profile_from_decode_json(data: Mapping[str, Any], source: str = "reference") -> EngineProfile:
    """A profile (of kind ``"known-good capture"``) from the JSON of an earlier decode."""
    profile = parse_profile(profile_data_from_decode_json(data, source), source)
    return replace(profile, kind="known-good capture")


def learn_profile(
    result: Any,
    *,
    name: str | None = None,
    description: str = "",
    sprocket_teeth: int | None = None,
    drive: str | None = None,
    tolerance_deg: float | None = None,
    tdc_after_reference_deg: float | None = None,
    cylinders: int | None = None,
) -> EngineProfile:
    """A profile that expects what ``result`` (a :class:`~toothcomb.decoders.result.DecodeResult`
    of an engine known to be in time, or its JSON as a dict) shows.

    Write it with :func:`save_profile`; a later capture is then compared with it.
    """
    data = result.to_json() if hasattr(result, "to_json") else result
    capture = data.get("capture") if isinstance(data, Mapping) else None
    source = str(capture.get("path", "capture")) if isinstance(capture, Mapping) else "capture"
    plain = profile_data_from_decode_json(data, source)
    plain["name"] = name or f"learned-{Path(source).stem or 'capture'}"
    plain["description"] = description or f"learned from the known-good capture {source}"
    if cylinders is not None:
        plain["cylinders"] = cylinders
    if tolerance_deg is not None:
        plain["tolerance_deg"] = tolerance_deg
    if tdc_after_reference_deg is not None:
        plain["tdc_after_reference_deg"] = tdc_after_reference_deg
    if sprocket_teeth is not None:
        plain["drive"] = {"sprocket_teeth": sprocket_teeth}
        if drive is not None:
            plain["drive"]["kind"] = drive
    elif drive is not None:
        raise UsageError(
            f"drive {drive!r} needs the sprocket's tooth count too; give sprocket_teeth "
            "(--sprocket-teeth T)"
        )
    return parse_profile(plain, plain["name"])


# --------------------------------------------------------------------------- writing


def profile_to_data(profile: EngineProfile) -> dict[str, Any]:
    """The plain data (TOML tables) of a profile; :func:`parse_profile` reads it back."""
    out: dict[str, Any] = {"format": FORMAT, "version": VERSION, "name": profile.name}
    if profile.description:
        out["description"] = profile.description
    if profile.cylinders is not None:
        out["cylinders"] = profile.cylinders
    if profile.tolerance_deg is not None:
        out["tolerance_deg"] = profile.tolerance_deg
    if profile.tdc_after_reference_deg is not None:
        out["tdc_after_reference_deg"] = profile.tdc_after_reference_deg
    crank: dict[str, Any] = {}
    if profile.wheel is not None:
        crank["wheel"] = profile.wheel
    if profile.crank_teeth_deg:
        crank["teeth_deg"] = list(profile.crank_teeth_deg)
    if profile.crank_sensor is not None:
        crank["sensor"] = profile.crank_sensor
    if crank:
        out["crank"] = crank
    if profile.drive is not None:
        out["drive"] = {"sprocket_teeth": profile.drive.sprocket_teeth}
        if profile.drive.kind is not None:
            out["drive"] = {"kind": profile.drive.kind, **out["drive"]}
    if profile.learned is not None:
        lf = profile.learned
        learned = {"capture": lf.capture, "rpm": lf.rpm, "sample_rate": lf.sample_rate}
        out["learned"] = {k: v for k, v in learned.items() if v not in (None, "")}
    cams = []
    for c in profile.cams:
        cam: dict[str, Any] = {"name": c.name}
        optional = {
            "channel": c.channel,
            "sensor": c.sensor,
            "frame": c.frame,
            "tolerance_deg": c.tolerance_deg,
            "sprocket_teeth": c.sprocket_teeth,
            "bank": c.bank,
            "sensor_letter": c.sensor_letter,
            "leading_direction": c.leading_direction,
        }
        cam.update({k: v for k, v in optional.items() if v is not None})
        if c.pattern:
            cam["pattern"] = [list(w) for w in c.pattern]
        if c.phaser:
            cam["phaser"] = dict(c.phaser)
        if c.valve:
            cam["valve"] = dict(c.valve)
        edges = []
        for e in c.edges:
            item: dict[str, Any] = {"flank": e.flank, "angle_deg": e.angle_deg}
            if e.direction is not None:
                item["direction"] = e.direction
            if e.uncertainty_deg:
                item["uncertainty_deg"] = e.uncertainty_deg
            if e.window is not None:
                item["window"] = e.window
            edges.append(item)
        cam["edges"] = edges
        cams.append(cam)
    out["cams"] = cams
    return out


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        text = repr(v)
        return text if any(c in text for c in ".en") else text + ".0"
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, list | tuple):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, Mapping):
        return "{ " + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(f"cannot write a {type(v).__name__} in a profile")


def _toml_table(lines: list[str], header: str, table: Mapping[str, Any]) -> None:
    lines.append("")
    lines.append(header)
    for k, v in table.items():
        lines.append(f"{k} = {_toml_value(v)}")


def dumps_profile(profile: EngineProfile) -> str:
    """TOML text of a profile; :func:`loads_profile` reads it back to an equal profile.

    >>> p = loads_profile('name = "x"\\n[[cams]]\\nname = "in"\\npattern = [[10.0, 30.5]]\\n')
    >>> loads_profile(dumps_profile(p)) == p
    True
    """
    data = profile_to_data(profile)
    lines = [f"# toothcomb engine profile {profile.name!r}; angles in crank degrees (deg CA)"]
    for k, v in data.items():
        if not isinstance(v, Mapping) and k != "cams":
            lines.append(f"{k} = {_toml_value(v)}")
    for k in ("crank", "drive", "learned"):
        if k in data:
            _toml_table(lines, f"[{k}]", data[k])
    for cam in data["cams"]:
        _toml_table(lines, "[[cams]]", {k: v for k, v in cam.items() if k != "edges"})
        for edge in cam["edges"]:
            _toml_table(lines, "[[cams.edges]]", edge)
    return "\n".join(lines) + "\n"


def save_profile(profile: EngineProfile, path: str | os.PathLike[str]) -> None:
    """Write a profile as TOML to ``path`` (a temporary file first, then renamed over it)."""
    target = Path(path)
    text = dumps_profile(profile)
    tmp = target.with_name(f".{target.name}.tmp")
    try:
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, target)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise UsageError(
            f"profile {str(target)!r} cannot be written ({exc.strerror or exc}); check the folder "
            "and its permissions"
        ) from None


__all__ = [
    "FORMAT",
    "VERSION",
    "CamDrive",
    "CamProfile",
    "EngineProfile",
    "ExpectedEdge",
    "LearnedFrom",
    "dumps_profile",
    "edge_uncertainty",
    "learn_profile",
    "load_profile",
    "load_reference",
    "loads_profile",
    "parse_profile",
    "profile_from_decode_json",
    "profile_to_data",
    "save_profile",
    "shipped_profile",
    "shipped_profiles",
]
