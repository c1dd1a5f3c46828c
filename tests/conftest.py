"""Shared helpers: simulated captures and comparison of a decode with the simulator's truth."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from toothcomb.decoders.options import DecodeOptions
from toothcomb.decoders.pipeline import decode_capture
from toothcomb.decoders.result import DecodeResult
from toothcomb.decoders.simulate import Scenario, simulate


def circ_diff(a: float, b: float, period: float = 360.0) -> float:
    return (a - b + period / 2) % period - period / 2


def make_capture(tmp_path: Path, scenario: Scenario, fmt: str = "flac") -> tuple[Path, dict]:
    """Simulate ``scenario`` and write it to ``tmp_path`` as ``fmt``; return (path, truth)."""
    sim = simulate(scenario)
    path = tmp_path / f"capture.{fmt}"
    sim.write(path)
    return path, sim.truth


def decode_json(path: Path, **opts: object) -> str:
    """The decode of ``path`` with ``DecodeOptions(**opts)``, as sorted JSON text (two decodes
    that agree to the last bit give the same text)."""
    r = decode_capture(str(path), DecodeOptions(**opts))  # type: ignore[arg-type]
    return json.dumps(r.to_json(), sort_keys=True)


def truth_edges(truth: dict, cam: int = 0) -> dict[tuple[str, int], list[tuple[float, float]]]:
    """Truth cam events seen after a reference event, grouped by (direction, window):
    {(direction, window): [(time_s, angle_after_ref_deg), ...]}."""
    out: dict[tuple[str, int], list[tuple[float, float]]] = {}
    for ev in truth["cams"][cam]["events"]:
        if not ev.get("after_reference", True):
            continue
        out.setdefault((ev["direction"], ev["window"]), []).append(
            (ev["time_s"], ev["angle_after_ref_deg"])
        )
    return out


def mean_angle(values: list[float]) -> float:
    s = sum(math.sin(math.radians(v)) for v in values)
    c = sum(math.cos(math.radians(v)) for v in values)
    return math.degrees(math.atan2(s, c)) % 360.0


def result_channel(result: DecodeResult, truth: dict, name: str) -> str:
    """The name the decoded capture gives the simulator's channel ``name`` (audio files carry
    no channel names: they are ch0, ch1, ...)."""
    idx = next(c["index"] for c in truth["channels"] if c["name"] == name)
    return result.capture.channels[idx]


def cam_errors(result: DecodeResult, truth: dict, cam: int = 0):
    """For each true edge of cam ``cam``: |decoded mean - true mean| (deg), matching the decoded
    edge of the same direction whose mean is nearest."""
    name = result_channel(result, truth, truth["cams"][cam]["channel"])
    mine = [c for c in result.cams if c.channel == name]
    assert mine, f"cam channel {name!r} not reported"
    errs = {}
    for (direction, window), pts in truth_edges(truth, cam).items():
        want = mean_angle([a for _, a in pts])
        cands = [e for e in mine[0].edges if e.direction == direction]
        assert cands, f"no {direction} edge reported"
        got = min(cands, key=lambda e: abs(circ_diff(e.angle.mean, want)))
        errs[(direction, window)] = abs(circ_diff(got.angle.mean, want))
    return errs


def event_errors(result: DecodeResult, truth: dict, cam: int = 0) -> np.ndarray:
    """Per-event |decoded - true| angle (deg) for every true event matched by time (1 ms)."""
    name = result_channel(result, truth, truth["cams"][cam]["channel"])
    mine = next(c for c in result.cams if c.channel == name)
    got = sorted((t, a) for e in mine.edges for t, a in e.events)
    times = np.array([t for t, _ in got])
    errs = []
    for pts in truth_edges(truth, cam).values():
        for t, a in pts:
            i = int(np.argmin(np.abs(times - t)))
            if abs(times[i] - t) < 1e-3:
                errs.append(abs(circ_diff(got[i][1], a)))
    return np.array(errs)


def reference_errors(result: DecodeResult, truth: dict) -> tuple[int, np.ndarray]:
    """(number of true reference events found, their timing errors in deg CA)."""
    mine = np.array(result.crank.reference_times_s)
    true = np.array(truth["crank"]["reference_times_s"])
    rpm = truth["rpm"]["max"]
    found, errs = 0, []
    for t in true:
        i = int(np.argmin(np.abs(mine - t))) if len(mine) else -1
        if i >= 0 and abs(mine[i] - t) * 6 * rpm < 0.3 * truth["crank"]["pitch_deg"]:
            found += 1
            errs.append(abs(mine[i] - t) * 6 * rpm)
    return found, np.array(errs)


@pytest.fixture
def capture(tmp_path):
    def _make(scenario: Scenario, fmt: str = "flac"):
        return make_capture(tmp_path, scenario, fmt)

    return _make


def finding_codes(result: DecodeResult) -> set[str]:
    """Codes of every finding of a decode (capture, crank and cams)."""
    return {f.code for f in result.all_findings}


def local_rpm(truth: dict, times: np.ndarray) -> np.ndarray:
    """True engine speed at ``times`` (s), interpolated from the simulator's per-tooth speeds."""
    te = truth["crank"]["tooth_events"]
    return np.interp(np.asarray(times, dtype=float), te["centre_s"], te["rpm"])


def decodable_references(truth: dict) -> np.ndarray:
    """True reference events whose gap lies wholly inside the capture: at least two tooth
    centres before the event and three at or after it (one interval on each side of the gap,
    and the teeth that confirm it)."""
    centres = np.asarray(truth["crank"]["tooth_events"]["centre_s"])
    refs = np.asarray(truth["crank"]["reference_times_s"])
    before = np.searchsorted(centres, refs - 1e-7)
    after = len(centres) - before
    return refs[(before >= 2) & (after >= 3)]


def reference_check(result: DecodeResult, truth: dict) -> tuple[int, int, int, np.ndarray]:
    """Compare the decoded reference events with the truth.

    Returns (decodable true references, of them found within 0.3 pitch, decoded references
    that match no true one, timing errors of the found ones in deg CA at the local speed).
    """
    mine = np.asarray(result.crank.reference_times_s, dtype=float)
    every = np.asarray(truth["crank"]["reference_times_s"], dtype=float)
    want = decodable_references(truth)
    pitch = truth["crank"]["pitch_deg"]
    errs = []
    for t in want:
        if len(mine) == 0:
            break
        i = int(np.argmin(np.abs(mine - t)))
        deg = abs(mine[i] - t) * 6.0 * float(local_rpm(truth, np.array([t]))[0])
        if deg < 0.3 * pitch:
            errs.append(deg)
    invented = 0
    for t in mine:
        i = int(np.argmin(np.abs(every - t))) if len(every) else -1
        deg = abs(every[i] - t) * 6.0 * float(local_rpm(truth, np.array([t]))[0]) if i >= 0 else 1e9
        if deg >= 0.3 * pitch:
            invented += 1
    return len(want), len(errs), invented, np.array(errs)


def cam_event_check(result: DecodeResult, truth: dict, cam: int = 0) -> tuple[int, int, np.ndarray]:
    """Compare every decoded event of cam ``cam`` with the true events after the first decodable
    reference.

    Returns (true events, decoded events that match no true event of the same direction within
    2 deg CA, |decoded - true| angle of each matched true event in deg CA, nan where a true event
    was not found). True events after the second-to-last crank tooth are left out: the crank
    angle there is not bracketed by teeth.
    """
    refs = decodable_references(truth)
    start = refs[0] if len(refs) else np.inf
    centres = truth["crank"]["tooth_events"]["centre_s"]
    end = centres[-2] if len(centres) >= 2 else -np.inf
    name = result_channel(result, truth, truth["cams"][cam]["channel"])
    mine = next(c for c in result.cams if c.channel == name)
    got = [(t, a, e.direction) for e in mine.edges for t, a in e.events]
    true = [
        (ev["time_s"], ev["angle_after_ref_deg"], ev["direction"])
        for ev in truth["cams"][cam]["events"]
        if start < ev["time_s"] < end
    ]

    def deg_apart(t0: float, t1: float) -> float:
        return abs(t0 - t1) * 6.0 * float(local_rpm(truth, np.array([t0]))[0])

    errs = []
    for t, a, d in true:
        near = [(deg_apart(t, tg), ag) for tg, ag, dg in got if dg == d]
        best = min(near, default=None)
        errs.append(abs(circ_diff(best[1], a)) if best and best[0] < 2.0 else np.nan)
    spurious = 0
    for tg, _ag, dg in got:
        near = [deg_apart(tg, t) for t, _a, d in truth_all_events(truth, cam) if d == dg]
        if not near or min(near) >= 2.0:
            spurious += 1
    return len(true), spurious, np.array(errs)


def truth_all_events(truth: dict, cam: int = 0) -> list[tuple[float, float, str]]:
    """(time_s, angle after the reference, direction) of every true event of cam ``cam``."""
    return [
        (ev["time_s"], ev["angle_after_ref_deg"], ev["direction"])
        for ev in truth["cams"][cam]["events"]
    ]
