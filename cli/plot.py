"""Pictures of a decode (optional: needs matplotlib, imported only when a plot is asked for).

Five kinds of plot, each drawn as a panel of one figure:

- ``waveform``: the crank and cam signals over a short span (about two revolutions around the
  first crank reference event, or ``--plot-span START:END``). The span is read from the capture
  again -- only up to its end, never the whole file -- and the crank front end and wheel decoder
  are run again on it, so every marked tooth is a tooth event found in those very samples; the
  gaps are the stretches from the last tooth before a gap to tooth 1. The reference events
  (numbered ``R1``, ``R2``, ... as in the decode's list) and the cam events (marked and labelled
  by edge, ``E1``, ``E2``, ... as in the legend) are the decode's own.
- ``speed``: engine speed per tooth against time, with every reference event.
- ``strip``: the 720 deg cycle, one row per cam: where each edge is expected (after
  ``--against``) and where it was measured, coloured and shaped by its status, an edge off by
  whole teeth in its own colour and marker.
- ``phase``: each cam's phase against time (the phaser trace), moves shaded, holds drawn at
  their level, a hunting hold in its own colour and line style.
- ``jitter``: a histogram per cam edge of its angle minus the local trend -- the same residuals
  the report's jitter figures come from.

``all`` draws every kind that has something to show (``phase`` only when a phaser moved or
hunted). Colours and markers come from :mod:`toothcomb.cli.style`. Drawing uses matplotlib's Agg
canvas directly (no pyplot, no global backend switch), and the file is written atomically.

>>> parse_kinds("strip,phase"), parse_span("0.5:0.75")
(('strip', 'phase'), PlotSpan(start_s=0.5, end_s=0.75))
"""

from __future__ import annotations

import io
import math
import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
from toothcomb.decoders.errors import CaptureError, UsageError
from toothcomb.decoders.model import CaptureInfo
from toothcomb.decoders.readers.memory import ArraySource, read_span
from toothcomb.decoders.result import CamEdge, CamResult, DecodeResult
from toothcomb.decoders.savgol import savgol_filter

from . import style
from .output import write_atomic
from .report import edge_label, fmt_deg, fmt_rpm

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure, SubFigure

#: file suffixes a plot can be written as, and the matplotlib format for each
FORMATS: dict[str, str] = {
    ".png": "png",  # raster, the default
    ".svg": "svg",  # vector, for documents and browsers
    ".pdf": "pdf",  # vector, for printing
}

MISSING_MATPLOTLIB = "plots need matplotlib: pip install 'toothcomb[plot]'"

#: the kinds of plot, in the order a figure stacks them
KINDS: tuple[str, ...] = ("waveform", "speed", "strip", "phase", "jitter")
#: what each kind shows (for --help and the README)
KIND_WORDS: dict[str, str] = {
    "waveform": "crank and cam signals over a span, teeth, gaps, reference and cam events",
    "speed": "engine speed per tooth with the reference events",
    "strip": "the 720 deg cycle: expected and measured cam edges, off-by-teeth marked",
    "phase": "each cam's phase against time, moves and holds",
    "jitter": "a histogram per cam edge of its angle around the local trend",
}
ALL = "all"

#: figure width, inches
WIDTH_IN = 10.0
#: height of each kind's panel, inches: fixed part + part per row (channel, cam, histogram row)
HEIGHT_IN: dict[str, tuple[float, float]] = {
    "waveform": (0.8, 1.5),
    "speed": (2.6, 0.0),
    "strip": (1.3, 0.8),
    "phase": (0.6, 2.0),
    "jitter": (0.6, 1.9),
}
#: histograms per row in the jitter panel
JITTER_COLUMNS = 4
#: the default waveform span: revolutions shown around the first reference event
SPAN_REVS = 2.0
#: revolutions read before the span so the wheel decoder has found a gap when the span starts
LEAD_REVS = 1.5
#: the longest span that can be drawn, samples per channel (bounds memory)
MAX_SPAN_SAMPLES = 1 << 21
#: samples drawn per channel at most; longer spans are drawn as their min/max envelope
MAX_DRAWN_POINTS = 20_000
#: the jitter trend: a local quadratic over 2 * 4 + 1 occurrences, as ``analysis.jitter``
JITTER_HALF_WINDOW = 4


# --------------------------------------------------------------------------- options


def require_matplotlib() -> None:
    """Raise :class:`UsageError` when matplotlib cannot be imported (checked before a decode,
    so a long decode is not wasted)."""
    try:
        import matplotlib  # noqa: F401
    except ImportError as exc:
        raise UsageError(MISSING_MATPLOTLIB) from exc


def plot_format(path: str | os.PathLike[str]) -> str:
    """The matplotlib format for ``path`` from its suffix; a clear error for others.

    >>> plot_format("run.PNG"), plot_format("a/b.svg")
    ('png', 'svg')
    >>> try:
    ...     plot_format("run.jpg")
    ... except UsageError as e:
    ...     print(e)
    plot file 'run.jpg' has the suffix '.jpg'; use .png, .svg or .pdf
    """
    suffix = Path(path).suffix.lower()
    if suffix not in FORMATS:
        names = ", ".join(FORMATS)
        names = names[: names.rfind(",")] + " or" + names[names.rfind(",") + 1 :]
        shown = suffix or "(none)"
        raise UsageError(f"plot file {str(path)!r} has the suffix {shown!r}; use {names}")
    return FORMATS[suffix]


def parse_kinds(text: str) -> tuple[str, ...]:
    """The plot kinds named in ``text`` (comma-separated), in the order given; ``all`` alone.

    >>> parse_kinds("all"), parse_kinds(" Jitter, strip ")
    (('all',), ('jitter', 'strip'))
    >>> try:
    ...     parse_kinds("wave")
    ... except UsageError as e:
    ...     print(e)
    plot kind 'wave' is not known; choose from waveform, speed, strip, phase, jitter or all
    """
    names = [p.strip().lower() for p in str(text).split(",")]
    choices = ", ".join(KINDS) + f" or {ALL}"
    for name in names:
        if name not in (*KINDS, ALL):
            raise UsageError(f"plot kind {name!r} is not known; choose from {choices}")
    if ALL in names:
        if len(names) > 1:
            raise UsageError(f"plot kind {text!r} names 'all' with others; give 'all' alone")
        return (ALL,)
    out: list[str] = []
    for name in names:
        if name not in out:
            out.append(name)
    return tuple(out)


@dataclass(frozen=True)
class PlotSpan:
    """A stretch of the capture to draw the waveforms of, seconds from its first sample."""

    start_s: float
    end_s: float

    @property
    def length_s(self) -> float:
        return self.end_s - self.start_s


def parse_span(text: str) -> PlotSpan:
    """``START:END`` in seconds as a :class:`PlotSpan`.

    >>> parse_span("1:1.25").length_s
    0.25
    >>> try:
    ...     parse_span("2:1")
    ... except UsageError as e:
    ...     print(e)
    plot span '2:1' ends before it starts; give START:END with START < END, e.g. 0.5:0.7
    """
    start, sep, end = str(text).partition(":")
    try:
        if not sep:
            raise ValueError
        a, b = float(start), float(end)
    except ValueError:
        raise UsageError(
            f"plot span {text!r} is not START:END in seconds; give it like 0.5:0.7"
        ) from None
    if not (math.isfinite(a) and math.isfinite(b)) or a < 0:
        raise UsageError(
            f"plot span {text!r} must be two finite times from 0 on; give it like 0.5:0.7"
        )
    if not b > a:
        raise UsageError(
            f"plot span {text!r} ends before it starts; give START:END with START < END, "
            "e.g. 0.5:0.7"
        )
    return PlotSpan(a, b)


def resolve_kinds(result: DecodeResult, kinds: Sequence[str] | None = None) -> tuple[str, ...]:
    """The kinds to draw: as given, or for ``all`` (None) every kind with something to show --
    ``phase`` only when some cam's phaser moved or hunted, or its valve command was recorded."""
    if kinds is None or tuple(kinds) == (ALL,):
        moved = any(
            (c.phaser is not None and not c.phaser.parked and c.phaser.time_s)
            or c.actuator is not None
            for c in result.cams
        )
        return tuple(k for k in KINDS if k != "phase" or moved)
    for k in kinds:
        if k not in KINDS:
            parse_kinds(k)  # raises the usual sentence
    return tuple(kinds)


# --------------------------------------------------------------------------- the waveform span


def default_span(result: DecodeResult) -> PlotSpan:
    """About two revolutions from a quarter revolution before the first reference event (so
    its gap shows), kept inside the capture."""
    duration = result.capture.duration_s
    rev = _revolution_s(result)
    refs = result.crank.reference_times_s
    want = min(duration, SPAN_REVS * rev)
    start = max(0.0, refs[0] - 0.25 * rev) if refs else 0.0
    end = min(duration, start + want)
    start = max(0.0, end - want)
    return PlotSpan(start, end)


def _revolution_s(result: DecodeResult) -> float:
    refs = np.asarray(result.crank.reference_times_s, dtype=float)
    if refs.size >= 2:
        return float(np.median(np.diff(refs[: min(refs.size, 6)])))
    rpm = result.crank.rpm.mean
    if math.isfinite(rpm) and rpm > 0:
        return 60.0 / rpm
    return min(0.2, result.capture.duration_s / 2.0)


def check_span(result: DecodeResult, span: PlotSpan) -> PlotSpan:
    """``span`` checked against the capture's length and the drawing limit."""
    info = result.capture
    shown = f"{span.start_s:g}:{span.end_s:g}"
    if span.start_s >= info.duration_s or span.end_s > info.duration_s * (1 + 1e-9):
        raise UsageError(
            f"plot span {shown} reaches past the end of {info.path}, which lasts "
            f"{info.duration_s:.6g} s; give START:END within 0:{info.duration_s:.6g}"
        )
    samples = span.length_s * info.sample_rate
    if samples > MAX_SPAN_SAMPLES:
        longest = MAX_SPAN_SAMPLES / info.sample_rate
        raise UsageError(
            f"plot span {shown} holds {samples:,.0f} samples per channel; at most "
            f"{MAX_SPAN_SAMPLES:,} can be drawn, so give a span of {longest:.6g} s or less"
        )
    return span


@dataclass(frozen=True)
class Waveforms:
    """The samples of a span and the crank teeth found again in them."""

    span: PlotSpan
    #: time of each sample drawn, s
    time_s: np.ndarray = field(repr=False)
    #: channel name -> its samples over the span
    samples: dict[str, np.ndarray] = field(repr=False)
    #: unit of each channel when the file says ("V"), else ""
    units: dict[str, str] = field(repr=False)
    #: crank tooth events inside the span (s) and their tooth numbers (1 = reference event)
    tooth_times: np.ndarray = field(repr=False)
    tooth_numbers: np.ndarray = field(repr=False)
    #: crank events inside the span before the wheel decoder found its first gap: teeth whose
    #: number is not known yet (the decode does not use them either)
    unsynced_times: np.ndarray = field(repr=False, default_factory=lambda: np.empty(0))
    #: (last tooth before the gap, tooth 1) of every gap that touches the span
    gaps: tuple[tuple[float, float], ...] = ()
    #: why there are no tooth marks, when there are none
    note: str = ""


def _find_teeth(
    result: DecodeResult, window: np.ndarray, first: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[tuple[float, float]], str]:
    """Run the crank front end and wheel decoder again on ``window`` (the crank's samples from
    sample ``first``): tooth times, tooth numbers, the events before the first gap, gaps, and
    a note when that fails."""
    from toothcomb.decoders.analysis.identify import look_at_channel
    from toothcomb.decoders.levels import measure_levels
    from toothcomb.decoders.model import Edges
    from toothcomb.decoders.plugins import FRONTENDS, plugin
    from toothcomb.decoders.wheels.missing_tooth import MissingToothSpec
    from toothcomb.decoders.wheels.pattern import PatternSpec, decode_any, steps_from_teeth

    crank = result.crank
    fs = result.capture.sample_rate
    empty = np.empty(0)
    spec: MissingToothSpec | PatternSpec
    try:
        if crank.is_missing_tooth:
            spec = MissingToothSpec(crank.positions, crank.missing)
        else:
            positions, steps = steps_from_teeth(crank.teeth_deg)
            spec = PatternSpec(crank.wheel, positions, steps)
    except UsageError:
        why = f"teeth not marked: wheel {crank.wheel} cannot be drawn again"
        return empty, empty.astype(int), empty, [], why
    info = CaptureInfo(result.capture.path, fs, len(window), (crank.channel,), "samples")
    levels = measure_levels(ArraySource(info, window[:, None]))[0]
    look = look_at_channel(window, fs, levels, hint=crank.sensor)
    frontend = plugin(FRONTENDS, crank.sensor)(fs, levels, **look.frontend_options)
    edges = Edges.concat([frontend.process(window, first), frontend.finish()])
    direction = 1 if crank.event_direction == "rising" else -1
    events = edges.times[edges.direction == direction]
    track = decode_any(events, spec)
    if len(track.reference_times) == 0:
        return empty, empty.astype(int), events, [], "teeth not marked: the wheel did not decode"
    gaps = []
    for k in np.flatnonzero(track.tooth == 1):
        if k > 0 and track.tooth[k - 1] == spec.teeth and track.run[k - 1] == track.run[k]:
            gaps.append((float(track.times[k - 1]), float(track.times[k])))
        elif k == 0:
            # the first gap: it starts at the event before tooth 1, not yet a numbered tooth
            before = events[events < track.times[0]]
            if before.size:
                gaps.append((float(before[-1]), float(track.times[0])))
    unsynced = events[events < track.times[0] - 1e-9]
    return np.asarray(track.times), np.asarray(track.tooth, dtype=int), unsynced, gaps, ""


def read_waveforms(result: DecodeResult, span: PlotSpan | None = None) -> Waveforms:
    """Read ``span`` (default :func:`default_span`) of the capture the result came from, with
    a lead-in of a revolution and a half so the crank teeth can be found again from the first
    sample of the span. Only the blocks up to the span's end are read.

    Raises :class:`UsageError` for a span outside the capture or too long to draw, and
    :class:`CaptureError` when the capture cannot be read or has changed since the decode.
    """
    from toothcomb.decoders.readers import open_capture

    span = check_span(result, span if span is not None else default_span(result))
    cap = result.capture
    fs = cap.sample_rate
    names = [result.crank.channel] + [c.channel for c in result.cams]
    names = list(dict.fromkeys(names))
    first = math.floor(span.start_s * fs)
    stop = min(cap.n_samples, math.ceil(span.end_s * fs) + 1)
    rev = _revolution_s(result)
    lead = round(LEAD_REVS * rev * fs)
    tail = round(0.25 * rev * fs)
    a = max(0, first - lead)
    b = min(cap.n_samples, stop + tail)
    with open_capture(cap.path, sample_rate=fs) as src:
        info = src.info
        if info.n_samples != cap.n_samples or tuple(info.channels) != tuple(cap.channels):
            raise CaptureError(
                f"{cap.path} has changed since it was decoded ({info.n_samples} samples, "
                f"channels {', '.join(info.channels)}); decode it again before plotting"
            )
        cols = [info.channel_index(n) for n in names]
        window = read_span(src, a, b, int(min(1 << 16, max(4096, b - a))))[:, cols]
    crank_col = window[:, 0]
    times, numbers, unsynced, gaps, note = _find_teeth(result, crank_col, a)
    inside = (times >= span.start_s) & (times <= span.end_s)
    early = unsynced[(unsynced >= span.start_s) & (unsynced <= span.end_s)]
    units = {
        n: (info.units[c] if c < len(info.units) else "") for n, c in zip(names, cols, strict=True)
    }
    return Waveforms(
        span=span,
        time_s=np.arange(first, stop) / fs,
        samples={n: window[first - a : stop - a, i] for i, n in enumerate(names)},
        units=units,
        tooth_times=times[inside],
        tooth_numbers=numbers[inside],
        unsynced_times=early,
        gaps=tuple(g for g in gaps if g[1] >= span.start_s and g[0] <= span.end_s),
        note=note or ("" if inside.any() else "no crank tooth in this span"),
    )


def envelope(t: np.ndarray, y: np.ndarray, points: int = MAX_DRAWN_POINTS):
    """``(t, y)`` as at most ``points`` points: unchanged when short, else the minimum and
    maximum of each of ``points // 2`` bins (so every peak still shows).

    >>> t, y = envelope(np.arange(10.0), np.arange(10.0) % 3, points=4)
    >>> y.tolist()
    [0.0, 2.0, 0.0, 2.0]
    """
    n = len(y)
    if n <= points:
        return t, y
    bins = max(1, points // 2)
    edges = np.linspace(0, n, bins + 1).astype(int)
    lo = np.minimum.reduceat(y, edges[:-1])
    hi = np.maximum.reduceat(y, edges[:-1])
    tt = np.repeat(t[edges[:-1]], 2)
    yy = np.column_stack((lo, hi)).ravel()
    return tt, yy


# --------------------------------------------------------------------------- jitter residuals


def jitter_residuals(edge: CamEdge) -> np.ndarray | None:
    """Each occurrence's angle minus the edge's local trend, deg CA (None below 3 events).

    The trend is the one ``analysis.jitter.edge_jitter`` removes -- a local quadratic
    (Savitzky-Golay) over 9 occurrences, the mean below 5 -- on the angles unwrapped around the
    edge's mean, so the histogram shows the same residuals the jitter figures are made of.

    >>> from toothcomb.decoders.result import AngleStats
    >>> ev = tuple((0.1 * i, (359.9 + 0.1 * (i % 2)) % 360) for i in range(4))
    >>> e = CamEdge("leading", "rising", AngleStats(359.95, 0.05, 359.9, 0.0, 4), 0, ev)
    >>> np.round(jitter_residuals(e), 3).tolist()
    [-0.05, 0.05, -0.05, 0.05]
    """
    if len(edge.events) < 3:
        return None
    a = np.asarray(edge.events, dtype=float).reshape(-1, 2)[:, 1]
    mean = edge.angle.mean
    if not math.isfinite(mean):
        mean = float(np.degrees(np.angle(np.mean(np.exp(1j * np.radians(a))))))
    unwrapped = mean + ((a - mean + 180.0) % 360.0 - 180.0)
    n = len(a)
    w = 2 * JITTER_HALF_WINDOW + 1
    if n < w:
        w = n if n % 2 else n - 1
    trend = savgol_filter(unwrapped, w, 2) if w >= 5 else np.full(n, unwrapped.mean())
    return unwrapped - trend


# --------------------------------------------------------------------------- drawing


def _rows(kind: str, result: DecodeResult) -> int:
    """Rows of a kind's panel: channels, cams or histogram rows."""
    if kind == "waveform":
        return len(dict.fromkeys([result.crank.channel] + [c.channel for c in result.cams]))
    if kind == "strip":
        return max(1, sum(1 for c in result.cams if c.edges))
    if kind == "phase":
        return max(1, sum(1 for c in result.cams if c.phaser is not None and c.phaser.time_s))
    if kind == "jitter":
        n = sum(len(c.edges) for c in result.cams)
        return max(1, math.ceil(n / JITTER_COLUMNS))
    return 1


def panel_height(kind: str, result: DecodeResult) -> float:
    """Height of a kind's panel in inches (the figure is :data:`WIDTH_IN` wide)."""
    fixed, per_row = HEIGHT_IN[kind]
    return fixed + per_row * _rows(kind, result)


def panel_axes(fig: Figure, kind: str) -> list[Axes]:
    """The axes of one kind's panel (each axes is labelled ``KIND:...``)."""
    return [ax for ax in fig.axes if ax.get_label().split(":")[0] == kind]


def _say(ax: Axes, text: str) -> None:
    ax.text(0.5, 0.5, text, transform=ax.transAxes, ha="center", va="center", gid="note")


def _panel_title(sf: SubFigure, text: str) -> None:
    sf.suptitle(text, x=0.01, ha="left", fontsize="medium", fontweight="bold")


def _edge_name(cam: CamResult, i: int) -> str:
    return f"{cam.channel} E{i + 1}"


def _draw_waveform(sf: SubFigure, result: DecodeResult, span: PlotSpan | None, quiet: bool):
    names = list(dict.fromkeys([result.crank.channel] + [c.channel for c in result.cams]))
    axes = sf.subplots(len(names), 1, sharex=True, squeeze=False)[:, 0]
    for ax, name in zip(axes, names, strict=True):
        ax.set_label(f"waveform:{name}")
    try:
        wf = read_waveforms(result, span)
    except (UsageError, CaptureError) as exc:
        if not quiet:
            raise
        _panel_title(sf, "signals: the capture could not be read again")
        _say(axes[0], f"not drawn: {exc}")
        return
    crank = result.crank
    _panel_title(
        sf,
        f"signals {wf.span.start_s:.4f}-{wf.span.end_s:.4f} s: crank teeth found again in "
        "these samples, reference events (R) and cam events (E) as decoded",
    )
    refs = np.asarray(crank.reference_times_s, dtype=float)
    ref_in = np.flatnonzero((refs >= wf.span.start_s) & (refs <= wf.span.end_s))
    for ax, name in zip(axes, names, strict=True):
        t, y = envelope(wf.time_s, wf.samples[name])
        ax.plot(t, y, color=style.CRANK.color, lw=0.7, gid=f"signal-{name}", label="_signal")
        unit = wf.units.get(name) or "signal"
        ax.set_ylabel(f"{name}\n({unit})", fontsize="small")
        ax.grid(True, color=style.GRID, alpha=0.5, lw=0.5)
        for k in ref_in:
            ax.axvline(
                refs[k],
                color=style.REFERENCE.color,
                ls=style.REFERENCE.linestyle,
                lw=1.0,
                gid=f"reference-line-R{k + 1}",
                label="_reference",
            )
    ax0 = axes[0]
    trans = ax0.get_xaxis_transform()
    y_all = wf.samples[names[0]]
    if wf.tooth_times.size:
        ax0.plot(
            wf.tooth_times,
            np.interp(wf.tooth_times, wf.time_s, y_all),
            linestyle="none",
            marker=style.CRANK.marker,
            markersize=style.CRANK.markersize,
            color=style.CRANK.color,
            markerfacecolor="white",
            gid="teeth",
            label=f"tooth events ({wf.tooth_times.size})",
        )
    if wf.unsynced_times.size:
        ax0.plot(
            wf.unsynced_times,
            np.interp(wf.unsynced_times, wf.time_s, y_all),
            linestyle="none",
            marker=style.UNSYNCED.marker,
            markersize=style.UNSYNCED.markersize,
            color=style.UNSYNCED.color,
            gid="teeth-before-sync",
            label=f"before the first gap, not numbered ({wf.unsynced_times.size})",
        )
    for j, (g0, g1) in enumerate(wf.gaps):
        ax0.axvspan(
            max(g0, wf.span.start_s),
            min(g1, wf.span.end_s),
            facecolor=style.GAP.color,
            edgecolor=style.GAP.color,
            alpha=0.3,
            hatch=style.GAP_HATCH,
            gid=f"gap-{j + 1}",
            label="gap" if j == 0 else "_gap",
        )
    for k in ref_in:
        ax0.text(
            refs[k],
            1.01,
            f"R{k + 1}",
            transform=trans,
            ha="center",
            va="bottom",
            color=style.REFERENCE.color,
            fontsize="small",
            fontweight="bold",
            gid=f"reference-R{k + 1}",
        )
    if ref_in.size:
        ax0.plot(
            [],
            [],
            color=style.REFERENCE.color,
            ls=style.REFERENCE.linestyle,
            label="reference event (tooth 1), "
            + ("Hall leading flank" if crank.sensor == "hall" else "VR tooth centre"),
        )
    if wf.note:
        ax0.text(0.01, 0.04, wf.note, transform=ax0.transAxes, fontsize="small", gid="note")
    ax0.legend(loc="upper left", bbox_to_anchor=(1.005, 1.0), fontsize="small")
    for ax, name in zip(axes[1:], names[1:], strict=True):
        cam = next(c for c in result.cams if c.channel == name)
        y = wf.samples[name]
        for i, edge in enumerate(cam.edges):
            ev = np.asarray(edge.events, dtype=float).reshape(-1, 2)
            te = ev[(ev[:, 0] >= wf.span.start_s) & (ev[:, 0] <= wf.span.end_s), 0]
            look = style.series_style(i)
            label = f"E{i + 1} {edge_label(edge)}, {edge.direction}, {fmt_deg(edge.angle.mean)}"
            ax.plot(
                te,
                np.interp(te, wf.time_s, y),
                linestyle="none",
                marker=look.marker,
                markersize=7,
                color=look.color,
                markerfacecolor="white" if look.hollow else look.color,
                gid=f"cam-{_edge_name(cam, i).replace(' ', '-')}",
                label=label,
            )
            for tt in te:
                ax.annotate(
                    f"E{i + 1}",
                    (tt, float(np.interp(tt, wf.time_s, y))),
                    xytext=(0, 6),
                    textcoords="offset points",
                    ha="center",
                    fontsize="x-small",
                    color=look.color,
                    gid=f"cam-label-{name}-E{i + 1}",
                )
        if cam.edges:
            ax.legend(loc="upper left", bbox_to_anchor=(1.005, 1.0), fontsize="x-small")
    axes[-1].set_xlabel("time (s)")
    axes[-1].set_xlim(wf.span.start_s, wf.span.end_s)


def _draw_speed(sf: SubFigure, result: DecodeResult) -> None:
    crank = result.crank
    ax = sf.subplots()
    ax.set_label("speed:crank")
    _panel_title(sf, "crank: engine speed per tooth")
    if crank.rpm_trace:
        trace = np.asarray(crank.rpm_trace, dtype=float).reshape(-1, 2)
        ax.plot(
            trace[:, 0],
            trace[:, 1],
            lw=0.9,
            color=style.SERIES[0].color,
            gid="speed",
            label="speed per tooth",
        )
    else:
        _say(ax, "no speed trace")
    refs = np.asarray(crank.reference_times_s, dtype=float)
    if refs.size:
        ax.plot(
            refs,
            np.full(refs.size, 0.03),
            linestyle="none",
            marker=style.REFERENCE.marker,
            markersize=style.REFERENCE.markersize,
            color=style.REFERENCE.color,
            transform=ax.get_xaxis_transform(),
            gid="reference-events",
            label=f"reference events (tooth 1), {refs.size}",
        )
    ax.set_ylabel("engine speed (rpm)")
    ax.set_xlabel("time (s)")
    ax.grid(True, color=style.GRID, alpha=0.5, lw=0.5)
    ax.legend(loc="upper right", fontsize="small")


def _strip_x(angle: float, revolution: int | None) -> list[float]:
    """Where an angle after the reference event goes on the 720 deg strip (both revolutions
    when the revolution is not known)."""
    if revolution is None:
        return [angle % 360.0, angle % 360.0 + 360.0]
    return [revolution * 360.0 + angle % 360.0]


def edge_status(edge: CamEdge) -> str:
    """The edge's status against its expected position, ``measured`` when not compared."""
    return edge.comparison.status if edge.comparison is not None else "measured"


def _draw_strip(sf: SubFigure, result: DecodeResult) -> None:
    from matplotlib.lines import Line2D

    ax = sf.subplots()
    ax.set_label("strip:cycle")
    cams = [c for c in result.cams if c.edges]
    verdict = result.verdict
    head = "cam edges on the 720 deg cycle"
    if verdict is not None:
        head += (
            f": expected (bar) against measured, profile {verdict.profile_name}, "
            f"tolerance +-{verdict.tolerance_deg:g} deg CA"
        )
    else:
        head += ": measured (compare with --against to see where they belong)"
    _panel_title(sf, head)
    seen: set[str] = set()
    any_expected = False
    unknown_rev = False
    for row, cam in enumerate(cams):
        y = -row
        for i, edge in enumerate(cam.edges):
            status = edge_status(edge)
            look = style.STATUS.get(status, style.STATUS["drifted"])
            seen.add(status)
            name = _edge_name(cam, i).replace(" ", "-")
            xs = _strip_x(edge.angle.mean, edge.revolution)
            unknown_rev = unknown_rev or edge.revolution is None
            comp = edge.comparison
            if comp is not None:
                any_expected = True
                xe = _strip_x(comp.expected_deg, comp.expected_revolution)
                ax.plot(
                    xe,
                    [y] * len(xe),
                    linestyle="none",
                    marker=style.EXPECTED.marker,
                    markersize=style.EXPECTED.markersize,
                    markeredgewidth=2.0,
                    color=style.EXPECTED.color,
                    gid=f"expected-{name}",
                    label="_expected",
                )
                # measured = expected + deviation, drawn from the expected bar
                xs = [x + comp.deviation_deg for x in xe]
                for x0, x1 in zip(xe, xs, strict=True):
                    if abs(x1 - x0) > 0.5:
                        ax.annotate(
                            "",
                            xy=(x1, y),
                            xytext=(x0, y),
                            arrowprops={"arrowstyle": "->", "color": look.color, "lw": 1.2},
                        )
            ax.plot(
                xs,
                [y] * len(xs),
                linestyle="none",
                marker=look.marker,
                markersize=look.markersize,
                color=look.color,
                markeredgecolor="black",
                markeredgewidth=0.6,
                gid=f"edge-{name}",
                label="_edge",
            )
            lift = 0.18 if i % 2 == 0 else 0.36  # neighbouring edges' labels stay apart
            for x in xs:
                ax.text(
                    x,
                    y + lift,
                    f"E{i + 1}",
                    ha="center",
                    va="bottom",
                    fontsize="x-small",
                    gid=f"edge-label-{name}",
                )
                if comp is not None and comp.off_by_teeth is not None:
                    ax.text(
                        x,
                        y - 0.16 - (0.0 if i % 2 == 0 else 0.14),
                        f"{comp.off_by_teeth:+d}",
                        ha="center",
                        va="top",
                        fontsize="x-small",
                        color=look.color,
                        fontweight="bold",
                        gid=f"off-by-teeth-{name}",
                    )
        sentence = next(
            (c.sentence for c in (verdict.cams if verdict else ()) if c.channel == cam.channel),
            None,
        )
        if sentence:
            ax.text(
                2.0,
                y - 0.42,
                sentence,
                ha="left",
                va="center",
                fontsize="x-small",
                gid=f"verdict-{cam.channel}",
            )
    if not cams:
        _say(ax, "no cam edges measured")
    if verdict is not None and verdict.tdc_after_reference_deg is not None:
        for x in sorted(
            {
                verdict.tdc_after_reference_deg % 720.0,
                (verdict.tdc_after_reference_deg + 360.0) % 720.0,
            }
        ):
            ax.axvline(x, color=style.TDC.color, ls=style.TDC.linestyle, lw=0.9, gid="tdc")
            ax.text(
                x,
                1.0,
                "TDC 1",
                transform=ax.get_xaxis_transform(),
                ha="center",
                va="bottom",
                fontsize="x-small",
            )
    ax.axvline(360.0, color=style.GRID, lw=1.5)
    ax.set_xlim(0.0, 720.0)
    ax.set_xticks(np.arange(0.0, 721.0, 90.0))
    ax.set_ylim(-max(1, len(cams)) + 0.35, 0.7)
    ax.set_yticks([-r for r in range(len(cams))], [c.channel for c in cams])
    ax.set_xlabel(
        "crank angle after the reference event, deg CA (revolution 0: 0-360, revolution 1: "
        "360-720)" + ("; revolution unknown: drawn in both" if unknown_rev else "")
    )
    ax.grid(True, axis="x", color=style.GRID, alpha=0.5, lw=0.5)
    handles = []
    if any_expected:
        handles.append(
            Line2D(
                [],
                [],
                linestyle="none",
                marker=style.EXPECTED.marker,
                markersize=12,
                markeredgewidth=2.0,
                color=style.EXPECTED.color,
                label="expected",
            )
        )
    for status in style.STATUS:
        if status in seen:
            look = style.STATUS[status]
            handles.append(
                Line2D(
                    [],
                    [],
                    linestyle="none",
                    marker=look.marker,
                    markersize=look.markersize * 0.8,
                    color=look.color,
                    markeredgecolor="black",
                    markeredgewidth=0.6,
                    label=style.STATUS_WORDS[status]
                    + (" (+n: n teeth late)" if status == "off-by-teeth" else ""),
                )
            )
    if handles:
        ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.005, 1.0), fontsize="small")


#: smallest phase span drawn, deg CA (a still cam's jitter is not blown up to fill the axes)
PHASE_MIN_SPAN_DEG = 2.0


def _draw_phase(sf: SubFigure, result: DecodeResult) -> None:
    cams = [c for c in result.cams if c.phaser is not None and c.phaser.time_s]
    axes = sf.subplots(max(1, len(cams)), 1, sharex=True, squeeze=False)[:, 0]
    _panel_title(sf, "cam phase against time: moves shaded, holds at their level")
    if not cams:
        axes[0].set_label("phase:none")
        _say(axes[0], "no cam phase trace")
        return
    for ax, cam in zip(axes, cams, strict=True):
        ph = cam.phaser
        assert ph is not None
        ax.set_label(f"phase:{cam.channel}")
        look = style.series_style(0)
        ax.plot(
            ph.time_s,
            ph.phase_deg,
            color=look.color,
            lw=0.8,
            marker=look.marker,
            markersize=2.0,
            gid=f"phase-{cam.channel}",
            label="phase at each cam event",
        )
        for k, m in enumerate(ph.moves):
            ax.axvspan(
                m.t_start_s,
                m.t_end_s,
                facecolor=style.MOVE.color,
                alpha=0.45,
                edgecolor=style.OKABE_ITO["orange"],
                hatch=style.MOVE_HATCH,
                gid=f"move-{cam.channel}-{k + 1}",
                label="move" if k == 0 else "_move",
            )
            ax.text(
                (m.t_start_s + m.t_end_s) / 2,
                0.04,
                f"{m.from_deg:+.1f} to {m.to_deg:+.1f}\nin {m.t_end_s - m.t_start_s:.2f} s",
                transform=ax.get_xaxis_transform(),
                ha="center",
                va="bottom",
                fontsize="x-small",
                bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.8, "pad": 1.0},
                gid=f"move-label-{cam.channel}-{k + 1}",
            )
        hold_seen = hunt_seen = False
        for k, h in enumerate(ph.holds):
            hl = style.HUNTING if h.hunting else style.HOLD
            if h.hunting:
                label, hunt_seen = ("_hunting" if hunt_seen else "hunting"), True
            else:
                label, hold_seen = ("_hold" if hold_seen else "hold"), True
            ax.hlines(
                h.phase_deg,
                h.t_start_s,
                h.t_end_s,
                colors=hl.color,
                linestyles=hl.linestyle,
                lw=1.6,
                gid=f"hold-{cam.channel}-{k + 1}",
                label=label,
            )
        base = "0 = expected" if ph.base == "expected" else "0 = where the cam sat first"
        ax.set_title(
            f"{cam.channel}: {len(ph.moves)} move{'' if len(ph.moves) == 1 else 's'}, "
            f"authority {ph.authority_deg:.1f} deg CA ({base})",
            loc="left",
            fontsize="small",
        )
        ax.set_ylabel("phase, deg CA\n(+ = late)", fontsize="small")
        lo, hi = ax.get_ylim()
        if hi - lo < PHASE_MIN_SPAN_DEG:  # a still cam: show its jitter at a readable scale
            mid = 0.5 * (hi + lo)
            ax.set_ylim(mid - PHASE_MIN_SPAN_DEG / 2, mid + PHASE_MIN_SPAN_DEG / 2)
        ax.grid(True, color=style.GRID, alpha=0.5, lw=0.5)
        handles, labels = ax.get_legend_handles_labels()
        act = cam.actuator
        if act is not None and act.time_s:
            # the valve command on the same time axis, its own scale on the right
            twin = ax.twinx()
            twin.set_label(f"duty:{cam.channel}")
            dl = style.series_style(1)
            twin.step(
                act.time_s, act.duty_pct, where="post", color=dl.color, lw=0.8,
                linestyle=dl.linestyle, gid=f"duty-{cam.channel}",
                label=f"valve duty ({act.channel}), %",
            )
            twin.set_ylim(0.0, 100.0)
            twin.set_ylabel("valve duty, %", fontsize="small")
            h2, l2 = twin.get_legend_handles_labels()
            handles, labels = handles + h2, labels + l2
        ax.legend(handles, labels, loc="upper left", bbox_to_anchor=(1.06, 1.0),
                  fontsize="x-small")
    axes[-1].set_xlabel("time (s)")


def _draw_jitter(sf: SubFigure, result: DecodeResult) -> None:
    from matplotlib.ticker import MaxNLocator

    items = [(cam, i, e) for cam in result.cams for i, e in enumerate(cam.edges)]
    cols = max(1, min(JITTER_COLUMNS, len(items)))
    rows = max(1, math.ceil(len(items) / cols))
    axes = sf.subplots(rows, cols, squeeze=False).ravel()
    _panel_title(
        sf,
        "each cam edge's angle minus its local trend (local quadratic over 9 occurrences), "
        "as the jitter figures of the report",
    )
    for ax in axes[len(items) :]:
        ax.set_visible(False)
        ax.set_label("jitter:spare")
    if not items:
        axes[0].set_visible(True)
        axes[0].set_label("jitter:none")
        _say(axes[0], "no cam edges measured")
        return
    for k, (ax, (cam, i, edge)) in enumerate(zip(axes, items, strict=False)):
        name = _edge_name(cam, i)
        ax.set_label(f"jitter:{name}")
        look = style.series_style(k)
        res = jitter_residuals(edge)
        ax.set_title(f"{name} {edge_label(edge)}", loc="left", fontsize="small")
        if res is None:
            _say(ax, f"{len(edge.events)} events: too few")
            continue
        ax.hist(
            res,
            bins=min(40, max(5, int(math.sqrt(res.size)) * 2)),
            color=look.color,
            alpha=0.55,
            edgecolor=look.color,
            gid=f"jitter-{name.replace(' ', '-')}",
        )
        rms = edge.jitter.tie_rms_deg if edge.jitter is not None else float(np.std(res))
        ax.text(
            0.98,
            0.95,
            f"rms {rms:.3g}\npp {np.ptp(res):.3g}\nn {res.size}",
            transform=ax.transAxes,
            ha="right",
            va="top",
            fontsize="x-small",
            gid=f"jitter-figures-{name.replace(' ', '-')}",
        )
        ax.set_xlabel("deg CA", fontsize="small")
        ax.xaxis.set_major_locator(MaxNLocator(4))
        ax.yaxis.set_major_locator(MaxNLocator(4, integer=True))
        ax.tick_params(labelsize="x-small")
        ax.grid(True, color=style.GRID, alpha=0.5, lw=0.5)
    for row in range(rows):
        axes[row * cols].set_ylabel("events", fontsize="small")


def figure_title(result: DecodeResult) -> str:
    """The figure's title: file, wheel, sensor, speed, and the verdict's first sentence."""
    crank = result.crank
    title = (
        f"{Path(result.capture.path).name}: {crank.wheel} {crank.sensor.upper()} crank, "
        f"{fmt_rpm(crank.rpm.mean)} rpm mean"
    )
    if result.verdict is not None and result.verdict.sentences:
        title += f"\n{result.verdict.sentences[0]}"
    return title


def build_figure(
    result: DecodeResult,
    kinds: Sequence[str] | None = None,
    *,
    span: PlotSpan | None = None,
    title: str | None = None,
) -> Figure:
    """The figure of a decode result: a panel per kind (:data:`KINDS`; None or ``("all",)``:
    see :func:`resolve_kinds`), as a matplotlib ``Figure`` on an Agg canvas.

    ``span`` is the waveform span (default :func:`default_span`). When every kind is drawn, a
    waveform panel whose capture cannot be read again says so instead; when ``waveform`` is
    asked for by name, that is an error (:class:`CaptureError` / :class:`UsageError`).
    """
    require_matplotlib()
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    quiet = kinds is None or tuple(kinds) == (ALL,)
    chosen = resolve_kinds(result, kinds)
    heights = [panel_height(k, result) for k in chosen]
    fig = Figure(figsize=(WIDTH_IN, sum(heights) + 0.5), layout="constrained")
    FigureCanvasAgg(fig)
    subs = fig.subfigures(len(chosen), 1, height_ratios=heights, squeeze=False).ravel()
    fig.suptitle(title or figure_title(result))
    for sf, kind in zip(subs, chosen, strict=True):
        if kind == "waveform":
            _draw_waveform(sf, result, span, quiet)
        elif kind == "speed":
            _draw_speed(sf, result)
        elif kind == "strip":
            _draw_strip(sf, result)
        elif kind == "phase":
            _draw_phase(sf, result)
        else:
            _draw_jitter(sf, result)
    return fig


def plot_result(
    result: DecodeResult,
    path: str | os.PathLike[str],
    *,
    kinds: Sequence[str] | None = None,
    span: PlotSpan | None = None,
    dpi: int = 110,
    title: str | None = None,
    overwrite: bool = True,
) -> None:
    """Draw :func:`build_figure` and write it to ``path`` (.png, .svg or .pdf) atomically
    (``overwrite=False``: refuse a file that already exists).

    Raises :class:`UsageError` when matplotlib is missing or the suffix is not supported.
    """
    fmt = plot_format(path)
    fig = build_figure(result, kinds, span=span, title=title)
    buf = io.BytesIO()
    try:
        fig.savefig(buf, format=fmt, dpi=dpi)
    except (ValueError, RuntimeError) as exc:
        raise UsageError(f"could not draw the plot {str(path)!r}: {exc}") from exc
    write_atomic(path, buf.getvalue(), what="plot file", overwrite=overwrite)
