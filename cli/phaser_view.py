"""The cam phaser in the terminal: a phase-vs-time strip and the table of moves and holds.

The strip is drawn with block characters, so it reads without colour too: ``█`` where the cam
held, ``▓`` while it moved, ``▒`` where it hunted (swung back and forth while it should hold).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from rich import box
from rich.table import Table
from rich.text import Text

#: strip cell of a hold, a move and a hunting hold: (character, style)
STRIP_HOLD = ("█", "")
STRIP_MOVE = ("▓", "bold cyan")
STRIP_HUNT = ("▒", "yellow")
#: width of the phase labels left of the strip
LABEL_W = 9


def _get(obj: Any, key: str, default: Any = None) -> Any:
    if isinstance(obj, dict):
        return obj.get(key, default)
    return getattr(obj, key, default)


def _zero(x: float | None) -> float | None:
    """``x`` with a negative zero made positive (so it does not print as -0.0)."""
    return x + 0.0 if x is not None else None


def _fmt(x: float | None, spec: str) -> str:
    """``x`` formatted, "-" when missing; never a negative zero.

    >>> _fmt(-0.00004, "+.2f"), _fmt(None, ".1f"), _fmt(float("nan"), ".1f")
    ('+0.00', '-', '-')
    """
    if x is None or not math.isfinite(x):
        return "-"
    if spec.endswith("f"):
        x = round(x, int(spec.rsplit(".", 1)[-1][:-1] or 0)) + 0.0
    return format(x, spec)


def base_text(phaser: Any) -> str:
    """What 0 on the phase scale means.

    >>> base_text({"base": "expected"})
    'deviation from the expected angle (+ = late)'
    """
    if _get(phaser, "base") == "expected":
        return "deviation from the expected angle (+ = late)"
    return "relative to where the cam sat first (+ = retarded)"


def phase_strip(phaser: Any, width: int, height: int = 7) -> list[Text]:
    """Rows of a phase-vs-time strip ``width`` characters wide: phase labels on the left, one
    column per time bin, each column filled between the lowest and highest phase seen in it.

    >>> ph = {"time_s": [0.0, 0.5, 1.0], "phase_deg": [0.0, 10.0, 20.0], "moves": [], "holds": []}
    >>> rows = phase_strip(ph, 30, height=3)
    >>> [r.plain for r in rows]  # doctest: +NORMALIZE_WHITESPACE
    ['   +20.0 ┤                    █', '         ┤          █          ',
     '    +0.0 ┤█                    ', '         └─────────────────────',
     '          0.00 s        1.00 s']
    """
    t = np.asarray(_get(phaser, "time_s") or [], dtype=float)
    p = np.asarray(_get(phaser, "phase_deg") or [], dtype=float)
    cols = max(10, width - LABEL_W - 1)
    if len(t) == 0:
        return [Text("no cam events to draw")]
    t0, t1 = float(t[0]), float(t[-1])
    lo, hi = float(np.min(p)), float(np.max(p))
    if hi - lo < 2.0:
        mid = 0.5 * (hi + lo)
        lo, hi = mid - 1.0, mid + 1.0
    span = max(t1 - t0, 1e-9)
    col = np.minimum(((t - t0) / span * cols).astype(int), cols - 1)
    row = np.rint((p - lo) / (hi - lo) * (height - 1)).astype(int)
    kind = np.zeros(cols, dtype=int)  # 0 hold, 1 move, 2 hunting
    centres = t0 + (np.arange(cols) + 0.5) * span / cols
    for m in _get(phaser, "moves") or ():
        a, b = _get(m, "t_start_s"), _get(m, "t_end_s")
        kind[(centres >= a) & (centres <= b)] = 1
    for h in _get(phaser, "holds") or ():
        if _get(h, "hunting"):
            a, b = _get(h, "t_start_s"), _get(h, "t_end_s")
            kind[(centres >= a) & (centres <= b) & (kind == 0)] = 2
    grid = np.zeros((height, cols), dtype=bool)
    for c in np.unique(col):
        r = row[col == c]
        grid[int(r.min()) : int(r.max()) + 1, c] = True
    cells = (STRIP_HOLD, STRIP_MOVE, STRIP_HUNT)
    out: list[Text] = []
    for r in range(height - 1, -1, -1):
        label = ""
        if r == height - 1:
            label = f"{round(hi, 1) + 0.0:+.1f}"
        elif r == 0:
            label = f"{round(lo, 1) + 0.0:+.1f}"
        line = Text(f"{label:>{LABEL_W - 1}} ┤")
        for c in range(cols):
            if grid[r, c]:
                ch, style = cells[kind[c]]
                line.append(ch, style=style)
            else:
                line.append(" ")
        out.append(line)
    out.append(Text(" " * (LABEL_W - 1) + " └" + "─" * cols))
    left, right = f"{t0:.2f} s", f"{t1:.2f} s"
    out.append(Text(" " * (LABEL_W + 1) + left + right.rjust(cols - len(left))))
    return out


def move_table(moves: Sequence[Any]) -> Table:
    """One row per move: when, from and to, travel, rates, 10-90 %, overshoot, settling, speed.

    Columns are headed in short words so the table fits 80 columns.
    """
    table = Table(box=box.SIMPLE_HEAD, pad_edge=False, show_edge=False, padding=(0, 1, 0, 0))
    for name, justify in (
        ("#", "left"), ("time s", "right"), ("from->to°", "right"), ("travel", "right"),
        ("mean/s", "right"), ("peak/s", "right"), ("t10-90", "right"), ("over°", "right"),
        ("settle", "right"), ("rpm", "right"),
    ):
        table.add_column(name, justify=justify, no_wrap=True)  # type: ignore[arg-type]
    for i, m in enumerate(moves, 1):
        t0, t1 = _get(m, "t_start_s"), _get(m, "t_end_s")
        table.add_row(
            f"M{i}",
            f"{_fmt(t0, '.2f')}-{_fmt(t1, '.2f')}",
            f"{_fmt(_zero(_get(m, 'from_deg')), '+.1f')}->{_fmt(_zero(_get(m, 'to_deg')), '+.1f')}",
            _fmt(_get(m, "travel_deg"), "+.1f"),
            _fmt(_get(m, "mean_rate_deg_s"), ".0f"),
            _fmt(_get(m, "peak_rate_deg_s"), ".0f"),
            _fmt(_get(m, "t10_90_s"), ".3f"),
            _fmt(_get(m, "overshoot_deg"), ".1f"),
            _fmt(_get(m, "settling_s"), ".3f"),
            _fmt(_get(m, "rpm"), ".0f"),
        )
    return table


def hold_table(holds: Sequence[Any]) -> Table:
    """One row per hold: when, where, jitter and peak to peak, and whether it hunted."""
    table = Table(box=box.SIMPLE_HEAD, pad_edge=False, show_edge=False, padding=(0, 1, 0, 0))
    for name, justify in (
        ("#", "left"), ("time s", "right"), ("phase°", "right"), ("jitter rms", "right"),
        ("p-p", "right"), ("n", "right"), ("note", "left"),
    ):
        table.add_column(name, justify=justify, no_wrap=True)  # type: ignore[arg-type]
    for i, h in enumerate(holds, 1):
        note = ""
        if _get(h, "hunting"):
            amp, hz = _get(h, "hunting_amplitude_deg"), _get(h, "hunting_hz")
            note = f"hunts +-{_fmt(amp, '.1f')}° at {_fmt(hz, '.1f')} Hz"
        table.add_row(
            f"H{i}",
            f"{_fmt(_get(h, 't_start_s'), '.2f')}-{_fmt(_get(h, 't_end_s'), '.2f')}",
            _fmt(_zero(_get(h, "phase_deg")), "+.2f"),
            _fmt(_get(h, "jitter_deg"), ".3f"),
            _fmt(_get(h, "pp_deg"), ".2f"),
            str(_get(h, "n", "")),
            Text(note, style="yellow") if note else "",
        )
    return table


def phaser_trace(phaser: Any) -> dict[str, Any]:
    """The trace fields of a phaser result or of its JSON form."""
    trace = _get(phaser, "trace")
    if trace is not None:
        return {
            "time_s": _get(trace, "time_s"),
            "phase_deg": _get(trace, "phase_deg"),
            "moves": _get(phaser, "moves"),
            "holds": _get(phaser, "holds"),
        }
    return {
        "time_s": _get(phaser, "time_s"),
        "phase_deg": _get(phaser, "phase_deg"),
        "moves": _get(phaser, "moves"),
        "holds": _get(phaser, "holds"),
    }
