"""Timing verdicts: a decode held against an engine profile or a known-good capture.

:func:`compare` is a step after decoding: it takes a
:class:`~toothcomb.decoders.result.DecodeResult` and a reference (an
:class:`~toothcomb.decoders.profiles.EngineProfile`, a profile file, the JSON of an earlier decode
or a shipped profile's name) and returns the same result with every matched cam edge carrying an
:class:`~toothcomb.decoders.result.EdgeComparison` and the result a
:class:`~toothcomb.decoders.result.Verdict`. How it decides:

**Which cam is which.** A profile cam's ``channel`` hint (a channel name, or a 0-based index
into the capture's channels) or its name picks the decoded cam on that channel; cams left over
are paired by how well their edge patterns fit (:func:`fit_shift`), best fit first.

**Which edge is which.** Edges are matched within their kind: the flank (leading, trailing,
centre) and, when the reference gives it, the signal direction. If the signal directions match
nothing at all (an inverted signal), edges are matched on the flank alone and a finding says so.
Positions are compared on the 720 deg cycle when both sides know the revolution, else modulo 360.
A belt or chain that jumps moves a whole cam, so the cam's *common shift* is estimated first:
every pairing of a measured with an expected edge of the same kind proposes a shift, and the one
under which the whole pattern fits best (sum of distances, each capped at ``FIT_CAP_DEG``) wins;
among shifts that fit equally well (a pattern with symmetry) the smallest is taken. Each edge is
then paired with the expected edge nearest to its place *after* that shift, so a 17 deg jump never
makes an edge match its neighbour. Which revolution a decode calls 0 is toothcomb's convention,
taken from a cam pattern; it can flip when an edge moves across a reference event, so the whole
capture's revolution labels may be turned by 360 deg when that makes the cams' shifts smaller.

**Deviation** = measured - expected, wrapped to (-360, 360] on the cycle or (-180, 180] per
revolution; + = late (retarded). In trigger teeth: / crank pitch. In drive teeth: / (720 / T),
T the cam sprocket's teeth (command line first, then the profile's cam, then its drive).

**Uncertainty** is a standard uncertainty, 1 sigma (coverage factor k = 1): the measured edge's
(:func:`~toothcomb.decoders.profiles.edge_uncertainty`: spread / sqrt(n), and the sample
interval at the measured speed for the cam event and for the crank reference) and the expected
angle's own (a learned reference carries the same figure; a specification carries none), added in
quadrature. A cam's shift has ``sqrt(mean(u_i^2) / n + var(d_i) / n)`` over its n edges.

**Status.** ``"in-time"`` when ``|deviation| <= tolerance`` (command line, else the profile's
cam, else the profile, else ``DEFAULT_TOLERANCE_DEG``). Otherwise a whole number of teeth is
tested: drive teeth first (when T is known), then crank trigger teeth. A count ``k != 0`` of
teeth of size ``p`` is called (``"off-by-teeth"``, ``off_by_teeth = k``) only when the deviation
lies within ``Z_MATCH`` uncertainties of ``k * p`` **and** at least ``Z_FAR`` uncertainties from
0, from ``(k - 1) * p`` and ``(k + 1) * p``, and (for trigger teeth) from the nearest whole number
of drive teeth. The uncertainty in this test also allows ``REPEAT_FRACTION`` of a tooth, since a
refitted belt or wheel never lands on exactly a whole tooth. A crank trigger wheel a tooth off
moves every cam alike, so with two or more cams a trigger-tooth call stands only when every cam
shows the same count. Anything else out of tolerance is ``"drifted"``: chain stretch, a phaser
not parked, a sensor wheel, or a jitter too large to tell. Each edge gets its own call; a cam's
call is made the same way on its common shift, and its sentence says which edges disagree.

>>> status_of(17.14, 0.05, tolerance_deg=3.0, trigger_pitch_deg=6.0, drive_tooth_deg=720 / 42)
('off-by-teeth', 1, 'drive')
>>> status_of(8.57, 2.0, tolerance_deg=3.0, trigger_pitch_deg=6.0, drive_tooth_deg=720 / 42)
('drifted', None, None)
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from .actuators.pwm import PwmTrace
from .analysis.actuator import ValveLimits, analyse_valve
from .analysis.phaser import PhaserLimits, with_phaser
from .errors import UsageError
from .profiles import (
    CamProfile,
    EngineProfile,
    edge_uncertainty,
    load_reference,
    profile_from_decode_json,
)
from .result import (
    CamComparison,
    CamEdge,
    CamResult,
    DecodeResult,
    EdgeComparison,
    Finding,
    Verdict,
)

#: tolerance when neither the command line nor the profile gives one, deg CA
# common practice, no source: a reinstalled belt or chain lands well inside +-3 deg CA
DEFAULT_TOLERANCE_DEG = 3.0
#: a whole-tooth count is called when the deviation lies within this many uncertainties of it
Z_MATCH = 3.0
#: ... and at least this many uncertainties from 0 and from the neighbouring counts
Z_FAR = 5.0
#: a refitted belt, chain or wheel lands within a few percent of a whole tooth (1 sigma)
# common practice, no source
REPEAT_FRACTION = 0.03
#: in the common-shift fit, each edge's distance counts at most this much, deg CA
FIT_CAP_DEG = 6.0
#: shifts whose fit is worse than the best by less than this per edge count as equally good
FIT_TIE_DEG = 0.1

IN_TIME = "in-time"
DRIFTED = "drifted"
OFF = "off-by-teeth"
NOT_MEASURED = "not-measured"


# --------------------------------------------------------------------------- small helpers


def wrap_deviation(x: float, period: float) -> float:
    """``x`` wrapped to (-period/2, period/2].

    >>> wrap_deviation(370.0, 720.0), wrap_deviation(-360.0, 720.0), wrap_deviation(190.0, 360.0)
    (-350.0, 360.0, -170.0)
    """
    half = period / 2.0
    y = math.fmod(x + half, period)
    if y <= 0:
        y += period
    return y - half


def _near(x: float, period: float) -> float:
    """Distance on the circle."""
    return abs(wrap_deviation(x, period))


def from_tdc(angle_after_ref: float, tdc_after_ref: float) -> float:
    """Angle from the nearest TDC of cylinder 1: negative = before (BTDC), positive = after.

    >>> from_tdc(100.0, 276.0), from_tdc(300.0, 276.0)
    (-176.0, 24.0)
    """
    return wrap_deviation(angle_after_ref - tdc_after_ref, 360.0)


def status_of(
    deviation_deg: float,
    uncertainty_deg: float,
    *,
    tolerance_deg: float,
    trigger_pitch_deg: float,
    drive_tooth_deg: float | None,
) -> tuple[str, int | None, str | None]:
    """(status, off_by_teeth, tooth_kind) of a deviation with its 1-sigma uncertainty.

    See the module docstring for the rule.

    >>> status_of(-6.01, 0.07, tolerance_deg=3.0, trigger_pitch_deg=6.0, drive_tooth_deg=17.14)
    ('off-by-teeth', -1, 'trigger')
    >>> status_of(1.2, 0.07, tolerance_deg=3.0, trigger_pitch_deg=6.0, drive_tooth_deg=17.14)
    ('in-time', None, None)
    """
    d = deviation_deg
    if not math.isfinite(d):
        return DRIFTED, None, None
    if abs(d) <= tolerance_deg:
        return IN_TIME, None, None
    u = uncertainty_deg if math.isfinite(uncertainty_deg) else math.inf
    families: list[tuple[str, float]] = []
    if drive_tooth_deg:
        families.append(("drive", drive_tooth_deg))
    if trigger_pitch_deg and math.isfinite(trigger_pitch_deg):
        families.append(("trigger", trigger_pitch_deg))
    for kind, size in families:
        k = round(d / size)
        if k == 0:
            continue
        ue = math.hypot(u, REPEAT_FRACTION * size)

        def z(count: int, size: float = size, ue: float = ue) -> float:
            return abs(d - count * size) / ue

        if z(k) > Z_MATCH:
            continue
        rivals = [z(0), z(k - 1), z(k + 1)]
        if kind == "trigger" and drive_tooth_deg:
            m = round(d / drive_tooth_deg)
            rivals.append(
                abs(d - m * drive_tooth_deg) / math.hypot(u, REPEAT_FRACTION * drive_tooth_deg)
            )
        if min(rivals) >= Z_FAR:
            return OFF, int(k), kind
    return DRIFTED, None, None


# --------------------------------------------------------------------------- the pattern fit


@dataclass(frozen=True)
class Mark:
    """An edge position for :func:`fit_shift`: its kind and where it is."""

    flank: str
    #: signal direction; None on the expected side means "either"
    direction: str | None
    #: position on the circle the fit works on (0..720 or 0..360)
    position: float


@dataclass(frozen=True)
class Fit:
    """The common shift of a measured pattern against an expected one, and the pairs it gives."""

    #: measured - expected, deg CA, in (-period/2, period/2]
    shift: float
    #: (expected index, measured index, residual after the shift)
    pairs: tuple[tuple[int, int, float], ...]
    #: sum of capped distances under the shift (smaller = better), deg CA
    cost: float
    period: float
    #: False when signal directions were ignored because they matched nothing
    directions_used: bool = True


def _kind_ok(e: Mark, m: Mark, use_direction: bool) -> bool:
    if e.flank != m.flank:
        return False
    return not use_direction or e.direction is None or e.direction == m.direction


def _wrapped_distance(x: np.ndarray, period: float) -> np.ndarray:
    half = period / 2.0
    return np.abs(np.mod(x + half, period) - half)


def _tables(
    expected: Sequence[Mark], measured: Sequence[Mark], use_dir: bool
) -> tuple[np.ndarray, np.ndarray]:
    """(measured - expected position, may-pair mask), each of shape (expected, measured)."""
    ep = np.array([e.position for e in expected], dtype=float)
    mp = np.array([m.position for m in measured], dtype=float)
    diff = mp[None, :] - ep[:, None]
    ok = np.array(
        [[_kind_ok(e, m, use_dir) for m in measured] for e in expected], dtype=bool
    ).reshape(len(expected), len(measured))
    return diff, ok


def _cost(diff: np.ndarray, ok: np.ndarray, shift: float, period: float) -> float:
    """Sum over both sides of each edge's distance to its nearest partner, capped."""
    dist = np.where(ok, _wrapped_distance(diff - shift, period), np.inf)
    cap = FIT_CAP_DEG
    by_expected = np.minimum(dist.min(axis=1), cap) if dist.shape[1] else np.full(len(dist), cap)
    by_measured = (
        np.minimum(dist.min(axis=0), cap) if dist.shape[0] else np.full(dist.shape[1], cap)
    )
    return float(by_expected.sum() + by_measured.sum())


#: at most this many candidate shifts are scored (a cam channel with very many edges)
MAX_CANDIDATES = 2000


def fit_shift(expected: Sequence[Mark], measured: Sequence[Mark], period: float) -> Fit:
    """The shift under which ``measured`` best fits ``expected``, and the edge pairs under it.

    >>> exp = [Mark("leading", "rising", 100.0), Mark("leading", "rising", 130.0)]
    >>> got = [Mark("leading", "rising", 117.1), Mark("leading", "rising", 147.2)]
    >>> f = fit_shift(exp, got, 720.0)
    >>> round(f.shift, 2), [(i, j) for i, j, _ in f.pairs]
    (17.15, [(0, 0), (1, 1)])
    """
    use_dir = any(_kind_ok(e, m, True) for e in expected for m in measured)
    diff, ok = _tables(expected, measured, use_dir)
    proposals = diff[ok]
    if proposals.size > MAX_CANDIDATES:
        # every true shift pairs one of the first expected edges with some measured edge
        rows = max(1, MAX_CANDIDATES // max(1, len(measured)))
        proposals = diff[:rows][ok[:rows]]
    half = period / 2.0
    candidates = np.unique(np.round(np.mod(proposals + half, period) - half, 6))
    candidates = np.concatenate(([0.0], candidates))
    scored = sorted(
        (_cost(diff, ok, float(c), period), abs(float(c)), float(c)) for c in candidates
    )
    best = scored[0][0]
    tie = FIT_TIE_DEG * (len(expected) + len(measured))
    shift = min((c for c in scored if c[0] <= best + tie), key=lambda c: (c[1], c[0]))[2]
    # refine: mean residual of the edges that fit under it
    res = np.mod(diff - shift + half, period) - half
    near = ok & (np.abs(res) < FIT_CAP_DEG)
    if np.any(near):
        shift = wrap_deviation(shift + float(np.mean(res[near])), period)
    pairs = _assign(expected, measured, shift, period, use_dir)
    return Fit(shift, pairs, _cost(diff, ok, shift, period), period, use_dir)


def _assign(
    expected: Sequence[Mark], measured: Sequence[Mark], shift: float, period: float, use_dir: bool
) -> tuple[tuple[int, int, float], ...]:
    """Pair each expected edge with at most one measured edge, nearest first after the shift.

    A pair must lie closer than about half the spacing of expected edges of its kind (at least
    ``2 * FIT_CAP_DEG``, at most a quarter of the circle).
    """
    limit = []
    for i, e in enumerate(expected):
        gaps = [_near(o.position - e.position, period) for j, o in enumerate(expected)
                if j != i and o.flank == e.flank and o.direction == e.direction]
        spacing = min(gaps) if gaps else period
        limit.append(min(period / 4.0, max(2.0 * FIT_CAP_DEG, 0.45 * spacing)))
    options = []
    for i, e in enumerate(expected):
        for j, m in enumerate(measured):
            if _kind_ok(e, m, use_dir):
                r = wrap_deviation(m.position - shift - e.position, period)
                if abs(r) <= limit[i]:
                    options.append((abs(r), i, j, r))
    options.sort()
    used_e: set[int] = set()
    used_m: set[int] = set()
    pairs = []
    for _, i, j, r in options:
        if i in used_e or j in used_m:
            continue
        used_e.add(i)
        used_m.add(j)
        pairs.append((i, j, r))
    return tuple(sorted(pairs))


# --------------------------------------------------------------------------- one cam


@dataclass(frozen=True)
class _Side:
    """Positions of a profile cam and a decoded cam on the circle they are compared on."""

    period: float
    expected: tuple[Mark, ...]
    #: the profile edge each expected mark stands for (index into profile cam edges)
    expected_index: tuple[int, ...]
    measured: tuple[Mark, ...]
    #: the decoded edge each measured mark stands for (index into the cam's edges)
    measured_index: tuple[int, ...]


def _measured_ok(edge: CamEdge) -> bool:
    return edge.angle.n > 0 and math.isfinite(edge.angle.mean)


def _sides(pc: CamProfile, cam: CamResult) -> _Side:
    edges = [(j, e) for j, e in enumerate(cam.edges) if _measured_ok(e)]
    cycle = pc.frame == "cycle" and bool(edges) and all(e.revolution is not None for _, e in edges)
    period = 720.0 if cycle else 360.0
    measured = tuple(
        Mark(e.flank, e.direction, (e.cycle_angle if cycle else e.angle.mean) % period)  # type: ignore[operator]
        for _, e in edges
    )
    exp: list[Mark] = []
    idx: list[int] = []
    for i, e in enumerate(pc.edges):
        mark = Mark(e.flank, e.direction, e.angle_deg % period)
        if any(
            o.flank == mark.flank and o.direction == mark.direction
            and _near(o.position - mark.position, period) < 0.5
            for o in exp
        ):
            continue  # the same edge of the other revolution, compared per revolution
        exp.append(mark)
        idx.append(i)
    return _Side(period, tuple(exp), tuple(idx), measured, tuple(j for j, _ in edges))


@dataclass(frozen=True)
class _CamWork:
    """A profile cam paired with a decoded cam, fitted, before the capture-wide frame choice."""

    profile: CamProfile
    cam: CamResult
    side: _Side
    fit: Fit


def _tolerance(pc: CamProfile, profile: EngineProfile, given: float | None) -> float:
    if given is not None:
        return given
    if pc.tolerance_deg is not None:
        return pc.tolerance_deg
    if profile.tolerance_deg is not None:
        return profile.tolerance_deg
    return DEFAULT_TOLERANCE_DEG


def _teeth(pc: CamProfile, profile: EngineProfile, given: int | None) -> int | None:
    if given is not None:
        return given
    if pc.sprocket_teeth is not None:
        return pc.sprocket_teeth
    return profile.drive.sprocket_teeth if profile.drive is not None else None


def _phaser_against(cam: CamResult, pc: CamProfile, result: DecodeResult) -> CamResult:
    """The cam's phaser analysis again, now on the profile's expected angles (the trace becomes
    the deviation from them) and with the profile's phaser limits."""
    expected = [e.comparison.expected_deg if e.comparison is not None else None for e in cam.edges]
    limits = PhaserLimits.from_mapping(dict(pc.phaser)) if pc.phaser else None
    parked = cam.phaser.expect_parked if cam.phaser is not None else False
    cam = with_phaser(cam, result.crank.rpm_trace, limits, parked, cam_label(pc.name), expected)
    act = cam.actuator
    if act is not None and act.time_s:
        # the valve command again, against the profile's valve limits and with the cam's name
        hz = np.asarray(act.hz)
        period = 1.0 / hz
        trace = PwmTrace(np.asarray(act.time_s), period, np.asarray(act.duty_pct) / 100.0 * period,
                         act.pwm_hz)
        valve = ValveLimits.from_mapping(dict(pc.valve)) if pc.valve else None
        again = analyse_valve(trace, act.channel, act.drive, act.drive_how, cam.phaser,
                              cam.channel, act.pairing, cam_label(pc.name), valve)
        cam = replace(cam, actuator=again)
    return cam


def cam_label(name: str) -> str:
    """How a cam is named in a sentence.

    >>> cam_label("intake"), cam_label("cam_exhaust")
    ('intake cam', 'cam exhaust')
    """
    text = name.replace("_", " ").strip()
    return text if "cam" in text.lower() else f"{text} cam"


def _plural(n: int, word: str) -> str:
    if n == 1:
        return f"{n} {word}"
    return f"{n} {word[:-5]}teeth" if word.endswith("tooth") else f"{n} {word}s"


def _late(d: float) -> tuple[str, str]:
    return ("late", "retarded") if d > 0 else ("early", "advanced")


def sentence(
    name: str,
    status: str,
    deviation_deg: float,
    *,
    off_by_teeth: int | None = None,
    tooth_kind: str | None = None,
    tolerance_deg: float = DEFAULT_TOLERANCE_DEG,
    drive_teeth: float | None = None,
    trigger_teeth: float | None = None,
) -> str:
    """The call for one cam in the trade's words.

    >>> sentence("intake", "off-by-teeth", 17.14, off_by_teeth=1, tooth_kind="drive")
    'intake cam 1 drive tooth late (17.1 deg CA retarded)'
    >>> sentence("exhaust", "in-time", -0.42)
    'exhaust cam in time (-0.4 deg CA, tolerance ±3 deg CA)'
    """
    label = cam_label(name)
    d = deviation_deg
    if status == NOT_MEASURED:
        return f"{label}: not measured (no decoded cam channel matched it)"
    if status == IN_TIME:
        return f"{label} in time ({d:+.1f} deg CA, tolerance ±{tolerance_deg:g} deg CA)"
    late, retarded = _late(d)
    if status == OFF and off_by_teeth is not None:
        word = "drive tooth" if tooth_kind == "drive" else "crank trigger tooth"
        return f"{label} {_plural(abs(off_by_teeth), word)} {late} ({abs(d):.1f} deg CA {retarded})"
    if drive_teeth is not None:
        size = f"{drive_teeth:+.2f} drive teeth"
    elif trigger_teeth is not None:
        size = f"{trigger_teeth:+.2f} trigger teeth"
    else:
        size = "no whole tooth"
    return (
        f"{label} drifted {abs(d):.1f} deg CA {late} ({retarded}; {size}, not a whole tooth by "
        "the evidence)"
    )


#: SAE J2012 crankshaft position - camshaft position correlation codes by (bank, sensor letter)
# source: SAE J2012 (Diagnostic Trouble Code Definitions), P0016-P0019 "Crankshaft Position -
# Camshaft Position Correlation" Bank 1 Sensor A, Bank 1 Sensor B, Bank 2 Sensor A, Bank 2 Sensor B
CORRELATION_CODES = {(1, "A"): "P0016", (1, "B"): "P0017", (2, "A"): "P0018", (2, "B"): "P0019"}


def _cam_outcome(
    work: _CamWork,
    frame_turn: float,
    profile: EngineProfile,
    result: DecodeResult,
    tolerance: float | None,
    sprocket: int | None,
) -> tuple[CamResult, dict[str, Any], list[Finding]]:
    """The compared cam (edges with comparisons) and its summary figures."""
    pc, cam, side, fit = work.profile, work.cam, work.side, work.fit
    period = side.period
    tol = _tolerance(pc, profile, tolerance)
    teeth = _teeth(pc, profile, sprocket)
    drive_tooth = 720.0 / teeth if teeth else None
    pitch = result.crank.pitch_deg
    rpm = _rpm(result)
    rate = result.capture.sample_rate
    shift = wrap_deviation(fit.shift + (frame_turn if period == 720.0 else 0.0), period)
    tdc = profile.tdc_after_reference_deg
    findings: list[Finding] = []
    if not fit.directions_used:
        findings.append(
            Finding(
                "warning",
                "cam-signal-inverted",
                f"cam {cam.channel!r}: every edge has the other signal direction than "
                f"{profile.name!r} expects (inverted signal or swapped tooth level); edges were "
                "matched on their flanks alone",
            )
        )
    new_edges = list(cam.edges)
    devs: list[float] = []
    uncs: list[float] = []
    calls: list[tuple[str, int | None, str | None]] = []
    for i, j, r in fit.pairs:
        pe = pc.edges[side.expected_index[i]]
        k = side.measured_index[j]
        edge = cam.edges[k]
        d = wrap_deviation(shift + r, period)
        u = math.hypot(
            edge_uncertainty(edge.angle.std, edge.angle.n, rpm, rate), pe.uncertainty_deg
        )
        status, off, kind = status_of(
            d, u, tolerance_deg=tol, trigger_pitch_deg=pitch, drive_tooth_deg=drive_tooth
        )
        exp_pos = (side.expected[i].position - (frame_turn if period == 720.0 else 0.0)) % period
        expected_deg = exp_pos % 360.0
        comparison = EdgeComparison(
            expected_deg=expected_deg,
            expected_revolution=int(exp_pos // 360.0) if period == 720.0 else None,
            deviation_deg=d,
            deviation_trigger_teeth=d / pitch,
            deviation_drive_teeth=d / drive_tooth if drive_tooth else None,
            uncertainty_deg=u,
            status=status,
            off_by_teeth=off,
            tooth_kind=kind,
            tolerance_deg=tol,
            period_deg=period,
            from_tdc_deg=from_tdc(edge.angle.mean, tdc) if tdc is not None else None,
            expected_from_tdc_deg=from_tdc(expected_deg, tdc) if tdc is not None else None,
        )
        new_edges[k] = replace(edge, comparison=comparison)
        devs.append(d)
        uncs.append(u)
        calls.append((status, off, kind))
    matched_e = {side.expected_index[i] for i, _, _ in fit.pairs}
    missing = [e for n, e in enumerate(pc.edges) if n not in matched_e and n in side.expected_index]
    if missing:
        where = ", ".join(f"{e.flank} at {e.angle_deg:.1f}" for e in missing)
        findings.append(
            Finding(
                "warning",
                "expected-edge-missing",
                f"cam {cam.channel!r}: {len(missing)} expected edge(s) of {pc.name!r} were not "
                f"found near their place ({where} deg CA)",
            )
        )
    matched_m = {side.measured_index[j] for _, j, _ in fit.pairs}
    extra = [e for k, e in enumerate(cam.edges) if k not in matched_m and _measured_ok(e)]
    if extra:
        where = ", ".join(f"{e.flank} {e.direction} at {e.angle.mean:.1f}" for e in extra)
        findings.append(
            Finding(
                "info",
                "edge-not-expected",
                f"cam {cam.channel!r}: {len(extra)} measured edge(s) have no counterpart in "
                f"{pc.name!r} ({where} deg CA)",
            )
        )
    n = len(devs)
    if n:
        mean = sum(devs) / n
        var = sum((x - mean) ** 2 for x in devs) / (n - 1) if n > 1 else 0.0
        u_cam = math.sqrt(sum(x * x for x in uncs) / n / n + var / n)
    else:
        mean, u_cam = math.nan, math.nan
    summary = {
        "tol": tol,
        "teeth": teeth,
        "drive_tooth": drive_tooth,
        "pitch": pitch,
        "shift": mean,
        "u": u_cam,
        "period": period,
        "matched": n,
        "expected": len(side.expected),
        "calls": calls,
    }
    return replace(cam, edges=tuple(new_edges)), summary, findings


def _rpm(result: DecodeResult) -> float:
    for x in (result.crank.rpm.mean, result.crank.rpm.max):
        if isinstance(x, int | float) and math.isfinite(x) and x > 0:
            return float(x)
    return 0.0


# --------------------------------------------------------------------------- pairing cams


def _hint_matches(pc: CamProfile, cam: CamResult, channels: Sequence[str]) -> bool:
    hint = pc.channel
    if hint is None:
        return pc.name == cam.channel
    if hint == cam.channel:
        return True
    if hint.isdigit():
        i = int(hint)
        return 0 <= i < len(channels) and channels[i] == cam.channel
    return False


def _pair_cams(
    profile: EngineProfile, result: DecodeResult
) -> tuple[list[tuple[CamProfile, CamResult | None]], dict[str, str]]:
    """Each profile cam with its decoded cam (or None), and how each pairing was made."""
    channels = result.capture.channels
    free = [c for c in result.cams if any(_measured_ok(e) for e in c.edges)]
    pairs: dict[str, CamResult | None] = {}
    how: dict[str, str] = {}
    for pc in profile.cams:
        hit = next((c for c in free if _hint_matches(pc, c, channels)), None)
        if hit is not None:
            pairs[pc.name] = hit
            free.remove(hit)
            how[pc.name] = f"{hit.channel}: by the channel the profile names"
    options = []
    for pc in profile.cams:
        if pc.name in pairs:
            continue
        for c in free:
            side = _sides(pc, c)
            fit = fit_shift(side.expected, side.measured, side.period)
            per_edge = fit.cost / max(1, len(side.expected) + len(side.measured))
            wrong_sensor = pc.sensor is not None and pc.sensor != c.sensor
            options.append((wrong_sensor, per_edge, pc.name, c.channel))
    options.sort()
    for *_, name, channel in options:
        if name in pairs:
            continue
        cam = next((c for c in free if c.channel == channel), None)
        if cam is None:
            continue
        pairs[name] = cam
        free.remove(cam)
        how[name] = f"{cam.channel}: its edge pattern fits best"
    return [(pc, pairs.get(pc.name)) for pc in profile.cams], how


# --------------------------------------------------------------------------- compare


def _check_args(sprocket_teeth: int | None, tolerance_deg: float | None) -> None:
    if sprocket_teeth is not None and (
        isinstance(sprocket_teeth, bool) or not isinstance(sprocket_teeth, int)
        or not 2 <= sprocket_teeth <= 400
    ):
        raise UsageError(
            f"sprocket teeth {sprocket_teeth!r} is not a tooth count; give the cam sprocket's "
            "teeth, a whole number from 2 to 400 (e.g. 42)"
        )
    if tolerance_deg is not None and not (
        isinstance(tolerance_deg, int | float) and math.isfinite(tolerance_deg)
        and 0 < tolerance_deg <= 90
    ):
        raise UsageError(
            f"tolerance {tolerance_deg!r} deg CA is not usable; give a positive angle up to 90, "
            "e.g. 3"
        )


def _as_profile(reference: Any) -> EngineProfile:
    if isinstance(reference, EngineProfile):
        return reference
    if isinstance(reference, Mapping):
        return profile_from_decode_json(reference, "reference")
    if isinstance(reference, str | os.PathLike):
        return load_reference(reference)
    raise UsageError(
        f"a reference of type {type(reference).__name__} cannot be compared with; give an "
        "engine profile, a profile file, or the JSON of a decode"
    )


def _check_wheel(profile: EngineProfile, result: DecodeResult) -> None:
    if profile.wheel is not None and profile.wheel != result.crank.wheel:
        raise UsageError(
            f"the capture shows a {result.crank.wheel} crank wheel but {profile.name!r} is for a "
            f"{profile.wheel} wheel; compare with a profile or capture of this engine"
        )


def compare(
    result: DecodeResult,
    reference: EngineProfile | Mapping[str, Any] | str | os.PathLike[str],
    *,
    sprocket_teeth: int | None = None,
    tolerance_deg: float | None = None,
) -> DecodeResult:
    """``result`` held against ``reference``: every matched cam edge gets an
    :class:`~toothcomb.decoders.result.EdgeComparison`, the result a
    :class:`~toothcomb.decoders.result.Verdict`.

    ``reference`` is an :class:`~toothcomb.decoders.profiles.EngineProfile`, the JSON (as a
    dict) of a decode of a known-good capture, or a path / shipped profile name for
    :func:`~toothcomb.decoders.profiles.load_reference`. ``sprocket_teeth`` and
    ``tolerance_deg`` override the profile's. The decode itself is not changed.
    """
    _check_args(sprocket_teeth, tolerance_deg)
    profile = _as_profile(reference)
    _check_wheel(profile, result)
    paired, how = _pair_cams(profile, result)
    findings: list[Finding] = []
    work: list[_CamWork] = []
    for pc, cam in paired:
        if cam is None:
            findings.append(
                Finding(
                    "warning",
                    "cam-not-found",
                    f"{cam_label(pc.name)} of {profile.name!r} is not among the decoded cams "
                    f"({', '.join(c.channel for c in result.cams) or 'none'}); give its channel "
                    "with --cam",
                )
            )
            continue
        side = _sides(pc, cam)
        work.append(_CamWork(pc, cam, side, fit_shift(side.expected, side.measured, side.period)))
    # which revolution the decode calls 0 is a convention: turn it by 360 when that makes the
    # cams' shifts smaller (ties keep the decode's labels)
    cycle_shifts = [w.fit.shift for w in work if w.side.period == 720.0]
    turn = 0.0
    if cycle_shifts:
        keep = sum(abs(s) for s in cycle_shifts)
        turned = sum(abs(wrap_deviation(s + 360.0, 720.0)) for s in cycle_shifts)
        if turned < keep - 1e-9:
            turn = 360.0
            findings.append(
                Finding(
                    "info",
                    "cycle-labels-turned",
                    "the decode's revolution 0 is the reference's revolution 1 (the cam that "
                    "fixes the cycle phase moved across a reference event); angles were compared "
                    "with the revolutions swapped",
                )
            )
    outcomes: dict[str, tuple[CamResult, dict[str, Any]]] = {}
    for w in work:
        new_cam, summary, f = _cam_outcome(w, turn, profile, result, tolerance_deg, sprocket_teeth)
        new_cam = _phaser_against(new_cam, w.profile, result)
        outcomes[w.profile.name] = (new_cam, summary)
        findings.extend(f)
    cam_calls = _cam_calls(outcomes)
    # a crank trigger wheel a tooth off moves every cam alike
    compared = [n for n, (_, s) in outcomes.items() if s["matched"]]
    trigger = {cam_calls[n][1:] for n in compared if cam_calls[n][2] == "trigger"}
    trigger_ok = len(compared) <= 1 or (
        len(trigger) == 1 and all(cam_calls[n][2] == "trigger" for n in compared)
    )
    if not trigger_ok:
        outcomes = {n: (_drop_trigger(c), s) for n, (c, s) in outcomes.items()}
        cam_calls = {
            n: (DRIFTED, None, None) if call[2] == "trigger" else call
            for n, call in cam_calls.items()
        }
    comparisons: list[CamComparison] = []
    sentences: list[str] = []
    context: list[str] = []
    for pc, _cam in paired:
        if pc.name not in outcomes:
            tol = _tolerance(pc, profile, tolerance_deg)
            comparisons.append(
                CamComparison(
                    pc.name, None, math.nan, math.nan, math.nan, None, NOT_MEASURED, None, None,
                    tol, _teeth(pc, profile, sprocket_teeth), 720.0, 0, len(pc.edges),
                    sentence(pc.name, NOT_MEASURED, math.nan),
                )
            )
            sentences.append(comparisons[-1].sentence)
            continue
        new_cam, s = outcomes[pc.name]
        status, off, kind = cam_calls[pc.name]
        d = s["shift"]
        drive_teeth = d / s["drive_tooth"] if s["drive_tooth"] else None
        text = sentence(
            pc.name, status, d, off_by_teeth=off, tooth_kind=kind, tolerance_deg=s["tol"],
            drive_teeth=drive_teeth, trigger_teeth=d / s["pitch"],
        )
        text += _disagreement(new_cam, status, off)
        code = None
        if status != IN_TIME and pc.bank is not None and pc.sensor_letter is not None:
            code = CORRELATION_CODES.get((pc.bank, pc.sensor_letter))
        comparisons.append(
            CamComparison(
                name=pc.name,
                channel=new_cam.channel,
                shift_deg=d,
                uncertainty_deg=s["u"],
                shift_trigger_teeth=d / s["pitch"],
                shift_drive_teeth=drive_teeth,
                status=status,
                off_by_teeth=off,
                tooth_kind=kind,
                tolerance_deg=s["tol"],
                sprocket_teeth=s["teeth"],
                period_deg=s["period"],
                matched=s["matched"],
                expected=s["expected"],
                sentence=text,
                correlation_code=code,
            )
        )
        sentences.append(text)
    sentences.extend(_together(comparisons))
    rpm = _rpm(result)
    r = result.crank.rpm
    spread = (
        f", {r.min:.0f}-{r.max:.0f} rpm" if math.isfinite(r.min) and math.isfinite(r.max) else ""
    )
    sentences.append(f"measured at {rpm:.0f} rpm mean engine speed{spread}")
    bad = [c for c in comparisons if c.status in (OFF, DRIFTED)]
    if bad:
        codes = [f"{cam_label(c.name)}: {c.correlation_code}" for c in bad if c.correlation_code]
        context.append(
            "SAE J2012 context: a cam this far from the crank is what the crankshaft position - "
            "camshaft position correlation codes P0016-P0019 (by bank and sensor A/B) report"
            + (f" ({'; '.join(codes)})" if codes else "")
        )
    by_channel = {c.channel: c for c, _ in outcomes.values()}
    new_cams = tuple(by_channel.get(cam.channel, cam) for cam in result.cams)
    paired_channels = {cam.channel for _, cam in paired if cam is not None}
    for cam in result.cams:
        if cam.channel not in paired_channels:
            findings.append(
                Finding(
                    "info",
                    "cam-not-in-profile",
                    f"cam channel {cam.channel!r} has no cam in {profile.name!r}, so it was not "
                    "compared",
                )
            )
    verdict = Verdict(
        reference=profile.source or profile.name,
        reference_kind=profile.kind,
        profile_name=profile.name,
        tolerance_deg=tolerance_deg if tolerance_deg is not None else (
            profile.tolerance_deg if profile.tolerance_deg is not None else DEFAULT_TOLERANCE_DEG
        ),
        sprocket_teeth=sprocket_teeth if sprocket_teeth is not None else (
            profile.drive.sprocket_teeth if profile.drive is not None else None
        ),
        drive=profile.drive.kind if profile.drive is not None else None,
        tdc_after_reference_deg=profile.tdc_after_reference_deg,
        rpm=rpm,
        cams=tuple(comparisons),
        sentences=tuple(sentences),
        context=tuple(context),
        findings=tuple(findings),
    )
    choices = dict(result.choices)
    for name, text in how.items():
        choices[f"against {cam_label(name)}"] = text
    actuators = {c.actuator.channel: c.actuator for c in new_cams if c.actuator is not None}
    new_acts = tuple(actuators.get(a.channel, a) for a in result.actuators)
    return replace(result, cams=new_cams, verdict=verdict, choices=choices, actuators=new_acts)


def _cam_calls(
    outcomes: Mapping[str, tuple[CamResult, dict[str, Any]]],
) -> dict[str, tuple[str, int | None, str | None]]:
    calls = {}
    for name, (_cam, s) in outcomes.items():
        if not s["matched"]:
            calls[name] = (NOT_MEASURED, None, None)
            continue
        calls[name] = status_of(
            s["shift"], s["u"], tolerance_deg=s["tol"], trigger_pitch_deg=s["pitch"],
            drive_tooth_deg=s["drive_tooth"],
        )
    return calls


def _drop_trigger(cam: CamResult) -> CamResult:
    """The cam with its trigger-tooth calls turned into "drifted"."""
    edges = []
    for e in cam.edges:
        c = e.comparison
        if c is not None and c.tooth_kind == "trigger":
            c = replace(c, status=DRIFTED, off_by_teeth=None, tooth_kind=None)
            e = replace(e, comparison=c)
        edges.append(e)
    return replace(cam, edges=tuple(edges))


def _disagreement(cam: CamResult, status: str, off: int | None) -> str:
    odd = []
    for e in cam.edges:
        c = e.comparison
        if c is not None and (c.status != status or c.off_by_teeth != off):
            window = "W?" if e.window is None else f"W{e.window}"
            odd.append(f"{window} {e.flank} {c.status}")
    if not odd:
        return ""
    return f"; but {', '.join(odd)}"


def _together(cams: Sequence[CamComparison]) -> list[str]:
    """What the cams tell together (two or more cams off by the same whole teeth)."""
    measured = [c for c in cams if c.status != NOT_MEASURED]
    if len(measured) < 2 or any(c.status != OFF for c in measured):
        return []
    kinds = {(c.off_by_teeth, c.tooth_kind) for c in measured}
    if len(kinds) != 1:
        return []
    off, kind = next(iter(kinds))
    assert off is not None
    late = "late" if off > 0 else "early"
    if kind == "trigger":
        return [
            f"every cam is {_plural(abs(off), 'crank trigger tooth')} {late}: the crank trigger "
            "wheel (or the crank sensor's mounting) sits a tooth out, not the cam drive"
        ]
    return [
        f"every cam is {_plural(abs(off), 'drive tooth')} {late}: the drive moved on the crank "
        "sprocket, or every cam sprocket by the same count"
    ]


__all__ = [
    "DEFAULT_TOLERANCE_DEG",
    "REPEAT_FRACTION",
    "Z_FAR",
    "Z_MATCH",
    "Fit",
    "Mark",
    "cam_label",
    "compare",
    "fit_shift",
    "from_tdc",
    "sentence",
    "status_of",
    "wrap_deviation",
]
