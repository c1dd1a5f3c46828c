"""Plots of a decode result (optional: needs matplotlib, imported only when a plot is asked for).

One figure, three panels sharing what a timing check needs to see:

1. engine speed per tooth against time, with every crank reference event marked;
2. each cam edge's angle against time, as the change from its mean (a phaser moving shows as
   all edges of a cam shifting together);
3. the spread of each edge's angle around its mean (a histogram per edge).

Drawing uses matplotlib's Agg canvas directly (no pyplot, no global backend switch), and the
file is written atomically.
"""

from __future__ import annotations

import io
import os
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
from toothcomb.decoders.errors import UsageError
from toothcomb.decoders.result import CamEdge, DecodeResult

from .output import write_atomic
from .report import edge_label, fmt_deg, fmt_rpm

if TYPE_CHECKING:
    from matplotlib.figure import Figure

#: file suffixes a plot can be written as, and the matplotlib format for each
FORMATS: dict[str, str] = {
    ".png": "png",  # raster, the default
    ".svg": "svg",  # vector, for documents and browsers
    ".pdf": "pdf",  # vector, for printing
}

MISSING_MATPLOTLIB = "plots need matplotlib: pip install 'toothcomb[plot]'"


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


def _wrapped_offsets(edge: CamEdge) -> tuple[np.ndarray, np.ndarray]:
    """Event times and angle minus the edge's circular mean, folded into -180..180."""
    if not edge.events:
        return np.empty(0), np.empty(0)
    ev = np.asarray(edge.events, dtype=float).reshape(-1, 2)
    mean = edge.angle.mean
    if not np.isfinite(mean):
        mean = float(np.degrees(np.angle(np.mean(np.exp(1j * np.radians(ev[:, 1]))))))
    offset = (ev[:, 1] - mean + 180.0) % 360.0 - 180.0
    return ev[:, 0], offset


def build_figure(result: DecodeResult, title: str | None = None) -> Figure:
    """The three-panel figure of a decode result (matplotlib ``Figure`` on an Agg canvas)."""
    require_matplotlib()
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    crank = result.crank
    fig = Figure(figsize=(10.0, 9.0), layout="constrained")
    FigureCanvasAgg(fig)
    ax_rpm, ax_ang, ax_hist = fig.subplots(3, 1, gridspec_kw={"height_ratios": [1.0, 1.2, 1.0]})
    ax_ang.sharex(ax_rpm)
    fig.suptitle(
        title
        or (
            f"{Path(result.capture.path).name}: {crank.wheel} {crank.sensor.upper()} crank, "
            f"{fmt_rpm(crank.rpm.mean)} rpm mean"
        )
    )

    # (1) speed per tooth, reference events as ticks along the bottom edge
    if crank.rpm_trace:
        trace = np.asarray(crank.rpm_trace, dtype=float).reshape(-1, 2)
        ax_rpm.plot(trace[:, 0], trace[:, 1], lw=0.9, color="tab:blue", label="speed per tooth")
    else:
        ax_rpm.text(0.5, 0.5, "no speed trace", transform=ax_rpm.transAxes, ha="center")
    refs = np.asarray(crank.reference_times_s, dtype=float)
    if refs.size:
        ax_rpm.plot(
            refs,
            np.full(refs.size, 0.03),
            "|",
            ms=9,
            color="tab:red",
            transform=ax_rpm.get_xaxis_transform(),
            label=f"reference events (tooth 1), {refs.size}",
        )
    ax_rpm.set_ylabel("engine speed (rpm)")
    ax_rpm.set_title("crank: speed per tooth", loc="left", fontsize="medium")
    ax_rpm.grid(True, alpha=0.3)
    ax_rpm.legend(loc="upper right", fontsize="small")

    # (2) cam edge angle against time and (3) the spread of each edge
    plotted = 0
    for cam in result.cams:
        for edge in cam.edges:
            t, off = _wrapped_offsets(edge)
            if not t.size:
                continue
            label = f"{cam.channel} {edge_label(edge)} (mean {fmt_deg(edge.angle.mean)})"
            (line,) = ax_ang.plot(t, off, ".-", ms=3, lw=0.7, label=label)
            ax_hist.hist(
                off,
                bins=min(60, max(5, int(np.sqrt(off.size)) * 2)),
                histtype="step",
                lw=1.2,
                color=line.get_color(),
                label=f"{cam.channel} {edge_label(edge)} (std {fmt_deg(edge.angle.std, 3)})",
            )
            plotted += 1
    for ax in (ax_ang, ax_hist):
        if not plotted:
            ax.text(0.5, 0.5, "no cam edges measured", transform=ax.transAxes, ha="center")
        else:
            ax.legend(loc="upper right", fontsize="small")
        ax.grid(True, alpha=0.3)
    ax_ang.set_title(
        "cam edges: angle after the crank reference, change from each edge's mean",
        loc="left",
        fontsize="medium",
    )
    ax_ang.set_ylabel("angle - mean (deg CA)")
    ax_ang.set_xlabel("time (s)")
    ax_hist.set_title("spread of each edge's angle", loc="left", fontsize="medium")
    ax_hist.set_xlabel("angle - mean (deg CA)")
    ax_hist.set_ylabel("events")
    return fig


def plot_result(
    result: DecodeResult, path: str | os.PathLike[str], *, dpi: int = 110, title: str | None = None
) -> None:
    """Draw :func:`build_figure` and write it to ``path`` (.png, .svg or .pdf) atomically.

    Raises :class:`UsageError` when matplotlib is missing or the suffix is not supported.
    """
    fmt = plot_format(path)
    fig = build_figure(result, title=title)
    buf = io.BytesIO()
    try:
        fig.savefig(buf, format=fmt, dpi=dpi)
    except (ValueError, RuntimeError) as exc:
        raise UsageError(f"could not draw the plot {str(path)!r}: {exc}") from exc
    write_atomic(path, buf.getvalue(), what="plot file")
