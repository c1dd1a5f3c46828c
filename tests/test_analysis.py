"""Angle statistics, crank timeline, cam phase and edges, jitter."""

from __future__ import annotations

import math

import numpy as np
import pytest
from toothcomb.decoders.analysis.cams import (
    build_cam_result,
    choose_phase,
    is_symmetric,
    locate,
    tooth_level_direction,
)
from toothcomb.decoders.analysis.jitter import crank_jitter, edge_jitter, jitter_from_tie
from toothcomb.decoders.analysis.stats import angle_stats, circular_mean, signed_difference
from toothcomb.decoders.analysis.timeline import CrankTimeline
from toothcomb.decoders.model import Edges
from toothcomb.decoders.wheels.missing_tooth import MissingToothSpec, decode_teeth


def invert(angle_of_t, angles: np.ndarray, t_max: float) -> np.ndarray:
    lo = np.zeros_like(angles)
    hi = np.full_like(angles, t_max)
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        below = angle_of_t(mid) < angles
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
    return 0.5 * (lo + hi)


def accelerating(t):
    """Crank angle (deg) of an engine at 900 rpm speeding up at 4000 rpm/s."""
    return 6.0 * (900.0 * t + 0.5 * 4000.0 * t * t)


def wheel_track(spec: MissingToothSpec, angle_of_t, revs: int, ref_angle: float = 50.0):
    teeth = np.array(
        [ref_angle + r * 360 + k * spec.pitch_deg for r in range(revs) for k in range(spec.teeth)]
    )
    t = invert(angle_of_t, teeth, 10.0)
    return decode_teeth(t, spec), t, teeth


# -- circular statistics ------------------------------------------------------------------------


def test_circular_mean_and_spread_across_zero():
    a = np.array([359.0, 359.5, 0.5, 1.0])
    s = angle_stats(a)
    assert s.mean == pytest.approx(0.0, abs=1e-9) or s.mean == pytest.approx(360.0, abs=1e-9)
    # the spread is that of -1, -0.5, 0.5, 1, not of numbers near 0 and 360
    assert s.std == pytest.approx(np.std([-1, -0.5, 0.5, 1], ddof=1))
    assert (s.min, s.max) == pytest.approx((-1.0, 1.0))
    assert circular_mean(np.array([90.0, 180.0])) == pytest.approx(135.0)
    assert signed_difference(10.0, 350.0) == pytest.approx(20.0)
    assert angle_stats(np.array([])).n == 0


# -- crank timeline --------------------------------------------------------------------------------


def test_timeline_follows_acceleration():
    spec = MissingToothSpec(36, 1)
    track, t, teeth = wheel_track(spec, accelerating, 7)
    tl = CrankTimeline(track, max_pitches=2)
    # the first tooth 1 decoded follows the first gap seen: angles count from there
    ref = teeth[np.argmin(np.abs(t - track.reference_times[0]))]
    # query at points between teeth (including across the gap)
    truth_deg = ref + np.linspace(5.0, 1500.0, 400)
    q = invert(accelerating, truth_deg, 10.0)
    look = tl.angle_at(q)
    assert np.all(look.valid)
    err = look.angle - (truth_deg - ref)
    # linear interpolation between teeth would be off by up to alpha*h^2/8 at mid-interval
    # source: error bound of linear interpolation, max|f''| h^2 / 8 (e.g. R. L. Burden,
    # J. D. Faires, "Numerical Analysis", 9th ed., theorem 3.3)
    h = 20.0 / (6.0 * 900.0)  # the gap interval, 2 pitches, at the lowest speed (s)
    alpha = 6.0 * 4000.0  # deg/s^2
    linear_bound = alpha * h * h / 8
    assert linear_bound > 0.04
    assert np.max(np.abs(err)) < 0.01 * linear_bound
    speed = tl.speed_at(q)
    np.testing.assert_allclose(speed, 6.0 * (900.0 + 4000.0 * q), rtol=1e-4)


def test_timeline_refuses_before_first_reference_and_across_dropouts():
    spec = MissingToothSpec(36, 1)
    track, t, _ = wheel_track(spec, lambda t: 6000.0 * t, 4)
    # drop 5 teeth in the middle: spacing there is 6 pitches
    keep = np.ones(len(t), bool)
    keep[60:65] = False
    track = decode_teeth(t[keep], spec)
    tl = CrankTimeline(track, max_pitches=2)
    q = np.array([t[0] - 1e-3, 0.5 * (t[61] + t[62]), 0.5 * (t[80] + t[81])])
    look = tl.angle_at(q)
    assert look.valid.tolist() == [False, False, True]


# -- cams ------------------------------------------------------------------------------------------


def cam_edges(windows, angle_of_t, ref_angle, revs, tooth_high=True):
    """Cam flank times for windows given in cycle degrees after the first reference event."""
    events = []
    for cyc in range(revs // 2 + 1):
        for a, b in windows:
            events.append((ref_angle + cyc * 720 + a, 1 if tooth_high else -1))
            events.append((ref_angle + cyc * 720 + b, -1 if tooth_high else 1))
    events.sort()
    ang = np.array([e[0] for e in events])
    keep = ang < ref_angle + revs * 360 - 20
    ang = ang[keep]
    d = np.array([e[1] for e in events])[keep]
    t = invert(angle_of_t, ang, 10.0)
    return Edges(t, d.astype(np.int8), np.ones(len(t)))


def test_single_window_cam_fixes_phase_and_angles_are_exact():
    spec = MissingToothSpec(60, 2)
    track, _, _ = wheel_track(spec, accelerating, 12, ref_angle=50.0)
    tl = CrankTimeline(track, max_pitches=3)
    e = cam_edges([(400.0, 430.0)], accelerating, 50.0, 12)
    lead, share = tooth_level_direction(e)
    assert lead == 1 and 0.03 < share < 0.07  # 30 of 720 deg, in time while speeding up
    ev, dropped = locate(e, tl)
    assert dropped == 0
    assert not is_symmetric(ev)
    shift = choose_phase(ev, lead)
    cam = build_cam_result("cam", "hall", ev, shift, lead, [])
    assert [(x.flank, x.direction, x.revolution) for x in cam.edges] == [
        ("leading", "rising", 0),
        ("trailing", "falling", 0),
    ]
    # 400 and 430 cycle degrees are 40 and 70 deg after a reference event
    assert cam.edges[0].angle.mean == pytest.approx(40.0, abs=1e-6)
    assert cam.edges[1].angle.mean == pytest.approx(70.0, abs=1e-6)
    assert cam.edges[0].angle.std < 1e-6
    np.testing.assert_allclose(cam.pattern, [[40.0, 70.0]], atol=1e-6)


def test_symmetric_cam_leaves_phase_open():
    spec = MissingToothSpec(36, 1)
    track, _, _ = wheel_track(spec, lambda t: 7200.0 * t, 10, ref_angle=20.0)
    tl = CrankTimeline(track, max_pitches=2)
    windows = [(30.0 + 180 * k, 55.0 + 180 * k) for k in range(4)]
    e = cam_edges(windows, lambda t: 7200.0 * t, 20.0, 10)
    ev, _ = locate(e, tl)
    assert is_symmetric(ev)
    cam = build_cam_result("cam", "hall", ev, None, 1, [])
    assert {x.revolution for x in cam.edges} == {None}
    assert sorted(round(x.angle.mean, 6) for x in cam.edges) == [30.0, 55.0, 210.0, 235.0]


def test_phase_convention_puts_more_leading_flanks_in_revolution_zero():
    """A 3+1 cam: three windows in one revolution, one in the other; whatever the parity of the
    first reference event, revolution 0 is the one with three."""
    spec = MissingToothSpec(60, 2)
    windows = [(20.0, 40.0), (140.0, 160.0), (260.0, 280.0), (500.0, 520.0)]
    for first_ref in (10.0, 370.0):
        track, _, _ = wheel_track(spec, lambda t: 12000.0 * t, 10, ref_angle=first_ref)
        tl = CrankTimeline(track, max_pitches=3)
        e = cam_edges([(a - first_ref + 10, b - first_ref + 10) for a, b in windows],
                      lambda t: 12000.0 * t, first_ref, 10)
        ev, _ = locate(e, tl)
        shift = choose_phase(ev, 1)
        cam = build_cam_result("cam", "hall", ev, shift, 1, [])
        rev0 = [x for x in cam.edges if x.revolution == 0 and x.flank == "leading"]
        assert len(rev0) == 3


# -- jitter ----------------------------------------------------------------------------------------


def test_sinusoidal_tie_rms_and_peak_to_peak():
    a = 2e-6
    k = np.arange(10000)
    p = 40  # a multiple of 4 samples per cycle, so the peaks are sampled
    tie = a * np.sin(2 * np.pi * k / p)
    s = jitter_from_tie(tie, 3600.0)
    # source: a sinusoid of amplitude A has rms A/sqrt(2) and peak-to-peak 2A
    assert s.tie_rms_s == pytest.approx(a / math.sqrt(2), rel=1e-3)
    assert s.tie_pp_s == pytest.approx(2 * a, rel=1e-3)
    assert s.tie_pp_deg == pytest.approx(2 * a * 3600.0, rel=1e-3)
    # period jitter is the first difference of TIE: a sinusoid of amplitude 2A sin(pi/P)
    # source: sin(x + h) - sin(x) = 2 sin(h/2) cos(x + h/2)
    assert s.period_rms_s == pytest.approx(2 * a * math.sin(math.pi / p) / math.sqrt(2), rel=1e-3)
    # and cycle-to-cycle jitter the second difference: amplitude 4A sin^2(pi/P)
    assert s.c2c_rms_s == pytest.approx(4 * a * math.sin(math.pi / p) ** 2 / math.sqrt(2), rel=1e-3)


def test_crank_jitter_reads_edge_noise_not_acceleration():
    rng = np.random.default_rng(1)
    spec = MissingToothSpec(60, 2)
    teeth = np.array([30 + r * 360 + k * 6.0 for r in range(40) for k in range(58)])
    t = invert(accelerating, teeth, 10.0)
    sigma = 3e-6
    noisy = t + rng.normal(0, sigma, len(t))
    j = crank_jitter(decode_teeth(noisy, spec))
    assert j is not None
    assert j.tie_rms_s == pytest.approx(sigma, rel=0.1)
    # independent edge noise: period jitter rms = sqrt(2) sigma, cycle-to-cycle sqrt(6) sigma
    # source: variance of first and second differences of white noise, 2 sigma^2 and 6 sigma^2
    assert j.period_rms_s == pytest.approx(math.sqrt(2) * sigma, rel=0.15)
    assert j.c2c_rms_s == pytest.approx(math.sqrt(6) * sigma, rel=0.15)
    clean = crank_jitter(decode_teeth(t, spec))
    assert clean.tie_rms_s < 0.01 * sigma


def test_cam_edge_jitter_removes_a_moving_phaser():
    rng = np.random.default_rng(4)
    n = 200
    times = np.arange(n) * 0.05
    phase = 20.0 * (1 - np.exp(-times / 2.0))  # a phaser moving by 20 deg
    sigma = 0.05
    angles = 100.0 + phase + rng.normal(0, sigma, n)
    j = edge_jitter(times, angles, np.full(n, 6000.0))
    assert j.tie_rms_deg == pytest.approx(sigma, rel=0.15)
    assert j.tie_rms_s == pytest.approx(sigma / 6000.0, rel=0.15)
