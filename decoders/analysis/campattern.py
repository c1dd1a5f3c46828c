"""Cam patterns of the pattern library, and which of them fit a decoded cam.

File format
-----------
A cam pattern is one TOML file of the pattern library (see :mod:`toothcomb.decoders.patterns`:
built-in files in ``patterns/cam/``, user files in a folder named by ``TOOTHCOMB_PATTERNS``, or
any ``.toml`` path)::

    format = "toothcomb-pattern"
    version = 1
    kind = "cam"
    name = "three-plus-one"
    description = "three 20 deg teeth every 240 deg plus a sync tooth 40 deg after the first"
    windows_deg = [[0, 20], [40, 60], [240, 260], [480, 500]]

``windows_deg`` lists the teeth (or windows) of the cam in crank degrees of the 720 deg cycle,
each ``[start, end]`` with ``0 <= start < 720`` and ``start < end < start + 720`` (a window may
run past 720), measured from the pattern's own zero (usually the first leading flank). A
tooth/window is where the sensor sees metal. Windows may neither overlap nor touch.

Matching rule
-------------
:func:`match_cam` takes what a decode measured on one cam (its
:class:`~toothcomb.decoders.result.CamResult`) and returns the library patterns that fit:

- The measured edges are the cam's distinct edges at their mean angles (so a cam whose phaser
  moved is matched at its mean position: a phaser turns every edge by the same angle). With
  the cycle phase known they sit on the 720 deg cycle (``revolution * 360 + angle``), else on
  one revolution (0..360).
- A Hall cam is matched flank by flank. Normally the output is high on a tooth, so a window's
  start is a rising edge and its end a falling one; an *inverted* sensor (output low on a tooth:
  windows and gaps swap) has them the other way round, and both readings are tried
  (``inverted = True`` for the second). A VR cam gives only tooth centres, so the library's
  window centres are matched to its edges, whatever their direction.
- A pattern fits at a turn ``shift`` (measured = library + shift) when every kind of edge
  (rising, falling or centre) has as many measured edges as library edges, and each library edge,
  turned by the shift that fits all of them best (least squares), lies within the tolerance
  (:data:`TOLERANCE_DEG`) of its own measured edge, one to one.
- Cycle phase unknown: the measured edges are known only modulo 360, so only a pattern that
  repeats every 360 deg CA can be matched in full (its edges folded onto one revolution); a
  pattern that fixes the cycle phase is not tried -- it would have fixed the phase itself. The
  shift is then known modulo 360 (``phase_known = False``).
- A pattern that repeats every ``r`` deg CA fits at ``shift``, ``shift + r``, ...: the smallest
  such turn is given. The list is sorted best first (rms misfit, then the largest misfit, then
  a normal reading before an inverted one); empty when nothing fits.

>>> spec = CamPatternSpec("demo", ((0.0, 20.0), (180.0, 230.0)))
>>> describe_cam(spec)
'2 teeth, 2 widths (20, 50 deg); fixes the cycle phase'
>>> fixes_phase(CamPatternSpec("even", ((0.0, 30.0), (360.0, 390.0))))
False
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from .. import patterns
from ..errors import UsageError
from ..result import CamPatternMatch, CamResult

__all__ = [
    "TOLERANCE_DEG",
    "CamPatternMatch",
    "CamPatternSpec",
    "cam_pattern_spec",
    "cam_patterns",
    "describe_cam",
    "fixes_phase",
    "match_cam",
    "repeat_deg",
    "spec_from_file",
]

#: how far (deg CA) a library edge may sit from its measured edge once the best turn is applied.
#: The same figure as the timing tolerance of DESIGN.md; common practice, no source.
TOLERANCE_DEG = 3.0
#: two library angles closer than this (deg) are the same angle (pattern files are exact numbers)
_SAME = 1e-6
CYCLE = 720.0


@dataclass(frozen=True)
class CamPatternSpec:
    """One cam pattern of the library.

    >>> s = CamPatternSpec("quad", ((0.0, 20.0), (180.0, 200.0), (360.0, 380.0), (540.0, 560.0)))
    >>> repeat_deg(s), fixes_phase(s)
    (180.0, False)
    """

    name: str
    #: teeth/windows as [start, end] in cycle degrees from the pattern's zero, sorted by start
    windows: tuple[tuple[float, float], ...]
    description: str = ""
    #: the file it was read from (a path, or ``<built-in>/cam/<name>.toml``)
    source: str = ""


def _number(v: Any) -> bool:
    return not isinstance(v, bool) and isinstance(v, int | float) and math.isfinite(v)


def _check_windows(raw: Any, where: str) -> tuple[tuple[float, float], ...]:
    """The windows of ``windows_deg``, checked; UsageError naming ``where`` otherwise."""
    form = "give windows_deg = [[start, end], ...] in cycle degrees"
    if raw is None:
        raise UsageError(f"pattern file {where!r} has no windows_deg; {form}")
    if not isinstance(raw, list) or not raw:
        raise UsageError(
            f"pattern file {where!r}: windows_deg {raw!r} is not a list of windows; {form}"
        )
    out: list[tuple[float, float]] = []
    for w in raw:
        if not (isinstance(w, list) and len(w) == 2 and all(_number(v) for v in w)):
            raise UsageError(
                f"pattern file {where!r}: windows_deg entry {w!r} is not a pair of numbers; "
                "give [start, end]"
            )
        s, e = float(w[0]), float(w[1])
        if not (0.0 <= s < CYCLE and s < e < s + CYCLE):
            raise UsageError(
                f"pattern file {where!r}: windows_deg entry {w!r} is not [start, end] with "
                "0 <= start < 720 and start < end < start + 720; give cycle degrees"
            )
        out.append((s, e))
    out.sort()
    for (s0, e0), (s1, _e1) in zip(out, [*out[1:], (out[0][0] + CYCLE, 0.0)], strict=True):
        if e0 >= s1:
            raise UsageError(
                f"pattern file {where!r}: windows_deg windows starting at {s0:g} and "
                f"{s1 % CYCLE:g} deg overlap or touch; leave a gap between windows"
            )
    return tuple(out)


def spec_from_file(pf: patterns.PatternFile) -> CamPatternSpec:
    """A :class:`CamPatternSpec` from a library file, its ``windows_deg`` checked.

    >>> pf = patterns.parse_text('format = "toothcomb-pattern"\\nversion = 1\\nkind = "cam"\\n'
    ...                          'name = "x"\\nwindows_deg = [[700, 740]]', "x.toml")
    >>> spec_from_file(pf).windows
    ((700.0, 740.0),)
    """
    if pf.kind != "cam":
        raise UsageError(
            f"pattern file {pf.source!r} has kind {pf.kind!r}; a cam pattern has kind = \"cam\""
        )
    windows = _check_windows(pf.data.get("windows_deg"), pf.source)
    return CamPatternSpec(pf.name, windows, pf.description, pf.source)


def cam_patterns() -> dict[str, CamPatternSpec]:
    """Every cam pattern of the library by name (built-in ones, then the user folders').

    >>> sorted(cam_patterns())[:3]
    ['half-moon', 'quad-even', 'quad-two-width']
    """
    return {name: spec_from_file(pf) for name, pf in patterns.entries("cam").items()}


def cam_pattern_spec(text: str) -> CamPatternSpec:
    """The cam pattern ``text`` names: a library name or the path of a ``.toml`` pattern file.

    >>> cam_pattern_spec("single-tooth").windows
    ((0.0, 20.0),)
    """
    pf = patterns.find("cam", text)
    if pf is None:
        known = ", ".join(sorted(patterns.entries("cam")))
        raise UsageError(
            f"cam pattern {text!r} is unknown; use one of {known} or the path of a .toml "
            "pattern file"
        )
    return spec_from_file(pf)


# --------------------------------------------------------------------------------------------
# shape


def _edges(windows: Iterable[tuple[float, float]]) -> dict[str, np.ndarray]:
    """Leading and trailing flank angles and centres, mod 720."""
    w = np.array(list(windows), dtype=float).reshape(-1, 2)
    return {
        "leading": np.mod(w[:, 0], CYCLE),
        "trailing": np.mod(w[:, 1], CYCLE),
        "centre": np.mod(w.mean(axis=1), CYCLE),
    }


def _same_set(a: np.ndarray, b: np.ndarray, period: float) -> bool:
    if a.size != b.size:
        return False
    d = np.abs(_wrap(a[:, None] - b[None, :], period))
    return bool(np.all(d.min(axis=1) < _SAME) and np.all(d.min(axis=0) < _SAME))


def repeat_deg(spec: CamPatternSpec) -> float:
    """The smallest turn (deg CA) that maps the pattern onto itself: 720 / k for some k.

    >>> repeat_deg(CamPatternSpec("one", ((0.0, 20.0),)))
    720.0
    """
    e = _edges(spec.windows)
    n = len(spec.windows)
    for k in range(n, 1, -1):
        if n % k:
            continue
        r = CYCLE / k
        if all(_same_set(e[f], e[f] + r, CYCLE) for f in ("leading", "trailing")):
            return r
    return CYCLE


def fixes_phase(spec: CamPatternSpec) -> bool:
    """True when the pattern does not repeat every 360 deg CA, so it tells the two crank
    revolutions of a cycle apart.

    >>> fixes_phase(CamPatternSpec("half", ((0.0, 360.0),)))
    True
    """
    return (CYCLE / repeat_deg(spec)) % 2 == 1


def describe_cam(spec: CamPatternSpec) -> str:
    """One line on the pattern's shape and whether it fixes the cycle phase.

    >>> describe_cam(CamPatternSpec("q", ((0.0, 20.0), (180.0, 200.0), (360.0, 380.0),
    ...                                   (540.0, 560.0))))
    '4 teeth, 20 deg each; repeats every 180 deg CA, cannot fix the cycle phase'
    """
    n = len(spec.windows)
    widths = sorted({round(e - s, 6) for s, e in spec.windows})
    if max(widths) >= 90.0:  # wide enough to be called a window
        noun = "window" if n == 1 else "windows"
    else:
        noun = "tooth" if n == 1 else "teeth"
    if len(widths) == 1:
        shape = f"{n} {noun}, {widths[0]:g} deg" + (" each" if n > 1 else "")
    else:
        shape = f"{n} {noun}, {len(widths)} widths ({', '.join(f'{w:g}' for w in widths)} deg)"
    if fixes_phase(spec):
        return f"{shape}; fixes the cycle phase"
    return f"{shape}; repeats every {repeat_deg(spec):g} deg CA, cannot fix the cycle phase"


# --------------------------------------------------------------------------------------------
# matching


def _wrap(x: np.ndarray | float, period: float) -> Any:
    """Signed difference wrapped to [-period/2, period/2)."""
    return np.mod(np.asarray(x, dtype=float) + period / 2.0, period) - period / 2.0


def _measured(cam: CamResult) -> tuple[dict[str, np.ndarray], float, bool]:
    """The cam's edges by kind (rising/falling, or centre for VR), their period, phase known."""
    edges = cam.edges
    phase_known = bool(edges) and all(e.revolution is not None for e in edges)
    period = CYCLE if phase_known else 360.0
    vr = cam.sensor == "vr" or any(e.flank == "centre" for e in edges)
    out: dict[str, list[float]] = {}
    for e in edges:
        pos = (e.revolution or 0) * 360.0 + e.angle.mean if phase_known else e.angle.mean
        key = "centre" if vr else e.direction
        out.setdefault(key, []).append(float(np.mod(pos, period)))
    return {k: np.array(v) for k, v in out.items()}, period, phase_known


def _library(
    spec: CamPatternSpec, vr: bool, inverted: bool, period: float
) -> dict[str, np.ndarray]:
    """The library edges by the kind of measured edge they should meet, folded onto ``period``
    (folding a pattern that repeats every 360 onto 360 merges its pairs of edges)."""
    e = _edges(spec.windows)
    if vr:
        kinds = {"centre": e["centre"]}
    elif inverted:
        kinds = {"falling": e["leading"], "rising": e["trailing"]}
    else:
        kinds = {"rising": e["leading"], "falling": e["trailing"]}
    out = {}
    for k, a in kinds.items():
        a = np.sort(np.mod(a, period))
        keep = np.concatenate(([True], np.diff(a) > _SAME))
        if a.size > 1 and period - a[-1] + a[0] <= _SAME:
            keep[-1] = False
        out[k] = a[keep]
    return out


def _fit(lib: dict[str, np.ndarray], meas: dict[str, np.ndarray], period: float,
         tol: float) -> list[tuple[float, float, float]]:
    """Every turn that fits ``lib`` onto ``meas``: (shift, rms, max) of the refined fits."""
    if set(lib) != set(meas) or any(lib[k].size != meas[k].size for k in lib):
        return []
    anchor = min(lib, key=lambda k: (lib[k].size, k))
    fits = []
    for m in meas[anchor]:
        shift = float(m - lib[anchor][0])
        for _ in range(2):  # pair with the nearest edges, refine the turn, pair again
            res = []
            for k in lib:
                d = _wrap(meas[k][:, None] - (lib[k][None, :] + shift), period)
                j = np.argmin(np.abs(d), axis=0)
                if np.unique(j).size != j.size:
                    res = None
                    break
                res.append(d[j, np.arange(j.size)])
            if res is None:
                break
            r = np.concatenate(res)
            shift += float(np.mean(r))
        if res is None:
            continue
        r = r - np.mean(r)
        worst = float(np.max(np.abs(r)))
        if worst <= tol:
            fits.append((shift, float(np.sqrt(np.mean(r**2))), worst))
    return fits


def match_cam(
    cam: CamResult,
    library: Mapping[str, CamPatternSpec] | Iterable[CamPatternSpec] | None = None,
    tolerance_deg: float = TOLERANCE_DEG,
) -> list[CamPatternMatch]:
    """The library patterns that fit ``cam``, best first (see the module's matching rule).

    ``library`` defaults to :func:`cam_patterns`.

    >>> from toothcomb.decoders.result import AngleStats, CamEdge
    >>> def edge(d, a, rev):
    ...     return CamEdge("leading", d, AngleStats(a, 0.0, a, a, 10), rev, ())
    >>> cam = CamResult("cam", "hall", (edge("rising", 100.0, 0), edge("falling", 120.0, 0)))
    >>> m = match_cam(cam)[0]
    >>> m.name, m.shift_deg, m.inverted, m.phase_known
    ('single-tooth', 100.0, False, True)
    """
    if not _number(tolerance_deg) or tolerance_deg <= 0:
        raise UsageError(
            f"cam pattern tolerance {tolerance_deg!r} is not a positive number of degrees; "
            f"give one such as {TOLERANCE_DEG:g}"
        )
    if library is None:
        library = cam_patterns()
    specs = list(library.values()) if isinstance(library, Mapping) else list(library)
    meas, period, phase_known = _measured(cam)
    if not meas:
        return []
    vr = "centre" in meas
    out: list[CamPatternMatch] = []
    for spec in specs:
        if not phase_known and fixes_phase(spec):
            continue
        rep = repeat_deg(spec) if phase_known else min(repeat_deg(spec), 360.0)
        for inverted in (False,) if vr else (False, True):
            lib = _library(spec, vr, inverted, period)
            seen: list[float] = []
            for shift, rms, worst in sorted(_fit(lib, meas, period, tolerance_deg),
                                            key=lambda f: (f[1], f[2])):
                s = float(np.mod(shift, rep))
                if s >= rep - _SAME:
                    s = 0.0
                if any(abs(_wrap(s - x, rep)) < tolerance_deg for x in seen):
                    continue
                seen.append(s)
                out.append(CamPatternMatch(spec.name, s, inverted, rms, worst, phase_known))
    out.sort(key=lambda m: (round(m.rms_deg, 9), round(m.max_deg, 9), m.inverted, m.name,
                            m.shift_deg))
    return out
