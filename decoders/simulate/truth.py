"""The exact answer of a simulated capture, as a JSON-able dict.

Times are seconds from the first sample; angles are deg CA (see :mod:`.scenario` for the angle
convention). The crank reference event follows DESIGN.md: tooth 1's physical leading flank for a
Hall sensor (its 50 % point, ``tau * ln 2`` later, is given too), tooth 1's centre for a VR
sensor. A cam event's ``angle_after_ref_deg`` is the true engine angle after the most recent
crank reference event, ``0 <= a < 360``; ``revolution`` counts from the reference whose cycle
angle is below 360 (0) or above (1); ``cycle_deg`` is the engine angle of the event modulo 720.

Keys (abridged): ``sample_rate``, ``duration_s``, ``n_samples``, ``instrument``, ``channels``
(name, role, sensor and settings, gain, polarity, ...), ``crank`` (wheel, N, M, pitch_deg, teeth,
sensor, polarity, event_direction, reference_angle_deg, reference_times_s,
reference_50pct_times_s, tooth_events), ``rpm`` (instantaneous min/max, mean over time),
``rpm_per_revolution`` (from one reference event to the next), ``cams`` (per
cam: edges at the starting phase, every event, phaser moves and trajectory), ``disturbances``
(spike times, dropouts, runt and damaged-tooth times).
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np

from .engine import EngineModel, Source, build_model
from .scenario import ConstantSpeed, HallSensor, Scenario  # noqa: F401  (doctest)
from .speed import Motion
from .wheel import RUNT

#: events solved per piece of the time axis (bounds memory on long captures)
EVENTS_PER_PIECE = 200_000

_CONVENTIONS = {
    "time": "seconds from the first sample; sample n is at n / sample_rate",
    "angle": "crank degrees; theta = 0 at firing TDC of cylinder 1, cycle = theta mod 720",
    "reference": "hall: leading flank of tooth 1 (first tooth after the gap); vr: tooth 1 centre",
    "cam_phase": "positive = retarded = events later",
    "angle_after_ref_deg": "true engine angle after the most recent crank reference, 0..360",
    "revolution": "0 after the reference at cycle angle reference_cycle_deg, 1 after the other",
}


def _floats(a: np.ndarray) -> list[float]:
    return [float(v) for v in np.asarray(a, dtype=float)]


def _pieces(model: EngineModel, t_end: float, per_rev: float) -> list[tuple[float, float]]:
    """Cut [0, t_end) so that each piece holds at most EVENTS_PER_PIECE events."""
    revs_per_s = model.omega_max / 360.0
    span = EVENTS_PER_PIECE / max(per_rev * revs_per_s, 1e-9)
    n = max(1, math.ceil(t_end / span))
    edges = np.linspace(0.0, t_end, n + 1)
    return list(zip(edges[:-1].tolist(), edges[1:].tolist(), strict=True))


def _events(
    model: EngineModel, src: Source, base: np.ndarray, t_end: float
) -> tuple[np.ndarray, ...]:
    """(times, wheel angles, index into base) of every event in [0, t_end)."""
    per_rev = base.size * 360.0 / src.period
    ts, angs, js = [], [], []
    for a, b in _pieces(model, t_end, per_rev):
        t, ang, j = src.events(base, a, b)
        ts.append(t)
        angs.append(ang)
        js.append(j)
    return np.concatenate(ts), np.concatenate(angs), np.concatenate(js).astype(int)


def _times_anywhere(src: Source, angles: np.ndarray, t_lo: float, t_hi: float) -> np.ndarray:
    """Times at which the wheel reaches ``angles`` even a little outside [t_lo, t_hi]; NaN for
    angles the wheel never reaches (an engine that coasts to a stop)."""
    if angles.size == 0:
        return np.empty(0)
    lo, hi = float(np.min(angles)), float(np.max(angles))
    step = max(t_hi - t_lo, 1e-3)
    for _ in range(60):
        if float(src.angle(np.array(t_lo))) <= lo:
            break
        t_lo -= step
        step *= 2
    step = max(t_hi - t_lo, 1e-3)
    for _ in range(60):
        if float(src.angle(np.array(t_hi))) >= hi:
            break
        t_hi += step
        step *= 2
    top = float(src.angle(np.array(t_hi)))
    t = src.times_at(angles, t_lo, t_hi)
    return np.where(angles <= top, t, np.nan)


def _direction(rising: bool) -> str:
    return "rising" if rising else "falling"


def _channel_of(sc: Scenario, source: str) -> dict[str, Any] | None:
    for c in sc.resolved_channels():
        if c.source == source:
            return {"name": c.label, "reversed": c.reversed}
    return None


def _rpm_stats(motion: Motion, t_end: float, omega_max: float) -> dict[str, float]:
    if motion.a > 0:
        dt = min(1e-3, motion.ripple_period / max(omega_max, 1e-9) / 64.0)
    else:
        dt = 1e-3
    n = max(2, math.ceil(t_end / dt) + 1)
    lo, hi = math.inf, -math.inf
    step = t_end / (n - 1)
    for k0 in range(0, n, 1 << 20):
        t = np.arange(k0, min(n, k0 + (1 << 20))) * step
        r = motion.rpm(t)
        lo, hi = min(lo, float(r.min())), max(hi, float(r.max()))
    th = motion.angle(np.array([0.0, t_end]))
    mean = float(th[1] - th[0]) / (6.0 * t_end)
    return {"min": lo, "mean": mean, "max": hi}


def _rpm_per_rev(refs: list[float]) -> dict[str, float] | None:
    """Speed averaged over each whole revolution (between crank reference events)."""
    if len(refs) < 2:
        return None
    r = 60.0 / np.diff(np.asarray(refs))
    return {"min": float(r.min()), "mean": float(r.mean()), "max": float(r.max()), "n": int(r.size)}


def _crank_truth(sc: Scenario, model: EngineModel, teeth: bool) -> dict[str, Any]:
    src = model.crank
    g = src.g
    T = sc.duration_s
    hall = isinstance(sc.crank.sensor, HallSensor)
    ch = _channel_of(sc, "crank")
    reversed_ = bool(ch and ch["reversed"])
    k1 = int(np.flatnonzero(g.number == 1)[0])
    ref = float(g.start[k1] if hall else g.centre[k1]) % 360.0
    ref_t, _, _ = _events(model, src, np.array([ref]), T)
    out: dict[str, Any] = {
        "channel": ch["name"] if ch else None,
        "sensor": "hall" if hall else "vr",
        "wheel": sc.crank.label,
        "N": sc.crank.positions,
        "M": sc.crank.missing,
        "pitch_deg": sc.crank.pitch_deg,
        "tooth1_deg": sc.crank.tooth1_deg % 360.0,
        "polarity": "reversed" if reversed_ else "normal",
    }
    if hall:
        assert isinstance(sc.crank.sensor, HallSensor)
        s = sc.crank.sensor
        out["tooth_level"] = s.tooth_level
        out["event_direction"] = _direction(s.tooth_level == "high")
        out["tau_s"] = s.tau_s
    else:
        out["event_direction"] = _direction(reversed_)
    out["reference_angle_deg"] = ref
    out["reference_cycle_deg"] = ref % 360.0
    out["reference_times_s"] = _floats(ref_t)
    if hall:
        lag = sc.crank.sensor.tau_s * math.log(2.0)
        out["reference_50pct_times_s"] = _floats(ref_t + lag)
    out["revolutions"] = max(0, int(ref_t.size) - 1)
    damaged = {d.tooth: d for d in sc.crank.damaged}
    table = []
    for k in range(1, sc.crank.n_teeth + 1):
        d = damaged.get(k)
        idx = np.flatnonzero(g.number == k)
        row: dict[str, Any] = {"tooth": k, "state": d.kind if d else "ok"}
        if idx.size:
            i = int(idx[0])
            row.update(
                centre_deg=float(g.centre[i]) % 360.0,
                leading_deg=float(g.start[i]),
                trailing_deg=float(g.end[i]) % 360.0,
                width_deg=float(g.end[i] - g.start[i]),
                vr_amplitude=float(g.vr_amp[i]),
            )
        else:
            row["centre_deg"] = (sc.crank.tooth1_deg + sc.crank.offsets_deg[k - 1]) % 360.0
        table.append(row)
    out["teeth"] = table
    if teeth:
        real = np.flatnonzero(g.number != RUNT)
        t_c, a_c, j = _events(model, src, g.centre[real] % 360.0, T)
        i = real[j]
        half = (g.end[i] - g.start[i]) / 2.0
        t_lead = _times_anywhere(src, a_c - half, 0.0, T)
        t_trail = _times_anywhere(src, a_c + half, 0.0, T)
        out["tooth_events"] = {
            "tooth": [int(v) for v in g.number[i]],
            "centre_s": _floats(t_c),
            "leading_s": _floats(t_lead),
            "trailing_s": _floats(t_trail),
            "rpm": _floats(model.motion.rpm(t_c)) if t_c.size else [],
        }
    return out


def _cam_truth(sc: Scenario, model: EngineModel, ref: float, name: str) -> dict[str, Any]:
    cam = sc.cam(name)
    src = model.cams[name]
    assert src.phase is not None
    g = src.g
    T = sc.duration_s
    hall = isinstance(cam.sensor, HallSensor)
    ch = _channel_of(sc, name)
    reversed_ = bool(ch and ch["reversed"])
    ref0 = ref % 360.0
    theta0 = float(model.motion.angle(np.array(0.0)))

    # distinct edges of the pattern: (angle, flank, rising, window)
    edges: list[tuple[float, str, bool, int]] = []
    for w in range(g.start.size):
        if hall:
            assert isinstance(cam.sensor, HallSensor)
            high = cam.sensor.tooth_level == "high"
            edges.append((float(g.start[w]), "leading", high, w))
            edges.append((float(g.end[w]) % 720.0, "trailing", not high, w))
        else:
            edges.append((float(g.centre[w]) % 720.0, "centre", reversed_, w))
    base = np.array([e[0] for e in edges])

    def place(theta: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        after = (theta - ref) % 360.0
        after = np.where(after >= 360.0, 0.0, after)
        rev = np.floor(((theta - ref0) % 720.0) / 360.0).astype(int)
        return after, rev, theta % 720.0

    phi0 = float(src.phase.value(np.array(0.0)))
    th_static = base + phi0
    a0, r0, c0 = place(th_static)
    summary = [
        {
            "flank": f,
            "direction": _direction(rising),
            "window": w,
            "pattern_deg": a,
            "cycle_deg": float(c0[k]),
            "angle_after_ref_deg": float(a0[k]),
            "revolution": int(r0[k]),
        }
        for k, (a, f, rising, w) in enumerate(edges)
    ]
    t, x, j = _events(model, src, base, T)
    phi = src.phase.value(t) if t.size else np.empty(0)
    theta = x + phi
    after, rev, cyc = place(theta)
    seen = (theta - after) >= theta0 - 1e-9
    events = [
        {
            "time_s": float(t[k]),
            "flank": edges[j[k]][1],
            "direction": _direction(edges[j[k]][2]),
            "window": edges[j[k]][3],
            "pattern_deg": edges[j[k]][0],
            "cycle_deg": float(cyc[k]),
            "angle_after_ref_deg": float(after[k]),
            "revolution": int(rev[k]),
            "phase_deg": float(phi[k]),
            "after_reference": bool(seen[k]),
        }
        for k in range(t.size)
    ]
    out: dict[str, Any] = {
        "name": name,
        "channel": ch["name"] if ch else None,
        "sensor": "hall" if hall else "vr",
        "polarity": "reversed" if reversed_ else "normal",
        "pattern_deg": [[float(s), float(e)] for s, e in cam.pattern],
        "phase": {
            "offset_deg": cam.offset_deg,
            "sprocket_teeth": cam.sprocket_teeth,
            "jumped_teeth": cam.jumped_teeth,
            "jump_deg": cam.jump_deg,
            "phaser_initial_deg": cam.phaser.initial_deg,
            "at_start_deg": phi0,
        },
        "edges": summary,
        "events": events,
        "phaser": {
            "moves": src.phase.summary(),
            "trajectory": src.phase.trajectory(T),
        },
        "valve": dataclasses.asdict(cam.valve) if cam.valve is not None else None,
    }
    if hall:
        assert isinstance(cam.sensor, HallSensor)
        out["tooth_level"] = cam.sensor.tooth_level
        out["tau_s"] = cam.sensor.tau_s
    return out


def _channels_truth(sc: Scenario) -> list[dict[str, Any]]:
    out = []
    ranges = None
    if sc.instrument.kind == "scope":
        from .render import scope_ranges

        ranges = scope_ranges(sc)
    for k, c in enumerate(sc.resolved_channels()):
        sensor = sc.sensor_of(c.source)
        d: dict[str, Any] = {
            "name": c.label,
            "index": k,
            "role": c.source,
            "source": c.source,
            "sensor": sensor.kind if sensor is not None else None,
            "settings": dataclasses.asdict(sensor) if sensor is not None else {},
            "gain": c.gain,
            "offset_v": c.offset_v,
            "noise_v": c.noise_v,
            "reversed": c.reversed,
            "polarity": "reversed" if c.reversed else "normal",
            "dropouts": [dataclasses.asdict(d) for d in c.dropouts],
        }
        if ranges is not None:
            d["range_v"] = list(ranges[k])
        out.append(d)
    return out


def _disturbances(sc: Scenario, model: EngineModel) -> dict[str, Any]:
    T = sc.duration_s
    out: dict[str, Any] = {}
    if sc.spikes is not None:
        sp = sc.spikes
        times = model.spike_times(0.0, T)
        out["spikes"] = {
            "angle_deg": sp.angle_deg,
            "amplitude_v": sp.amplitude_v,
            "tau_s": sp.tau_s,
            "channels": list(sp.channels) or [c.label for c in sc.resolved_channels()],
            "times_s": _floats(times),
        }
    out["dropouts"] = [
        {
            "channel": c.label,
            "t_start_s": d.t_s,
            "t_end_s": d.t_s + d.duration_s,
            "level_v": d.level_v,
        }
        for c in sc.resolved_channels()
        for d in c.dropouts
    ]
    g = model.crank.g
    runt = np.flatnonzero(g.number == RUNT)
    if runt.size:
        t, _, _ = _events(model, model.crank, g.start[runt], T)
        out["runt"] = {
            "leading_deg": float(g.start[runt[0]]),
            "width_deg": float(g.end[runt[0]] - g.start[runt[0]]),
            "leading_times_s": _floats(t),
        }
    damaged = []
    for d in sc.crank.damaged:
        centre = (sc.crank.tooth1_deg + sc.crank.offsets_deg[d.tooth - 1]) % 360.0
        t, _, _ = _events(model, model.crank, np.array([centre]), T)
        damaged.append({"tooth": d.tooth, "kind": d.kind, "centre_times_s": _floats(t)})
    out["damaged_teeth"] = damaged
    if sc.crank.wide_tooth_deg:
        out["wide_tooth"] = {"tooth": sc.crank.n_teeth, "extra_deg": sc.crank.wide_tooth_deg}
    if sc.crank.runout:
        out["runout"] = {"amplitude": sc.crank.runout, "phase_deg": sc.crank.runout_phase_deg}
    return out


def compute_truth(scenario: Scenario, *, teeth: bool = True) -> dict[str, Any]:
    """Everything a decoder should find in the capture of ``scenario`` (see the module doc).

    ``teeth`` adds ``crank.tooth_events`` (columns: tooth, centre_s, leading_s, trailing_s, rpm
    at the centre), which is large for long captures.

    >>> tr = compute_truth(Scenario(duration_s=0.2, speed=ConstantSpeed(rpm=600)))
    >>> [round(t, 9) for t in tr["crank"]["reference_times_s"]]   # tooth 1 at 0 deg, 0.1 s/rev
    [0.0, 0.1]
    """
    sc = scenario
    model = build_model(sc)
    crank = _crank_truth(sc, model, teeth)
    inst = sc.instrument
    return {
        "generator": {"name": "toothcomb.simulate", "version": 1},
        "name": sc.name,
        "description": sc.description,
        "conventions": dict(_CONVENTIONS),
        "sample_rate": sc.sample_rate,
        "n_samples": sc.n_samples,
        "duration_s": sc.n_samples / sc.sample_rate,
        "seed": sc.seed,
        "n_cyl": sc.n_cyl,
        "start_angle_deg": sc.start_angle_deg,
        "instrument": {
            "kind": inst.kind,
            "bits": inst.resolved_bits,
            "units": inst.units,
            "ac_corner_hz": inst.resolved_ac_corner_hz,
            "oversample": inst.oversample if inst.kind == "soundcard" else 1,
            "full_scale_v": inst.full_scale_v if inst.kind == "soundcard" else None,
        },
        "channels": _channels_truth(sc),
        "crank": crank,
        "rpm": _rpm_stats(model.motion, sc.duration_s, model.omega_max),
        "rpm_per_revolution": _rpm_per_rev(crank["reference_times_s"]),
        "cams": [_cam_truth(sc, model, crank["reference_angle_deg"], c.name) for c in sc.cams],
        "disturbances": _disturbances(sc, model),
        "scenario": sc.to_dict(),
    }
