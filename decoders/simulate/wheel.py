"""Geometry of trigger wheels and cam patterns, in the wheel's own angle (deg CA).

A crank wheel lives in engine angle modulo 360 (tooth centres at ``tooth1_deg + offset``); a cam
pattern in cam angle modulo 720 (``theta - phi(t)``). Each tooth or window has a leading flank
(it arrives at the sensor), a trailing flank (it leaves) and a centre; the VR flux bump of each
tooth has an amplitude and a half-width. :func:`crank_geometry` and :func:`cam_geometry` check
that teeth do not overlap and that no flux bump reaches another tooth's centre (so every VR
centre crossing is exact); both raise :class:`~toothcomb.decoders.errors.UsageError`.

>>> g = crank_geometry(CrankWheel(wheel="36-1", tooth1_deg=90.0))
>>> len(g.centre), float(g.centre[0]), float(g.end[0] - g.start[0])
(35, 90.0, 5.0)
>>> equal_teeth(4, first_deg=30.0, width_deg=20.0)[:2]
((30.0, 50.0), (210.0, 230.0))
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import UsageError
from .scenario import Cam, CrankWheel, VrSensor

#: ``number`` of the runt pulse in a crank geometry (it is not a tooth)
RUNT = 0


@dataclass(frozen=True)
class Geometry:
    """Teeth (or cam windows) of one wheel; all arrays have one entry per tooth, in wheel order."""

    #: 360 (crank) or 720 (cam), deg CA
    period: float
    #: crank: tooth number (1 = first after the gap; RUNT for the runt); cam: window index
    number: np.ndarray
    #: leading flank angle, 0 <= start < period
    start: np.ndarray
    #: trailing flank angle, start < end < start + period
    end: np.ndarray
    #: tooth centre (middle of the flanks), deg CA
    centre: np.ndarray
    #: VR flux bump amplitude (1 = a good tooth)
    vr_amp: np.ndarray
    #: VR flux bump half-width, deg CA
    vr_half: np.ndarray


def _circ(a: np.ndarray, b: np.ndarray, period: float) -> np.ndarray:
    d = np.abs(a - b) % period
    return np.minimum(d, period - d)


def _check_flanks(g: Geometry, where: str) -> None:
    order = np.argsort(g.start)
    s, e = g.start[order], g.end[order]
    nxt = np.roll(s, -1)
    nxt[-1] += g.period
    bad = np.flatnonzero(e >= nxt)
    if bad.size:
        k = int(order[bad[0]])
        raise UsageError(
            f"{where}: the tooth at {float(g.start[k]) % g.period:.4g}..{float(g.end[k]):.4g} deg "
            "runs into the next one; make it narrower or move it"
        )


def _check_bumps(g: Geometry, where: str, real: np.ndarray) -> None:
    c, h = g.centre % g.period, g.vr_half
    for k in np.flatnonzero(real):
        d = _circ(c, c[k], g.period)
        d[k] = np.inf
        over = np.flatnonzero(d < h - 1e-9)
        if over.size:
            j = int(over[0])
            raise UsageError(
                f"{where}: the flux of the tooth at {float(c[j]):.4g} deg reaches the centre of "
                f"the tooth at {float(c[k]):.4g} deg, so that VR crossing would not be exact; "
                "use a smaller spread, a narrower wide tooth or move the runt"
            )


def crank_geometry(crank: CrankWheel) -> Geometry:
    """Teeth of a crank wheel with its defects (missing teeth removed, runt added last)."""
    pitch = crank.pitch_deg
    off = np.array(crank.offsets_deg)
    n = off.size
    number = np.arange(1, n + 1)
    width = np.full(n, crank.duty * pitch)
    centre = crank.tooth1_deg + off
    sensor = crank.sensor
    spread = sensor.spread if isinstance(sensor, VrSensor) else 1.0
    half = np.full(n, spread * pitch)
    amp = np.ones(n)
    if crank.runout:
        amp *= 1.0 + crank.runout * np.cos(np.radians(centre - crank.runout_phase_deg))
    if crank.wide_tooth_deg:
        e = crank.wide_tooth_deg
        width[-1] += e
        centre[-1] += e / 2.0
        half[-1] += e / 2.0
    keep = np.ones(n, dtype=bool)
    for d in crank.damaged:
        if d.kind == "missing":
            keep[d.tooth - 1] = False
        else:
            amp[d.tooth - 1] *= d.amplitude
    fringe = spread * pitch - crank.duty * pitch / 2.0
    if crank.runt is not None:
        r = crank.runt
        rw = r.width_deg if r.width_deg is not None else pitch / 4.0
        rc = crank.tooth1_deg + off[-1] + (r.offset_deg if r.offset_deg is not None else pitch)
        number = np.append(number, RUNT)
        width = np.append(width, rw)
        centre = np.append(centre, rc)
        half = np.append(half, rw / 2.0 + max(fringe, rw / 2.0))
        amp = np.append(amp, r.amplitude)
        keep = np.append(keep, True)
    centre = centre[keep]
    width = width[keep]
    start = (centre - width / 2.0) % 360.0
    centre = start + width / 2.0
    g = Geometry(360.0, number[keep], start, start + width, centre, amp[keep], half[keep])
    _check_flanks(g, "crank")
    if isinstance(sensor, VrSensor):
        _check_bumps(g, "crank", g.number != RUNT)
    return g


def cam_geometry(cam: Cam) -> Geometry:
    """Windows of a cam pattern (window index = position in ``cam.pattern``)."""
    s = np.array([w[0] for w in cam.pattern], dtype=float) % 720.0
    e = s + np.array([w[1] - w[0] for w in cam.pattern], dtype=float)
    c = (s + e) / 2.0
    half = (e - s) / 2.0
    if isinstance(cam.sensor, VrSensor):
        half = half + cam.sensor.fringe_deg
        for k in range(c.size):  # never reach another window's centre
            d = _circ(c % 720.0, c[k] % 720.0, 720.0)
            d[k] = np.inf
            half[k] = min(half[k], float(d.min()))
    g = Geometry(720.0, np.arange(s.size), s, e, c, np.ones(s.size), half)
    _check_flanks(g, f"cam {cam.name!r}")
    return g


def angles_in_range(
    base: np.ndarray, period: float, lo: float, hi: float
) -> tuple[np.ndarray, np.ndarray]:
    """Every ``base[j] + m*period`` with lo <= angle < hi, sorted; returns (angles, j).

    >>> a, j = angles_in_range(np.array([10.0, 200.0]), 360.0, 0.0, 720.0)
    >>> a.tolist(), j.tolist()
    ([10.0, 200.0, 370.0, 560.0], [0, 1, 0, 1])
    """
    base = np.asarray(base, dtype=float)
    if base.size == 0 or hi <= lo:
        return np.empty(0), np.empty(0, dtype=int)
    m0 = np.ceil((lo - base) / period).astype(np.int64) - 1
    m1 = np.ceil((hi - base) / period).astype(np.int64) + 1
    counts = np.maximum(m1 - m0, 0)
    j = np.repeat(np.arange(base.size), counts)
    first = np.repeat(np.cumsum(counts) - counts, counts)
    m = m0[j] + (np.arange(j.size) - first)
    a = base[j] + m * period
    keep = (a >= lo) & (a < hi)
    a, j = a[keep], j[keep]
    order = np.argsort(a, kind="stable")
    return a[order], j[order]


# --------------------------------------------------------------------------------------------
# cam pattern helpers


def _norm(windows: list[tuple[float, float]]) -> tuple[tuple[float, float], ...]:
    out = []
    for s, e in windows:
        s2 = float(s) % 720.0
        out.append((s2, s2 + float(e - s)))
    return tuple(out)


def single_tooth(at_deg: float, width_deg: float = 20.0) -> tuple[tuple[float, float], ...]:
    """One tooth per cycle starting at ``at_deg``.

    >>> single_tooth(100.0, 30.0)
    ((100.0, 130.0),)
    """
    return _norm([(at_deg, at_deg + width_deg)])


def half_moon(start_deg: float = 0.0) -> tuple[tuple[float, float], ...]:
    """One window of 360 deg CA (half the cycle).

    >>> half_moon(90.0)
    ((90.0, 450.0),)
    """
    return _norm([(start_deg, start_deg + 360.0)])


def equal_teeth(
    n: int, first_deg: float = 0.0, width_deg: float = 20.0
) -> tuple[tuple[float, float], ...]:
    """``n`` equal teeth spread evenly over the cycle, the first starting at ``first_deg``."""
    return _norm(
        [(first_deg + k * 720.0 / n, first_deg + k * 720.0 / n + width_deg) for k in range(n)]
    )


def n_plus_one(
    n: int, first_deg: float = 0.0, width_deg: float = 20.0, extra_after_deg: float = 30.0
) -> tuple[tuple[float, float], ...]:
    """``n`` equal teeth plus one extra tooth ``extra_after_deg`` after the first one's start.

    >>> n_plus_one(2, 0.0, 10.0, 40.0)
    ((0.0, 10.0), (40.0, 50.0), (360.0, 370.0))
    """
    eq = list(equal_teeth(n, first_deg, width_deg))
    extra = (first_deg + extra_after_deg, first_deg + extra_after_deg + width_deg)
    return _norm([eq[0], extra, *eq[1:]])


def library_pattern(name: str, shift_deg: float = 0.0) -> tuple[tuple[float, float], ...]:
    """The windows of the pattern library's cam pattern ``name`` (a name or a .toml path),
    turned by ``shift_deg`` (mod 720).

    >>> library_pattern("single-tooth", 710.0)
    ((710.0, 730.0),)
    """
    from ..analysis.campattern import cam_pattern_spec

    spec = cam_pattern_spec(name)
    return _norm([(s + shift_deg, e + shift_deg) for s, e in spec.windows])


_PATTERNS: dict[str, tuple[Any, tuple[str, ...]]] = {
    "single": (single_tooth, ("at_deg", "width_deg")),
    "half_moon": (half_moon, ("start_deg",)),
    "equal": (equal_teeth, ("n", "first_deg", "width_deg")),
    "n_plus_one": (n_plus_one, ("n", "first_deg", "width_deg", "extra_after_deg")),
    # a cam pattern of the pattern library (``name``: a library name or a .toml path)
    "library": (library_pattern, ("name", "shift_deg")),
}
#: keys whose value is text, not a number
_TEXT_KEYS = ("name",)


def cam_pattern(spec: Mapping[str, Any], where: str = "pattern") -> tuple[tuple[float, float], ...]:
    """Expand a shorthand pattern table such as ``{"kind": "equal", "n": 4, "width_deg": 20}``.

    >>> cam_pattern({"kind": "half_moon", "start_deg": 180})
    ((180.0, 540.0),)
    """
    kind = spec.get("kind")
    if kind not in _PATTERNS:
        raise UsageError(
            f"{where}.kind {kind!r} is unknown; use one of {', '.join(_PATTERNS)} "
            "or give a list of [start, end] windows"
        )
    fn, keys = _PATTERNS[str(kind)]
    args = {k: v for k, v in spec.items() if k != "kind"}
    for k, v in args.items():
        if k not in keys:
            raise UsageError(f"{where}.{k} is not a key of a {kind} pattern; use {', '.join(keys)}")
        if k in _TEXT_KEYS:
            if not isinstance(v, str) or not v.strip():
                raise UsageError(
                    f"{where}.{k} {v!r} is not a pattern name; give a library name or a .toml path"
                )
            continue
        if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
            raise UsageError(f"{where}.{k} {v!r} is not a number; give a number")
    if "n" in args and (int(args["n"]) != args["n"] or not 1 <= args["n"] <= 64):
        raise UsageError(f"{where}.n {args['n']!r} is not a whole number 1..64; give a tooth count")
    if "n" in keys and "n" not in args:
        raise UsageError(f"{where}.n is missing; give the tooth count of the {kind} pattern")
    if "at_deg" in keys and "at_deg" not in args:
        raise UsageError(f"{where}.at_deg is missing; give the angle of the tooth")
    if "name" in keys and "name" not in args:
        raise UsageError(f"{where}.name is missing; give a library cam pattern name or .toml path")
    if "n" in args:
        args["n"] = int(args["n"])
    return fn(**args)
