"""Shared helpers: simulated captures and comparison of a decode with the simulator's truth."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
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
