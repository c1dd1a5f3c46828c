"""The terminal report: a decode result or a capture description, rendered with rich.

Every function draws on a :class:`rich.console.Console` it is given, so the same code writes to
a terminal, to stderr, or to a ``StringIO`` in tests. Text from captures and from the library is
always wrapped in :class:`rich.text.Text` (never parsed as markup), and every fact is in words as
well as in colour, so a report printed without colour reads the same.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from typing import Any

from rich import box
from rich.console import Console
from rich.table import Table
from rich.text import Text
from toothcomb.decoders.describe import CaptureDescription
from toothcomb.decoders.model import CaptureInfo
from toothcomb.decoders.result import (
    CamEdge,
    CamResult,
    CrankResult,
    DecodeResult,
    Finding,
    JitterStats,
)

#: printed at the end of every report and every description, one line each (80 columns at most)
SAFETY_CAUTION = (
    "Caution: belts, fans (can start key-off), ignition HV; back-probe, never pierce.",
    "Divider before a sound card; never under an unsupported vehicle; maker's manual.",
)

#: statuses of a compared cam edge that mean "in time"
IN_TIME = "in-time"

_SEVERITY_ORDER = {"error": 0, "warning": 1, "info": 2}
_SEVERITY_LABEL = {"error": "ERROR", "warning": "warning", "info": "info"}
_SEVERITY_STYLE = {"error": "bold red", "warning": "yellow", "info": "cyan"}
_SENSOR_LABEL = {"hall": "Hall", "vr": "VR"}
_NA = "n/a"


# --------------------------------------------------------------------------- formatting


def _finite(x: float | None) -> bool:
    return x is not None and isinstance(x, (int, float)) and math.isfinite(x)


def fmt_deg(x: float | None, digits: int = 2, *, sign: bool = False, unit: bool = True) -> str:
    """An angle in crank degrees, fixed decimals; ``n/a`` when unknown.

    >>> fmt_deg(112.3456), fmt_deg(-0.5, 1, sign=True), fmt_deg(float("nan"))
    ('112.35°', '-0.5°', 'n/a')
    >>> fmt_deg(3, unit=False)
    '3.00'
    """
    if not _finite(x):
        return _NA
    text = f"{x:+.{digits}f}" if sign else f"{x:.{digits}f}"
    return text + ("°" if unit else "")


def fmt_rpm(x: float | None) -> str:
    """Engine speed, whole rpm.

    >>> fmt_rpm(805.4), fmt_rpm(None)
    ('805', 'n/a')
    """
    return f"{x:.0f}" if _finite(x) else _NA


def fmt_us(seconds: float | None) -> str:
    """A short time in microseconds, two decimals.

    >>> fmt_us(12.344e-6), fmt_us(None)
    ('12.34', 'n/a')
    """
    return f"{seconds * 1e6:.2f}" if _finite(seconds) else _NA


def fmt_rate(hz: float | None) -> str:
    """A sample rate with a readable unit.

    >>> fmt_rate(44100.0), fmt_rate(200000.0), fmt_rate(2.5e6), fmt_rate(500.0)
    ('44.1 kHz', '200 kHz', '2.5 MHz', '500 Hz')
    """
    if not _finite(hz):
        return _NA
    for scale, unit in ((1e6, "MHz"), (1e3, "kHz")):
        if hz >= scale:
            return f"{hz / scale:.6g} {unit}"
    return f"{hz:.6g} Hz"


def level_decimals(minimum: float, maximum: float) -> int:
    """Decimals that show a channel's levels to three significant digits of its span.

    >>> level_decimals(-0.46, 0.47), level_decimals(-0.05, 5.02), level_decimals(0, 250)
    (3, 2, 0)
    """
    span = maximum - minimum
    if not (_finite(span) and span > 0):
        return 3
    return int(min(9, max(0, 2 - math.floor(math.log10(span)))))


def fmt_fixed(x: float | None, decimals: int) -> str:
    """A number with fixed decimals and no "-0.000".

    >>> fmt_fixed(-2.1e-05, 3), fmt_fixed(0.2458, 3), fmt_fixed(None, 2)
    ('0.000', '0.246', 'n/a')
    """
    if not _finite(x):
        return _NA
    text = f"{x:.{decimals}f}"
    return text.lstrip("-") if float(text) == 0 else text


def _get(obj: Any, key: str, default: Any = None) -> Any:
    """An attribute or mapping key, for result parts that may be objects or plain dicts."""
    if obj is None:
        return default
    if isinstance(obj, dict):
        return obj.get(key, default)
    return getattr(obj, key, default)


def _cmp(edge: Any, key: str, default: Any = None) -> Any:
    """A comparison field of a cam edge: from its ``comparison`` when it has one (see
    ``toothcomb.decoders.verdict``), else from the edge itself (plain dicts, other results)."""
    comparison = _get(edge, "comparison")
    if comparison is not None:
        return _get(comparison, key, default)
    return _get(edge, key, default)


def edge_label(edge: CamEdge) -> str:
    """Short name of a cam edge: its window and flank.

    >>> from toothcomb.decoders.result import AngleStats, CamEdge
    >>> e = CamEdge("leading", "rising", AngleStats(10, 0, 10, 10, 1), 0, (), window=2)
    >>> edge_label(e)
    'W2 leading'
    """
    window = "W?" if edge.window is None else f"W{edge.window}"
    return f"{window} {edge.flank}"


# --------------------------------------------------------------------------- building blocks


def _heading(console: Console, title: str) -> None:
    console.print()
    console.rule(Text(title, style="bold"), align="left")


def _facts(rows: Iterable[tuple[str, Text | str]]) -> Table:
    grid = Table.grid(padding=(0, 2))
    grid.add_column(style="bold", no_wrap=True)
    grid.add_column(overflow="fold")
    for key, value in rows:
        grid.add_row(Text(key), value if isinstance(value, Text) else Text(value))
    return grid


def _table(*columns: tuple[str, str], title: str | None = None, compact: bool = False) -> Table:
    """A table with the house look; each column is (header, justify). ``compact`` puts one
    space between columns instead of two, for wide tables."""
    table = Table(
        box=box.SIMPLE_HEAD,
        show_edge=False,
        pad_edge=False,
        collapse_padding=compact,
        title=title,
        title_justify="left",
        title_style="bold",
    )
    for header, justify in columns:
        table.add_column(header, justify=justify)  # type: ignore[arg-type]
    return table


def _cells(*values: Text | str) -> list[Text]:
    return [v if isinstance(v, Text) else Text(v) for v in values]


# --------------------------------------------------------------------------- capture


def render_capture(info: CaptureInfo, console: Console) -> None:
    """The capture section: file, format, rate, duration, channels and reader notes."""
    _heading(console, "Capture")
    fmt = info.format + (f", {info.subtype}" if info.subtype else "")
    channels = "   ".join(
        f"{i} {name}" + (f" [{info.units[i]}]" if i < len(info.units) and info.units[i] else "")
        for i, name in enumerate(info.channels)
    )
    rows: list[tuple[str, Text | str]] = [
        ("file", info.path),
        ("format", fmt),
        ("sample rate", fmt_rate(info.sample_rate)),
        ("duration", f"{info.duration_s:.3f} s ({info.n_samples:,} samples per channel)"),
        ("channels", channels or "none"),
    ]
    rows.extend(("note", note) for note in info.notes)
    console.print(_facts(rows))


# --------------------------------------------------------------------------- crank


def _polarity_text(crank: CrankResult) -> Text:
    if crank.polarity == "reversed":
        text = Text("REVERSED", style="bold reverse red")
        text.append(
            " - the sensor leads appear swapped; decoded anyway, but check the connector and "
            "the harness",
            style="red",
        )
        return text
    return Text("normal")


def _event_text(crank: CrankResult) -> str:
    if crank.sensor == "vr":
        return f"tooth centre, {crank.event_direction} zero crossing"
    return f"leading flank of each tooth, {crank.event_direction}"


def jitter_table(jitter: JitterStats, title: str) -> Table:
    """TIE, period and cycle-to-cycle jitter (IEEE Std 2414-2020 terms) as rms and
    peak-to-peak, in microseconds and crank degrees."""
    table = _table(
        ("", "left"),
        ("rms µs", "right"),
        ("p-p µs", "right"),
        ("rms °CA", "right"),
        ("p-p °CA", "right"),
        title=title,
    )
    for label, key in (("TIE", "tie"), ("period", "period"), ("cycle-to-cycle", "c2c")):
        table.add_row(
            *_cells(
                label,
                fmt_us(getattr(jitter, f"{key}_rms_s")),
                fmt_us(getattr(jitter, f"{key}_pp_s")),
                fmt_deg(getattr(jitter, f"{key}_rms_deg"), 3, unit=False),
                fmt_deg(getattr(jitter, f"{key}_pp_deg"), 3, unit=False),
            )
        )
    return table


def render_crank(crank: CrankResult, console: Console) -> None:
    """The crank section: wheel, sensor, polarity, speed, sync and tooth-period jitter."""
    _heading(console, f"Crank - channel {crank.channel}")
    wheel = Text(crank.wheel, style="bold")
    if crank.is_missing_tooth:
        wheel.append(
            f"  ({crank.positions} positions, {crank.missing} missing, "
            f"pitch {fmt_deg(crank.pitch_deg)} CA)"
        )
        reference = "tooth 1, the first tooth after the gap"
    else:
        wheel.append(
            f"  (library wheel: {crank.positions - crank.missing} teeth on {crank.positions} "
            f"places of {fmt_deg(crank.pitch_deg)} CA)"
        )
        reference = f"tooth 1 of the {crank.wheel} pattern (`toothcomb patterns {crank.wheel}`)"
    rpm = crank.rpm
    refs = crank.reference_times_s
    ref_text = f"{len(refs)} found" + (
        f", first at {refs[0]:.4f} s, last at {refs[-1]:.4f} s" if refs else ""
    )
    teeth = Text(f"{crank.extra_teeth} extra, {crank.missing_teeth} missing")
    if crank.extra_teeth or crank.missing_teeth:
        teeth.stylize("yellow")
    sync = Text(str(crank.sync_losses))
    if crank.sync_losses:
        sync.stylize("bold yellow")
    rows: list[tuple[str, Text | str]] = [
        ("sensor", _SENSOR_LABEL.get(crank.sensor, crank.sensor)),
        ("wheel", wheel),
        ("polarity", _polarity_text(crank)),
        ("event", _event_text(crank)),
        ("reference", reference),
        (
            "engine speed",
            f"min {fmt_rpm(rpm.min)}  mean {fmt_rpm(rpm.mean)}  max {fmt_rpm(rpm.max)} rpm",
        ),
        ("revolutions", str(crank.revolutions)),
        ("ref. events", ref_text),
        ("sync losses", sync),
        ("teeth", teeth),
    ]
    console.print(_facts(rows))
    if crank.jitter is not None:
        jit = crank.jitter
        title = f"Tooth-period jitter, {jit.n} teeth (IEEE 2414 terms)"
        console.print()
        console.print(jitter_table(jit, title))
        if jit.detrend:
            console.print(Text(f"trend removed first: {jit.detrend}", style="dim"))


# --------------------------------------------------------------------------- cams


def _status_text(edge: CamEdge) -> Text:
    status = _cmp(edge, "status")
    if status is None:
        return Text("")
    if status == IN_TIME:
        return Text("in time", style="green")
    if status == "off-by-teeth":
        n = _cmp(edge, "off_by_teeth")
        trig = " trig." if _cmp(edge, "tooth_kind") == "trigger" else ""
        return Text(f"OFF {n:+d}{trig}" if isinstance(n, int) else "OFF", style="bold red")
    if status == "drifted":
        return Text("DRIFTED", style="bold yellow")
    return Text(str(status).upper(), style="bold yellow")


def _cam_table(cam: CamResult) -> Table:
    """One row per edge; numbers in deg CA without the unit, so the table fits 80 columns.

    With expected angles, the cycle angle, min and max give way to expected, deviation and
    status.
    """
    compared = any(_cmp(e, "expected_deg") is not None for e in cam.edges)
    columns: list[tuple[str, str]] = [
        ("edge", "left"),
        ("signal", "left"),
        ("rev", "right"),
        ("angle", "right"),
    ]
    if not compared:
        columns += [("cycle", "right")]
    columns += [("std", "right")]
    if not compared:
        columns += [("min", "right"), ("max", "right")]
    columns += [("n", "right"), ("jit p-p", "right")]
    if compared:
        columns += [("exp.", "right"), ("dev.", "right"), ("status", "left")]
    table = _table(*columns, compact=True)
    for edge in cam.edges:
        a = edge.angle
        rev = "?" if edge.revolution is None else str(edge.revolution)
        jitter_pp = edge.jitter.tie_pp_deg if edge.jitter is not None else None
        row = _cells(
            edge_label(edge), edge.direction, rev, Text(fmt_deg(a.mean, unit=False), style="bold")
        )
        if not compared:
            row += _cells(fmt_deg(edge.cycle_angle, unit=False))
        row += _cells(fmt_deg(a.std, 3, unit=False))
        if not compared:
            row += _cells(fmt_deg(a.min, unit=False), fmt_deg(a.max, unit=False))
        row += _cells(str(a.n), fmt_deg(jitter_pp, 3, unit=False))
        if compared:
            row += _cells(
                fmt_deg(_cmp(edge, "expected_deg"), unit=False),
                fmt_deg(_cmp(edge, "deviation_deg"), sign=True, unit=False),
                _status_text(edge),
            )
        table.add_row(*row)
    return table


def _cam_caption(cam: CamResult) -> str:
    compared = any(_cmp(e, "expected_deg") is not None for e in cam.edges)
    if compared:
        return "deg CA after the crank reference; dev. + = late; OFF +n: n teeth late, - early"
    return "deg CA after the crank reference (0-360); cycle = angle + 360 in revolution 1"


def _phaser_moved(phaser: Any) -> bool:
    holds = _get(phaser, "holds", ()) or ()
    return bool(_get(phaser, "moves", ()) or any(_get(h, "hunting") for h in holds))


def _phaser_lines(phaser: Any) -> list[str]:
    if phaser is None:
        return []
    from .phaser_view import base_text

    authority = _get(phaser, "authority_deg")
    moves: Sequence[Any] = _get(phaser, "moves", ()) or ()
    holds: Sequence[Any] = _get(phaser, "holds", ()) or ()
    hunting = [h for h in holds if _get(h, "hunting")]
    if not moves and not hunting:
        line = "phaser: the cam did not move during the capture"
        jitter = _get(holds[0], "jitter_deg") if holds else None
        if _finite(jitter):
            line += f" (hold jitter {jitter:.3f}° rms)"
        return [line]
    head = f"phaser: {len(moves)} move{'s' if len(moves) != 1 else ''}"
    if moves and _finite(authority):
        head += f", largest travel {fmt_deg(authority, 1)} CA"
    if hunting:
        head += f", hunting in {len(hunting)} hold{'s' if len(hunting) != 1 else ''}"
    lines = [head + f"; phase {base_text(phaser)}"]
    dropped = _get(_get(phaser, "dropped"), "count") if isinstance(phaser, dict) else _get(
        phaser, "dropped"
    )
    if dropped:
        lines.append(f"{dropped} event(s) set aside as outliers (see the findings)")
    return lines


def render_phaser(phaser: Any, console: Console, actuator: Any = None) -> None:
    """The phase-vs-time strip and the tables of moves and holds of a cam that moved; with its
    valve command, the duty strip under it on the same time axis."""
    from .phaser_view import duty_strip, hold_table, move_table, phase_strip, phaser_trace

    if phaser is None or not (_phaser_moved(phaser) or actuator is not None):
        return
    trace = phaser_trace(phaser)
    if trace["time_s"]:
        span = (float(trace["time_s"][0]), float(trace["time_s"][-1]))
        for row in phase_strip(trace, console.width, t_range=span):
            console.print(row, no_wrap=True, crop=True)
        console.print(
            Text("█ hold  ▓ move  ▒ hunting; deg CA against time", style="dim"), no_wrap=True
        )
        if actuator is not None:
            for row in duty_strip(actuator, console.width, span):
                console.print(row, no_wrap=True, crop=True)
            console.print(Text("valve duty, same time axis", style="dim"), no_wrap=True)
    moves = _get(phaser, "moves", ()) or ()
    if moves:
        console.print(move_table(moves))
    holds = _get(phaser, "holds", ()) or ()
    if holds:
        console.print(hold_table(holds))


#: an edge whose angles span more than this (deg CA) gets a note that the cam phase moved
PHASE_MOVED_DEG = 2.0


def edge_range(edge: CamEdge) -> float:
    """Span of an edge's angles, max minus min on the circle (0 when unknown).

    >>> from toothcomb.decoders.result import AngleStats, CamEdge
    >>> edge_range(CamEdge("leading", "rising", AngleStats(0.0, 0.1, 359.5, 0.7, 9), 0, ()))
    1.2
    """
    span = (edge.angle.max - edge.angle.min) % 360.0
    return round(span, 9) if _finite(span) else 0.0


def library_line(matches: Sequence[Any]) -> str:
    """One line naming the pattern-library cam pattern that fits best (objects or dicts).

    >>> from toothcomb.decoders.result import CamPatternMatch
    >>> library_line([CamPatternMatch("quad-even", 152.5, False, 0.02, 0.03, True)])
    "pattern: library 'quad-even' shifted +152.5° CA (rms 0.02°)"
    >>> library_line([])
    'pattern: no library pattern fits'
    """
    if not matches:
        return "pattern: no library pattern fits"
    best = matches[0]
    text = (
        f"pattern: library {_get(best, 'name')!r} shifted "
        f"{fmt_deg(_get(best, 'shift_deg'), 1, sign=True)} CA "
        f"(rms {fmt_deg(_get(best, 'rms_deg'), 2)})"
    )
    if _get(best, "inverted"):
        text += ", sensor output low on a tooth"
    if not _get(best, "phase_known", True):
        text += "; cycle phase unknown, so the shift is known modulo 360°"
    others = len({_get(m, "name") for m in matches[1:]} - {_get(best, "name")})
    if others:
        text += f"; {others} other pattern(s) fit too"
    return text


def _cam_notes(cam: CamResult) -> list[str]:
    notes: list[str] = []
    if cam.phase_source:
        notes.append("this cam fixed the cycle phase (its pattern differs between revolutions)")
    if any(e.revolution is None for e in cam.edges):
        notes.append("rev '?': the cycle phase is unknown, so the revolution (0 or 1) is too")
    if cam.pattern:
        # cycle degrees once the phase is known, else degrees of one revolution
        span = 720.0 if any(e.revolution is not None for e in cam.edges) else 360.0
        windows = ", ".join(f"{fmt_deg(s, 1, unit=False)}-{fmt_deg(e, 1)}" for s, e in cam.pattern)
        notes.append(f"pattern ({span:.0f}° frame): {windows}")
    if cam.edges:
        notes.append(library_line(_get(cam, "library", ()) or ()))
    phaser = _get(cam, "phaser")
    notes.extend(_phaser_lines(phaser))
    spread = max((edge_range(e) for e in cam.edges), default=0.0)
    if phaser is None and spread > PHASE_MOVED_DEG:
        notes.append(
            f"edge angles span up to {fmt_deg(spread, 1)} CA: the cam phase moved during the "
            "capture (phaser?); see --plot"
        )
    actuator = _get(cam, "actuator")
    if actuator is not None:
        from .phaser_view import actuator_lines

        notes.extend(actuator_lines(actuator))
    return notes


def render_cam(cam: CamResult, console: Console) -> None:
    """One cam section: a row per distinct edge with its angle after the crank reference."""
    sensor = _SENSOR_LABEL.get(cam.sensor, cam.sensor)
    _heading(console, f"Cam - channel {cam.channel} ({sensor})")
    if not cam.edges:
        console.print(Text("no cam edges were measured on this channel", style="yellow"))
    else:
        console.print(_cam_table(cam))
        console.print(Text(_cam_caption(cam), style="dim"))
    for note in _cam_notes(cam):
        console.print(Text(note))
    render_phaser(_get(cam, "phaser"), console, _get(cam, "actuator"))


# --------------------------------------------------------------------------- timing verdict

#: ruler mark of a measured edge by status (the character tells it without colour, too)
RULER_MARKS: dict[str | None, tuple[str, str]] = {
    "off-by-teeth": ("X", "bold white on red"),
    "drifted": ("~", "bold yellow"),
    "in-time": ("o", "green"),
    None: (".", "dim"),
}
#: ruler mark of an expected edge
RULER_EXPECTED = ("|", "cyan")
_MARK_RANK = {"X": 3, "~": 2, "o": 1, ".": 0}
_STATUS_STYLE = {"off-by-teeth": "bold red", "drifted": "bold yellow", "in-time": "green"}


def _compared_edges(cam: CamResult) -> list[CamEdge]:
    return [e for e in cam.edges if _cmp(e, "status") is not None]


def _ruler_period(result: DecodeResult) -> float:
    periods = [
        _get(_get(e, "comparison"), "period_deg") for c in result.cams for e in _compared_edges(c)
    ]
    return 720.0 if any(p == 720.0 for p in periods) else 360.0


def _measured_pos(edge: CamEdge, period: float) -> float | None:
    if period == 720.0 and edge.revolution is not None:
        return edge.cycle_angle
    return edge.angle.mean if _finite(edge.angle.mean) else None


def _expected_pos(edge: CamEdge, period: float) -> float | None:
    comparison = _get(edge, "comparison")
    if comparison is None:
        return None
    if period == 720.0:
        cycle = _get(comparison, "expected_cycle_deg")
        if _finite(cycle):
            return float(cycle)
    expected = _get(comparison, "expected_deg")
    return float(expected) if _finite(expected) else None


def _cam_names(result: DecodeResult) -> dict[str, str]:
    """Channel -> the cam's name in the reference."""
    verdict = _get(result, "verdict")
    out: dict[str, str] = {}
    for c in _get(verdict, "cams", ()) or ():
        if _get(c, "channel") is not None:
            out[_get(c, "channel")] = _get(c, "name")
    return out


def timing_ruler(result: DecodeResult, width: int) -> list[Text]:
    """The cycle (or one revolution) as a ruler: for each compared cam a row of expected marks
    (``|``) over a row of measured marks (``o`` in time, ``~`` drifted, ``X`` off by whole
    teeth, highlighted; ``.`` not compared), under a scale in deg CA after the crank reference
    with ``T`` at TDC of cylinder 1 when the profile gives it."""
    period = _ruler_period(result)
    names = _cam_names(result)
    cams = [c for c in result.cams if _compared_edges(c)]
    label_w = min(20, max([len(names.get(c.channel, c.channel)) for c in cams] + [4]) + 6)
    n = max(36, width - label_w)

    def col(angle: float) -> int:
        return int(min(n - 1, max(0, round((angle % period) / period * (n - 1)))))

    def row(cells: list[tuple[str, str]], label: str) -> Text:
        text = Text(f"{label[: label_w - 1]:<{label_w}}")
        for ch, style in cells:
            text.append(ch, style=style)
        text.rstrip()
        return text

    axis = [("-", "dim")] * n
    step = period / 8.0
    for k in range(9):
        axis[min(n - 1, round(k * step / period * (n - 1)))] = ("|" if k % 4 == 0 else "+", "dim")
    tdc = _get(_get(result, "verdict"), "tdc_after_reference_deg")
    if _finite(tdc):
        for a in (tdc, tdc + 360.0) if period == 720.0 else (tdc,):
            if a < period:
                axis[col(a)] = ("T", "bold magenta")
    scale = [" "] * n
    for k in range(5):
        value = k * period / 4.0
        label = f"{value:.0f}"
        at = col(value) if k < 4 else n - 1
        start = at - len(label) + 1 if k == 4 else (at if k == 0 else at - len(label) // 2)
        for i, ch in enumerate(label):
            if 0 <= start + i < n:
                scale[start + i] = ch
    frame = "0-720 (revolutions 0 and 1)" if period == 720.0 else "0-360 (one revolution)"
    lines = [
        Text(f"Timing ruler: deg CA after the crank reference, {frame}", style="bold"),
        row([(ch, "dim") for ch in scale], ""),
        row(axis, ""),
    ]
    for cam in cams:
        expected = [(" ", "")] * n
        measured = [(" ", "")] * n
        for edge in cam.edges:
            exp = _expected_pos(edge, period)
            if exp is not None:
                expected[col(exp)] = RULER_EXPECTED
            pos = _measured_pos(edge, period)
            if pos is None:
                continue
            mark = RULER_MARKS.get(_cmp(edge, "status"), RULER_MARKS[None])
            here = measured[col(pos)][0]
            if _MARK_RANK.get(mark[0], 0) >= _MARK_RANK.get(here, -1):
                measured[col(pos)] = mark
        name = names.get(cam.channel, cam.channel)
        lines.append(row(expected, f"{name} exp"))
        lines.append(row(measured, f"{' ' * len(name)} meas"))
    legend = Text("")
    for ch, style, what in (
        (*RULER_EXPECTED, "expected"),
        (*RULER_MARKS["in-time"], "in time"),
        (*RULER_MARKS["drifted"], "drifted"),
        (*RULER_MARKS["off-by-teeth"], "off by whole teeth"),
        ("T", "bold magenta", "TDC cyl. 1"),
    ):
        if ch == "T" and not _finite(tdc):
            continue
        legend.append(ch, style=style)
        legend.append(f" {what}   ")
    legend.rstrip()
    lines.append(legend)
    return lines


def fmt_tdc(x: float | None) -> str:
    """An angle from TDC: negative before (BTDC), positive after (ATDC).

    >>> fmt_tdc(-12.34), fmt_tdc(5.0), fmt_tdc(None)
    ('12.3 BTDC', '5.0 ATDC', 'n/a')
    """
    if not _finite(x):
        return _NA
    return f"{-x:.1f} BTDC" if x < 0 else f"{x:.1f} ATDC"


def _teeth(x: float | None) -> str:
    return f"{x:+.2f}" if _finite(x) else "-"


def _verdict_table(result: DecodeResult) -> Table:
    """One row per compared edge: expected and measured positions, deviation with its
    uncertainty, in teeth, from TDC, and the status."""
    period = _ruler_period(result)
    verdict = _get(result, "verdict")
    tdc = _finite(_get(verdict, "tdc_after_reference_deg"))
    columns = [
        ("cam edge", "left"),
        ("exp.", "right"),
        ("meas.", "right"),
        ("dev.", "right"),
        ("±1σ", "right"),
        ("trig.", "right"),
        ("drive", "right"),
    ]
    if tdc:
        columns.append(("from TDC", "right"))
    columns.append(("status", "left"))
    table = _table(*columns, compact=True)
    names = _cam_names(result)
    for cam in result.cams:
        for edge in _compared_edges(cam):
            window = "W?" if edge.window is None else f"W{edge.window}"
            flank = {"leading": "lead", "trailing": "trail"}.get(edge.flank, edge.flank)
            cells = _cells(
                f"{names.get(cam.channel, cam.channel)} {window} {flank}",
                fmt_deg(_expected_pos(edge, period), unit=False),
                fmt_deg(_measured_pos(edge, period), unit=False),
                Text(
                    fmt_deg(_cmp(edge, "deviation_deg"), sign=True, unit=False),
                    style=_STATUS_STYLE.get(_cmp(edge, "status"), ""),
                ),
                fmt_deg(_cmp(edge, "uncertainty_deg"), unit=False),
                _teeth(_cmp(edge, "deviation_trigger_teeth")),
                _teeth(_cmp(edge, "deviation_drive_teeth")),
            )
            if tdc:
                cells += _cells(fmt_tdc(_cmp(edge, "from_tdc_deg")))
            cells += [_status_text(edge)]
            table.add_row(*cells)
    return table


def render_verdict(result: DecodeResult, console: Console) -> None:
    """The timing section: what was compared with, the ruler, and every compared edge."""
    verdict = _get(result, "verdict")
    if verdict is None:
        return
    kind = _get(verdict, "reference_kind", "profile")
    name = _get(verdict, "profile_name", "")
    _heading(console, f"Timing against {kind} {name}")
    reference = str(_get(verdict, "reference", ""))
    teeth = _get(verdict, "sprocket_teeth")
    drive = _get(verdict, "drive") or "drive"
    crank = result.crank
    rows: list[tuple[str, Text | str]] = [
        ("reference", f"{kind} {name!r}" + (f" from {reference}" if reference != name else "")),
    ]
    tolerances = sorted({_get(c, "tolerance_deg") for c in _get(verdict, "cams", ())})
    tolerance = ", ".join(f"±{t:g}° CA" for t in tolerances if _finite(t)) or "n/a"
    rows.append(("tolerance", tolerance))
    if isinstance(teeth, int) and teeth > 0:
        rows.append(
            ("drive tooth", f"{teeth}-tooth {drive} sprocket: one drive tooth = "
             f"{fmt_deg(720.0 / teeth)} CA")
        )
    else:
        rows.append(("drive tooth", "unknown; give --sprocket-teeth T for deviations in teeth"))
    rows.append(("trigger tooth", f"{crank.wheel} crank wheel: {fmt_deg(crank.pitch_deg)} CA"))
    tdc = _get(verdict, "tdc_after_reference_deg")
    if _finite(tdc):
        rows.append(("TDC cyl. 1", f"{fmt_deg(tdc, 1)} CA after the crank reference"))
    rpm = crank.rpm
    rows.append(
        (
            "engine speed",
            f"measured at {fmt_rpm(_get(verdict, 'rpm'))} rpm mean "
            f"(min {fmt_rpm(rpm.min)}, max {fmt_rpm(rpm.max)})",
        )
    )
    console.print(_facts(rows))
    if any(_compared_edges(c) for c in result.cams):
        console.print()
        title, *rows = timing_ruler(result, console.width)
        console.print(title)
        for line in rows:
            console.print(line, overflow="crop", no_wrap=True)
        console.print()
        console.print(_verdict_table(result))
        console.print(
            Text(
                "deg CA; exp./meas. on the ruler's frame; dev. + = late; ±1σ: standard "
                "uncertainty (k = 1); trig./drive: deviation in crank trigger / cam drive teeth",
                style="dim",
            )
        )


def verdict_lines(verdict: Any) -> list[Text]:
    """The verdict in words, one line per cam and per joint finding, then the context."""
    styles = {
        _get(c, "sentence"): _STATUS_STYLE.get(_get(c, "status"), "")
        for c in _get(verdict, "cams", ()) or ()
    }
    lines = []
    for sentence in _get(verdict, "sentences", ()) or ():
        text = Text("  ")
        text.append(str(sentence), style=styles.get(sentence, ""))
        lines.append(text)
    for note in _get(verdict, "context", ()) or ():
        lines.append(Text(f"  {note}", style="italic"))
    return lines


# --------------------------------------------------------------------------- findings


def _sorted_findings(result: DecodeResult) -> list[tuple[str, Finding]]:
    tagged: list[tuple[str, Finding]] = [("capture", f) for f in result.findings]
    tagged += [(f"crank {result.crank.channel}", f) for f in result.crank.findings]
    for cam in result.cams:
        tagged += [(f"cam {cam.channel}", f) for f in cam.findings]
    for act in _get(result, "actuators", ()) or ():
        tagged += [(f"valve {act.channel}", f) for f in act.findings]
    verdict = _get(result, "verdict")
    if verdict is not None:
        tagged += [("timing", f) for f in verdict.findings]
    return sorted(tagged, key=lambda wf: _SEVERITY_ORDER.get(wf[1].severity, 3))


def render_findings(result: DecodeResult, console: Console) -> None:
    """Every finding, errors and warnings first, and how each choice was made."""
    _heading(console, "Findings")
    findings = _sorted_findings(result)
    if not findings:
        console.print(Text("nothing unusual was noticed"))
    else:
        table = _table(("", "left"), ("where", "left"), ("time", "right"), ("", "left"))
        table.show_header = False
        for where, f in findings:
            sev = Text(
                _SEVERITY_LABEL.get(f.severity, f.severity),
                style=_SEVERITY_STYLE.get(f.severity, ""),
            )
            when = f"{f.time_s:.3f} s" if _finite(f.time_s) else ""
            table.add_row(sev, Text(where), Text(when), Text(f.message))
        console.print(table)
    if result.choices:
        _heading(console, "How channels and wheel were chosen")
        console.print(_facts((k, str(v)) for k, v in result.choices.items()))


# --------------------------------------------------------------------------- verdict


def marks_out_of_time(result: DecodeResult) -> list[tuple[CamResult, CamEdge]]:
    """Cam edges that were compared with an expectation and are not in time.

    >>> from toothcomb.decoders.model import CaptureInfo
    >>> from toothcomb.decoders.result import CrankResult, RpmStats
    >>> crank = CrankResult("c", "hall", "60-2", 60, 2, "normal", "rising",
    ...                     RpmStats(800, 800, 800), 1, 0, (0.0,))
    >>> marks_out_of_time(DecodeResult(CaptureInfo("x", 1.0, 1, ("c",), "csv"), crank, ()))
    []
    """
    return [
        (cam, edge)
        for cam in result.cams
        for edge in cam.edges
        if _cmp(edge, "status") not in (None, IN_TIME)
    ]


def _verdict(result: DecodeResult) -> Text:
    n_edges = sum(len(c.edges) for c in result.cams)
    crank = result.crank
    text = Text("Result: ", style="bold")
    text.append(
        f"decoded {crank.revolutions} revolutions of a {crank.wheel} wheel at "
        f"{fmt_rpm(crank.rpm.mean)} rpm mean; {len(result.cams)} cam channel"
        f"{'s' if len(result.cams) != 1 else ''}, {n_edges} edge{'s' if n_edges != 1 else ''}. "
    )
    compared = any(_cmp(e, "status") is not None for c in result.cams for e in c.edges)
    late = marks_out_of_time(result)
    if not compared:
        text.append("No expected angles were given, so no timing verdict.")
    elif not late:
        text.append("Every compared mark is in time.", style="bold green")
    else:
        if len(late) <= 4:
            names = ", ".join(f"{c.channel} {edge_label(e)}" for c, e in late)
        else:
            per_cam: dict[str, int] = {}
            for c, _e in late:
                per_cam[c.channel] = per_cam.get(c.channel, 0) + 1
            names = ", ".join(f"{n} on {ch}" for ch, n in per_cam.items())
        text.append(
            f"{len(late)} mark{'s' if len(late) != 1 else ''} out of tolerance: {names}.",
            style="bold red",
        )
    return text


def render_safety(console: Console) -> None:
    """The short safety caution that ends every report."""
    console.print()
    for line in SAFETY_CAUTION:
        console.print(Text(line, style="italic"))


# --------------------------------------------------------------------------- whole reports


def render_decode(result: DecodeResult, console: Console, notes: Sequence[str] = ()) -> None:
    """The full decode report: capture, crank, one section per cam, findings, verdict, ``notes``
    (e.g. which files were written), caution.

    >>> import io
    >>> from rich.console import Console
    >>> from toothcomb.decoders.model import CaptureInfo
    >>> from toothcomb.decoders.result import CrankResult, RpmStats
    >>> crank = CrankResult("crank", "hall", "60-2", 60, 2, "normal", "rising",
    ...                     RpmStats(790, 800, 810), 12, 0, (0.05,))
    >>> res = DecodeResult(CaptureInfo("idle.wav", 48000.0, 48000, ("crank",), "wav"), crank, ())
    >>> con = Console(file=io.StringIO(), width=100)
    >>> render_decode(res, con)
    >>> "pitch 6.00° CA" in con.file.getvalue()
    True
    """
    render_capture(result.capture, console)
    render_crank(result.crank, console)
    for cam in result.cams:
        render_cam(cam, console)
    if not result.cams:
        _heading(console, "Cams")
        console.print(Text("no cam channel was decoded", style="yellow"))
    for act in _get(result, "actuators", ()) or ():
        if _get(act, "cam") is None:
            from .phaser_view import actuator_lines

            _heading(console, f"Valve command - channel {act.channel}")
            for line in actuator_lines(act):
                console.print(Text(line))
    verdict = _get(result, "verdict")
    if verdict is not None:
        render_verdict(result, console)
    render_findings(result, console)
    console.print()
    console.print(_verdict(result))
    if verdict is not None:
        for line in verdict_lines(verdict):
            console.print(line)
    for note in notes:
        console.print(Text(note, style="dim"))
    render_safety(console)


def render_description(
    desc: CaptureDescription, console: Console, notes: Sequence[str] = ()
) -> None:
    """The ``describe`` report: capture facts, level statistics and a guess per channel,
    ``notes``, caution."""
    info = desc.info
    render_capture(info, console)
    _heading(console, "Channels")
    # std is left to the JSON so that the table fits 80 columns
    table = _table(
        ("#", "right"),
        ("channel", "left"),
        ("min", "right"),
        ("max", "right"),
        ("mean", "right"),
        ("noise", "right"),
        ("clip", "right"),
        ("kind", "left"),
        ("role (conf.)", "left"),
        ("edges/s", "right"),
        compact=True,
    )
    guesses = {g.name: g for g in desc.guesses}
    for i, lv in enumerate(desc.levels):
        g = guesses.get(lv.name)
        d = level_decimals(lv.minimum, lv.maximum)
        clipped = Text(f"{lv.clipped_fraction * 100:.1f} %")
        if lv.clipped_fraction > 0.001:
            clipped.stylize("yellow")
        unit = info.units[i] if i < len(info.units) else ""
        role = f"{g.role or '-'} ({g.confidence:.2f})" if g else "?"
        table.add_row(
            *_cells(
                str(i),
                Text(lv.name + (f" [{unit}]" if unit else ""), style="bold"),
                fmt_fixed(lv.minimum, d),
                fmt_fixed(lv.maximum, d),
                fmt_fixed(lv.mean, d),
                fmt_fixed(lv.noise, d),
                clipped,
                _SENSOR_LABEL.get(g.kind, g.kind) if g else "?",
                role,
                f"{g.edge_rate_hz:.0f}" if g else "",
            )
        )
    console.print(table)
    reasons = [(g.name, g.reason) for g in desc.guesses if g.reason]
    if reasons:
        console.print(_facts(reasons))
    bad = [lv for lv in desc.levels if lv.non_finite]
    for lv in bad:
        console.print(
            Text(f"{lv.name}: {lv.non_finite} samples are not finite numbers", style="yellow")
        )
    for note in notes:
        console.print(Text(note, style="dim"))
    render_safety(console)
