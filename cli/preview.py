"""``toothcomb preview``: a few revolutions of one channel drawn in the terminal.

For when no image viewer is at hand (over SSH in a workshop): the channel is drawn as a strip of
Braille characters (2 x 4 dots each, so a 100-column terminal shows 200 points across), and,
when the crank decodes in that stretch, a row of marks under it:

- ``▲`` the crank reference event (tooth 1, the first tooth after the gap);
- ``─`` the gap (from the last tooth before it to tooth 1);
- ``╵`` every other tooth event, when the teeth are at least two columns apart.

Only the stretch shown (plus what it takes to find the wheel there) is held in memory: a
window around ``--start`` that grows until the wheel is in sync at the start and the revolutions
asked for are in it. The crank is found
in that window the way a decode finds it (sensor, event direction, wheel), so the marks sit
where ``toothcomb decode`` puts the same events.

>>> braille_strip(np.array([0, 0, 1, 1, 0, 0, 1, 1.0]), width=4, height=1, lo=0, hi=1)
['⣀⡏⣇⡏']
"""

from __future__ import annotations

import argparse
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from rich.console import Console
from rich.text import Text
from toothcomb.decoders.errors import UsageError
from toothcomb.decoders.model import CaptureInfo, ChannelLevels
from toothcomb.decoders.readers.memory import ArraySource, read_span

from .argtypes import checked

if TYPE_CHECKING:
    from .main import Streams

#: Braille dot bits by (dot row 0..3, dot column 0..1)
# source: Unicode Standard, Braille Patterns block U+2800..U+28FF (dots 1-2-3-7 left column,
# 4-5-6-8 right column, dot n = bit n-1)
BRAILLE_BITS = ((0x01, 0x08), (0x02, 0x10), (0x04, 0x20), (0x40, 0x80))
BRAILLE_BASE = 0x2800

#: marks under the strip
MARK_REFERENCE = "▲"
MARK_GAP = "─"
MARK_TOOTH = "╵"

#: the window read to find the wheel first, seconds; doubled until it holds the revolutions
# common practice, no source
FIRST_WINDOW_S = 0.5
#: the longest window read, in samples per channel (bounds memory on slow engines and fast rates)
MAX_WINDOW_SAMPLES = 1 << 22
#: the stretch shown when the crank cannot be decoded, seconds
UNDECODED_SPAN_S = 0.2

EXAMPLES = """\
examples:
  toothcomb preview idle.flac
      two crank revolutions from the start, with the gap and reference events marked
  toothcomb preview scope.csv --channel CH2 --revs 4 --start 1.5
      a cam channel, four revolutions from 1.5 s in, under the crank's marks"""


# --------------------------------------------------------------------------- what is shown


@dataclass(frozen=True)
class CrankMarks:
    """The crank as decoded in the window: where to put the marks."""

    channel: str
    sensor: str
    wheel: str
    rpm: float
    #: crank reference events (tooth 1) found in the window (s)
    reference_times: np.ndarray = field(repr=False)
    #: every event in the direction the wheel is followed on (Hall leading flanks, VR tooth
    #: centres), also before the first gap, where the teeth are not numbered yet (s)
    events: np.ndarray = field(repr=False)

    def gaps(self) -> list[tuple[float, float]]:
        """(last tooth event before the gap, reference event) of every reference event."""
        out = []
        for ref in self.reference_times:
            k = int(np.searchsorted(self.events, ref)) - 1
            if k >= 0 and self.events[k] < ref:
                out.append((float(self.events[k]), float(ref)))
        return out


@dataclass(frozen=True)
class Preview:
    """A stretch of one channel, ready to draw."""

    path: str
    channel: str
    #: what the channel looks like ("hall", "vr", "flat", "noise")
    kind: str
    #: first and last time shown (s from the start of the capture)
    start_s: float
    stop_s: float
    #: the samples shown
    samples: np.ndarray = field(repr=False)
    sample_rate: float = 0.0
    crank: CrankMarks | None = None
    #: revolutions shown (nan when the crank was not decoded)
    revolutions: float = math.nan
    notes: tuple[str, ...] = ()

    @property
    def span_s(self) -> float:
        return self.stop_s - self.start_s


def _levels(info: CaptureInfo, window: np.ndarray) -> tuple[ChannelLevels, ...]:
    from toothcomb.decoders.levels import measure_levels

    sub = CaptureInfo(info.path, info.sample_rate, len(window), info.channels, info.format)
    return measure_levels(ArraySource(sub, window))


def _edges(window: np.ndarray, rate: float, levels: ChannelLevels, look: Any, start: int) -> Any:
    from toothcomb.decoders.model import Edges
    from toothcomb.decoders.plugins import FRONTENDS, plugin

    fe = plugin(FRONTENDS, look.kind)(rate, levels, **look.frontend_options)
    return Edges.concat([fe.process(window, start), fe.finish()])


def _find_crank(
    window: np.ndarray,
    info: CaptureInfo,
    first: int,
    looks: dict[int, Any],
    levels: tuple[ChannelLevels, ...],
    crank: int | None,
    wheel: Any,
) -> CrankMarks | None:
    """The crank in the window, decoded as a decode would (None when it does not decode)."""
    from toothcomb.decoders.pipeline import crank_direction
    from toothcomb.decoders.wheels.missing_tooth import decode_teeth, identify

    fs = info.sample_rate
    candidates = [crank] if crank is not None else [c for c, lk in looks.items()
                                                    if lk.kind in ("hall", "vr")]
    best: tuple[int, int, Any, Any, np.ndarray] | None = None
    for c in candidates:
        if looks[c].kind not in ("hall", "vr"):
            continue
        edges = _edges(window[:, c], fs, levels[c], looks[c], first)
        direction, _polarity = crank_direction(edges, looks[c].kind, wheel)
        t = edges.times[edges.direction == direction]
        spec = wheel
        if spec is None:
            guess = identify(t)
            if guess is None or guess.confidence < 0.6 or guess.spec.positions < 8:
                continue
            spec = guess.spec
        if best is None or len(t) > best[0]:
            best = (len(t), c, spec, looks[c].kind, t)
    if best is None:
        return None
    _n, c, spec, kind, t = best
    track = decode_teeth(t, spec)
    if len(track.reference_times) == 0:
        return None
    # mean speed over the teeth followed: pitches turned over the time they took
    runs = [r for r in track.runs if len(r) > 1]
    turned = sum(int(np.sum(track.pitches[r[1:]])) for r in runs) * spec.pitch_deg
    took = sum(float(track.times[r[-1]] - track.times[r[0]]) for r in runs)
    rpm = turned / took / 6.0 if took > 0 else math.nan
    return CrankMarks(
        channel=info.channels[c],
        sensor=kind,
        wheel=spec.name,
        rpm=rpm,
        reference_times=np.asarray(track.reference_times, dtype=float),
        events=np.asarray(t, dtype=float),
    )


def build_preview(
    path: str,
    *,
    channel: str | None = None,
    revs: int = 2,
    start_s: float = 0.0,
    crank: str | None = None,
    wheel: str | None = None,
    sample_rate: float | None = None,
) -> Preview:
    """Read the stretch to show and find the crank in it.

    ``channel`` is drawn (default: the crank when it decodes, else the first channel);
    ``crank`` and ``wheel`` are hints as for a decode. Raises
    :class:`~toothcomb.decoders.errors.UsageError` for a start past the end or a bad channel.
    """
    from toothcomb.decoders.analysis.identify import look_at_channel
    from toothcomb.decoders.readers import open_capture
    from toothcomb.decoders.wheels.missing_tooth import MissingToothWheel

    if revs < 1:
        raise UsageError(f"--revs {revs} shows nothing; give 1 or more revolutions")
    spec = None
    if wheel is not None:
        spec = MissingToothWheel.parse(wheel)
        if spec is None:
            raise UsageError(
                f"wheel {wheel!r} is not in N-M notation; give it like 60-2 or 36-1"
            )
    with open_capture(path, sample_rate=sample_rate) as src:
        info = src.info
        fs = info.sample_rate
        if not 0.0 <= start_s < info.duration_s:
            raise UsageError(
                f"--start {start_s:g} s is outside the capture, which lasts "
                f"{info.duration_s:.6g} s; give a start from 0 up to that"
            )
        shown = info.channel_index(channel) if channel is not None else None
        crank_i = info.channel_index(crank) if crank is not None else None
        first = round(start_s * fs)
        total = info.n_samples
        # the window: from ``lo`` (far enough before the start for the wheel to be in sync
        # there) to ``hi`` (far enough after it for the revolutions asked for); each side
        # doubles until it is, or the capture or MAX_WINDOW_SAMPLES ends it
        back = fwd = max(64, round(FIRST_WINDOW_S * fs))
        notes: list[str] = []
        seen: tuple[int, int] | None = None
        while True:
            fwd = min(fwd, MAX_WINDOW_SAMPLES)  # the part after the start comes first
            back = min(back, MAX_WINDOW_SAMPLES - min(fwd, total - first))
            lo, hi = max(0, first - back), min(total, first + fwd)
            if (lo, hi) == seen:
                break  # it can grow no further
            seen = (lo, hi)
            window = read_span(src, lo, hi)
            levels = _levels(info, window)
            looks = {
                c: look_at_channel(window[:, c], fs, levels[c]) for c in range(info.n_channels)
            }
            marks = _find_crank(window, info, lo, looks, levels, crank_i, spec)
            if marks is None or not marks.rpm > 0:
                back, fwd = 2 * back, 2 * fwd
                continue
            period = 60.0 / marks.rpm
            short_back = lo > 0 and not np.any(marks.reference_times <= start_s)
            short_fwd = hi < total and marks.events[-1] < start_s + revs * period
            if not (short_back or short_fwd):
                break
            back, fwd = (2 * back if short_back else back), (2 * fwd if short_fwd else fwd)
    have_s = (hi - first) / fs  # what the window holds from the start on
    if marks is not None and math.isfinite(marks.rpm) and marks.rpm > 0:
        span = revs * 60.0 / marks.rpm
        if span > have_s:
            span = have_s
            notes.append(
                f"only {span * marks.rpm / 60.0:.1f} of the {revs} revolutions asked for are "
                "in the capture (or in the longest stretch read) after the start"
            )
    else:
        span = min(UNDECODED_SPAN_S, have_s)
        why = "the crank was not found in this stretch" if crank_i is None else (
            f"crank channel {info.channels[crank_i]!r} does not decode in this stretch"
        )
        notes.append(f"{why}; showing {span:g} s without tooth marks")
    if shown is None:
        shown = info.channels.index(marks.channel) if marks is not None else 0
    count = max(2, round(span * fs))
    data = window[first - lo : first - lo + count, shown]
    return Preview(
        path=info.path,
        channel=info.channels[shown],
        kind=looks[shown].kind,
        start_s=first / fs,
        stop_s=(first + len(data)) / fs,
        samples=data,
        sample_rate=fs,
        crank=marks,
        revolutions=span * marks.rpm / 60.0 if marks is not None else math.nan,
        notes=tuple(notes),
    )


# --------------------------------------------------------------------------- drawing


def braille_strip(
    samples: np.ndarray, width: int, height: int, lo: float, hi: float
) -> list[str]:
    """Draw ``samples`` across ``width`` columns and ``height`` rows of Braille characters.

    Each of the ``2 * width`` dot columns covers an equal share of the samples and lights the
    dots from the lowest to the highest of them (and up to where the column before ended, so a
    step draws as a vertical line). ``lo`` maps to the bottom dot row, ``hi`` to the top one.

    >>> braille_strip(np.array([0.0, 1.0]), width=1, height=1, lo=0.0, hi=1.0)
    ['⣸']
    """
    x = np.asarray(samples, dtype=float)
    cols = 2 * width
    rows = 4 * height
    if len(x) == 0:
        return ["\u2800" * width] * height
    edges = np.linspace(0, len(x), cols + 1)
    starts = np.minimum(np.floor(edges[:-1]).astype(int), len(x) - 1)
    stops = np.maximum(np.ceil(edges[1:]).astype(int), starts + 1)
    scale = (rows - 1) / (hi - lo) if hi > lo else 0.0

    def row(v: np.ndarray) -> np.ndarray:
        return np.clip(np.rint((hi - v) * scale), 0, rows - 1).astype(int)

    grid = np.zeros((rows, cols), dtype=bool)
    prev_last: float | None = None
    for j in range(cols):
        piece = x[starts[j] : stops[j]]
        top, bottom = float(np.max(piece)), float(np.min(piece))
        if prev_last is not None:
            top, bottom = max(top, prev_last), min(bottom, prev_last)
        r0, r1 = row(np.array([top, bottom]))
        grid[r0 : r1 + 1, j] = True
        prev_last = float(piece[-1])
    out = []
    for r in range(height):
        chars = []
        for c in range(width):
            bits = 0
            for dr in range(4):
                for dc in range(2):
                    if grid[4 * r + dr, 2 * c + dc]:
                        bits |= BRAILLE_BITS[dr][dc]
            chars.append(chr(BRAILLE_BASE + bits))
        out.append("".join(chars))
    return out


def column_of(t: float, start_s: float, span_s: float, width: int) -> int | None:
    """The column time ``t`` falls in, None outside the strip.

    >>> column_of(0.5, 0.0, 1.0, 100), column_of(1.0, 0.0, 1.0, 100)
    (50, None)
    """
    if span_s <= 0 or not start_s <= t < start_s + span_s:
        return None
    return min(width - 1, int((t - start_s) / span_s * width))


def mark_row(preview: Preview, width: int) -> tuple[str, bool]:
    """The row of marks under the strip, and whether teeth are marked (they are when at least
    two columns apart)."""
    cells = [" "] * width
    marks = preview.crank
    if marks is None:
        return "".join(cells), False
    s, span = preview.start_s, preview.span_s
    for a, b in marks.gaps():
        ca = column_of(a, s, span, width)
        cb = column_of(b, s, span, width)
        lo = 0 if ca is None and a < s else (ca + 1 if ca is not None else None)
        hi = width if cb is None and b >= s + span else cb
        if lo is None or hi is None:
            continue
        for k in range(max(0, lo), min(width, hi)):
            cells[k] = MARK_GAP
    inside = (marks.events >= s) & (marks.events < s + span)
    n_teeth = int(np.count_nonzero(inside))
    teeth = n_teeth > 0 and width / n_teeth >= 2.0
    if teeth:
        for t in marks.events[inside]:
            k = column_of(float(t), s, span, width)
            if k is not None:
                cells[k] = MARK_TOOTH
    for t in marks.reference_times:
        k = column_of(float(t), s, span, width)
        if k is not None:
            cells[k] = MARK_REFERENCE
    return "".join(cells), teeth


def axis_row(start_s: float, stop_s: float, width: int) -> str:
    """Times at the left end, the middle and the right end of the strip.

    >>> axis_row(0.0, 0.08, 40)
    '0 s              0.04 s           0.08 s'
    """
    left = f"{start_s:.6g} s"
    mid = f"{(start_s + stop_s) / 2:.6g} s"
    right = f"{stop_s:.6g} s"
    cells = [" "] * width
    for k, ch in enumerate(left[:width]):
        cells[k] = ch
    m0 = width // 2 - len(mid) // 2
    if m0 > len(left) and m0 + len(mid) < width - len(right):
        for k, ch in enumerate(mid):
            cells[m0 + k] = ch
    r0 = width - len(right)
    if r0 > len(left):
        for k, ch in enumerate(right):
            cells[r0 + k] = ch
    return "".join(cells)


def render_preview(preview: Preview, console: Console, height: int = 4) -> None:
    """Print the preview: a title line, ``height`` rows of strip, the marks, the time axis and a
    legend, each at the console's width."""
    width = console.width
    x = preview.samples
    lo, hi = (float(np.min(x)), float(np.max(x))) if len(x) else (0.0, 1.0)
    title = Text(f"{preview.channel}: {preview.kind}", style="bold")
    c = preview.crank
    if c is not None:
        who = "" if c.channel == preview.channel else f"crank {c.channel}: {c.sensor} "
        title.append(f"  {who}{c.wheel} wheel, {c.rpm:.0f} rpm")
    revs = "" if math.isnan(preview.revolutions) else f", {preview.revolutions:.1f} rev"
    title.append(f"  {preview.start_s:.6g}..{preview.stop_s:.6g} s{revs}")
    console.print(title, overflow="crop", no_wrap=True)
    for line in braille_strip(x, width, height, lo, hi):
        console.print(Text(line, style="cyan"), overflow="crop", no_wrap=True)
    marks, teeth = mark_row(preview, width)
    console.print(Text(marks, style="yellow"), overflow="crop", no_wrap=True)
    console.print(Text(axis_row(preview.start_s, preview.stop_s, width), style="dim"),
                  overflow="crop", no_wrap=True)
    legend = f"range {lo:.4g}..{hi:.4g}"
    if preview.crank is not None:
        legend += f"   {MARK_REFERENCE} reference (tooth 1)   {MARK_GAP} gap"
        legend += (
            f"   {MARK_TOOTH} tooth" if teeth else "   (teeth too close to mark: fewer --revs)"
        )
    console.print(Text(legend, style="dim"), overflow="fold")
    for note in preview.notes:
        console.print(Text(note, style="dim"), overflow="fold")


# --------------------------------------------------------------------------- command


_revs = checked(
    int, "a whole number", "e.g. 2", lambda v: 1 <= v <= 50, "{text} revolutions is outside 1..50"
)


_start = checked(
    float, "a time", "seconds, e.g. 1.5", lambda v: math.isfinite(v) and v >= 0,
    "{text} must be 0 or more seconds",
)


_height = checked(
    int, "a whole number", "e.g. 4", lambda v: 1 <= v <= 20, "{text} rows is outside 1..20"
)


def add_preview_parser(
    sub: Any, formatter: type[argparse.HelpFormatter], exit_codes: str
) -> None:
    """Add the ``preview`` command to the subparsers ``sub``."""
    from .main import CH_HELP, _para, _positive_float, _width

    p = sub.add_parser(
        "preview",
        help="draw a few revolutions of a channel in the terminal",
        description=_para(
            "Draw a few crank revolutions of one channel as a strip of Braille characters, with "
            "the crank reference events, the gap and the teeth marked under it when the crank "
            "decodes there. Only that stretch is held in memory."
        ),
        epilog=EXAMPLES + "\n\n" + exit_codes,
        formatter_class=formatter,
    )
    p.add_argument("capture", metavar="CAPTURE", help="capture file (.csv, .wav, .flac, .h5, .vcd)")
    p.add_argument("--channel", metavar="CH", help=f"channel to draw: {CH_HELP} (default: crank)")
    p.add_argument("--revs", type=_revs, default=2, metavar="N",
                   help="crank revolutions to show (default: %(default)s)")
    p.add_argument("--start", type=_start, default=0.0, metavar="S",
                   help="seconds from the start of the capture (default: 0)")
    p.add_argument("--crank", metavar="CH", help=f"crank channel: {CH_HELP}")
    p.add_argument("--wheel", metavar="N-M", help="crank wheel, e.g. 60-2")
    p.add_argument("--sample-rate", type=_positive_float, metavar="HZ",
                   help="sample rate for files that carry none")
    p.add_argument("--height", type=_height, default=4, metavar="ROWS",
                   help="rows of the strip (default: %(default)s)")
    p.add_argument("--width", type=_width, metavar="COLS",
                   help="width in columns (default: terminal)")
    p.set_defaults(run=run_preview)


def run_preview(args: argparse.Namespace, streams: Streams) -> int:
    """``toothcomb preview``: draw the stretch and exit 0."""
    from .main import _check_capture, make_console

    _check_capture(args.capture)
    preview = build_preview(
        args.capture,
        channel=args.channel,
        revs=args.revs,
        start_s=args.start,
        crank=args.crank,
        wheel=args.wheel,
        sample_rate=args.sample_rate,
    )
    render_preview(preview, make_console(streams.out, args.width), height=args.height)
    return 0


__all__: Sequence[str] = (
    "CrankMarks",
    "Preview",
    "add_preview_parser",
    "axis_row",
    "braille_strip",
    "build_preview",
    "column_of",
    "mark_row",
    "render_preview",
    "run_preview",
)
