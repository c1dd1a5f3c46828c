"""The cam phaser in the terminal: a phase-vs-time strip and the table of moves and holds.

The strip is drawn with block characters, so it reads without colour too: ``█`` where the cam
held, ``▓`` while it moved, ``▒`` where it hunted (swung back and forth while it should hold).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
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


def phase_strip(
    phaser: Any,
    width: int,
    height: int = 7,
    t_range: tuple[float, float] | None = None,
    label: Callable[[float], str] | None = None,
) -> list[Text]:
    """Rows of a phase-vs-time strip ``width`` characters wide: phase labels on the left, one
    column per time bin, each column filled between the lowest and highest phase seen in it.

    >>> ph = {"time_s": [0.0, 0.5, 1.0], "phase_deg": [0.0, 10.0, 20.0], "moves": [], "holds": []}
    >>> rows = phase_strip(ph, 30, height=3)
    >>> for r in rows:
    ...     print(r.plain + "|")
       +20.0 ┤                   █|
             ┤          █         |
        +0.0 ┤█                   |
             └────────────────────|
              0.00 s        1.00 s|
    """
    t = np.asarray(_get(phaser, "time_s") or [], dtype=float)
    p = np.asarray(_get(phaser, "phase_deg") or [], dtype=float)
    cols = max(10, width - LABEL_W - 1)
    if len(t) == 0:
        return [Text("no cam events to draw")]
    t0, t1 = t_range if t_range is not None else (float(t[0]), float(t[-1]))
    keep = (t >= t0) & (t <= t1)
    t, p = t[keep], p[keep]
    if len(t) == 0:
        return [Text("no events in the span to draw")]
    fmt = label or (lambda v: f"{round(v, 1) + 0.0:+.1f}")
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
            label = fmt(hi)
        elif r == 0:
            label = fmt(lo)
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


def duty_strip(actuator: Any, width: int, t_range: tuple[float, float], height: int = 5,
               ) -> list[Text]:
    """The valve's duty (%) against time, drawn like the phase strip over the same span."""
    t = np.asarray(_get(actuator, "time_s") or [], dtype=float)
    d = np.asarray(_get(actuator, "duty_pct") or [], dtype=float)
    if isinstance(actuator, dict):
        tr = actuator.get("trace") or {}
        t = np.asarray(tr.get("time_s") or [], dtype=float)
        d = np.asarray(tr.get("duty_pct") or [], dtype=float)
    data = {"time_s": t.tolist(), "phase_deg": d.tolist(), "moves": [], "holds": []}
    return phase_strip(data, width, height, t_range, label=lambda v: f"{v:.0f} %")


def actuator_lines(actuator: Any) -> list[str]:
    """The valve command in a few plain lines: drive, frequency, duty, and how the cam followed.

    >>> actuator_lines({"channel": "ocv", "drive": "low-side", "pwm_hz": 250.0,
    ...     "duty": {"min": 30.0, "max": 75.0, "mean": 53.0}, "hold_duty": 50.4,
    ...     "rate_deg_s_per_pct": -7.1, "delay_s": 0.03, "follows": True, "cam": "intake",
    ...     "pairing": "given"})[0]
    'valve command on ocv: PWM 250.0 Hz, low-side drive, duty 30-75 % (mean 53 %)'
    """
    if isinstance(actuator, dict):
        duty = actuator.get("duty") or {}
    else:
        duty = {"min": _get(actuator, "duty_min"), "max": _get(actuator, "duty_max"),
                "mean": _get(actuator, "duty_mean")}
    drive = _get(actuator, "drive")
    lines = [
        f"valve command on {_get(actuator, 'channel')}: PWM {_fmt(_get(actuator, 'pwm_hz'), '.1f')}"
        f" Hz, {drive + ' drive' if drive else 'drive side unknown'}, duty "
        f"{_fmt(duty.get('min'), '.0f')}-{_fmt(duty.get('max'), '.0f')} % "
        f"(mean {_fmt(duty.get('mean'), '.0f')} %)"
    ]
    follows = _get(actuator, "follows")
    hold = _get(actuator, "hold_duty")
    rate = _get(actuator, "rate_deg_s_per_pct")
    if rate is None:
        rate = _get(actuator, "rate_per_pct")
    parts = []
    if hold is not None:
        parts.append(f"holds at {_fmt(hold, '.1f')} % duty")
    if rate is not None:
        way = "advances" if rate < 0 else "retards"
        parts.append(f"more duty {way} the cam at {_fmt(abs(rate), '.1f')} deg CA/s per point")
    if _get(actuator, "delay_s") is not None:
        parts.append(f"responds after {_fmt(_get(actuator, 'delay_s'), '.3f')} s")
    if follows is not None:
        parts.append("the cam follows its command" if follows
                     else "the cam does NOT follow its command")
    if parts:
        lines.append("  " + "; ".join(parts))
    return lines
