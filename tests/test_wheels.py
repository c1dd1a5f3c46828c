"""N-M wheel geometry, identification and tooth-by-tooth decoding on synthetic tooth times."""

from __future__ import annotations

import math

import numpy as np
import pytest
from toothcomb.decoders.errors import UsageError
from toothcomb.decoders.model import Edges
from toothcomb.decoders.wheels.missing_tooth import (
    MissingToothSpec,
    MissingToothWheel,
    decode_teeth,
    gap_ratios,
    identify,
    leading_direction,
)


def tooth_times(spec: MissingToothSpec, revs: float, angle_of_t, start_deg: float = 0.0):
    """Event times of every tooth of ``spec`` over ``revs`` revolutions for an engine whose
    crank angle (deg) at time t is ``angle_of_t(t)`` (monotone), found by bisection."""
    pitch = spec.pitch_deg
    angles = []
    for r in range(math.ceil(revs) + 1):
        for k in range(spec.teeth):
            a = r * 360.0 + k * pitch - start_deg
            if 0 < a < revs * 360.0:
                angles.append(a)
    angles = np.array(angles)
    lo = np.zeros_like(angles)
    hi = np.full_like(angles, 1.0)
    while np.any(angle_of_t(hi) < angles):
        hi = np.where(angle_of_t(hi) < angles, hi * 2, hi)
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        below = angle_of_t(mid) < angles
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
    return 0.5 * (lo + hi), angles


def test_geometry_of_60_2():
    w = MissingToothSpec(60, 2)
    # source: a 60-2 wheel has 6 deg between tooth positions and its gap interval spans three
    # pitches, 18 deg (Robert Bosch GmbH, Automotive Handbook, speed sensors / engine management)
    assert w.pitch_deg == 6.0
    assert w.gap_deg == 18.0
    assert w.teeth == 58
    assert w.span(58, 1) == 3 and w.span(57, 2) == 4 and w.span(1, 58) == 60


def test_tooth_period_at_a_given_speed():
    # source: one revolution takes 60/rpm s, so a tooth period is 60/(rpm*N) s; at 6000 rpm a
    # 60-2 wheel gives 1/6000 s = 166.7 us per tooth
    spec = MissingToothSpec(60, 2)
    rpm = 6000.0
    t, _ = tooth_times(spec, 3, lambda t: 6.0 * rpm * t)
    track = decode_teeth(t, spec)
    _, per_tooth = track.rpm_per_tooth()
    assert np.median(np.diff(t)) == pytest.approx(60.0 / (rpm * 60), rel=1e-9)
    np.testing.assert_allclose(per_tooth, rpm, rtol=1e-9)


@pytest.mark.parametrize(
    "n,m", [(4, 1), (12, 1), (24, 1), (24, 2), (36, 1), (36, 2), (60, 2), (58, 3), (72, 1)]
)
def test_identify_any_n_minus_m(n, m):
    spec = MissingToothSpec(n, m)
    # 5 revolutions while the speed rises steadily from 800 to 1600 rpm
    t, _ = tooth_times(spec, 5, lambda t: 6.0 * (800 * t + 2000 * t * t), start_deg=37.0)
    g = identify(t)
    assert g is not None
    assert (g.spec.positions, g.spec.missing) == (n, m)
    assert g.confidence == pytest.approx(1.0)
    assert g.gap_ratio == pytest.approx(m + 1, rel=0.1)


def test_gap_ratio_holds_through_cranking_ripple():
    """Cranking: 150 rpm mean, 30 % ripple at the firing frequency of a four-cylinder (twice per
    revolution); gap ratios stay near M + 1."""
    spec = MissingToothSpec(36, 1)

    def angle(t):  # speed 150 rpm * (1 + 0.3 sin(2 theta)), integrated approximately
        w = 6.0 * 150.0
        th = w * t
        return th - 0.3 * w / (2 * math.radians(w)) * np.cos(2 * np.radians(th)) + 0.3 * w / (
            2 * math.radians(w)
        )

    t, angles = tooth_times(spec, 6, angle)
    r = gap_ratios(t)
    gap = np.nanargmax(r)
    assert r[gap] == pytest.approx(2.0, rel=0.25)
    track = decode_teeth(t, spec)
    assert track.sync_losses == 0
    assert len(track.reference_times) == 5
    # every decoded angle equals the true one (counted from the first reference event)
    first = np.flatnonzero(np.isclose(t, track.times[0]))[0]
    np.testing.assert_allclose(track.angles, angles[first : first + len(track)] - angles[first])


def test_missing_and_extra_edges_are_counted_not_fatal():
    spec = MissingToothSpec(36, 1)
    t, _angles = tooth_times(spec, 6, lambda t: 6.0 * 1500 * t)
    keep = np.ones(len(t), bool)
    keep[50] = False  # a damaged tooth: no event
    keep[120:126] = False  # a dropout: six events lost
    runt = 0.5 * (t[80] + t[81]) + 0.2 * (t[81] - t[80])  # a runt edge between two teeth
    times = np.sort(np.concatenate((t[keep], [runt])))
    track = decode_teeth(times, spec)
    assert track.missing == 7
    assert track.extra == 1
    assert track.sync_losses == 0
    assert runt not in track.times
    codes = [f.code for f in track.findings]
    assert codes.count("missing-teeth") == 2 and codes.count("extra-edge") == 1


def test_sync_lost_and_found_again():
    spec = MissingToothSpec(36, 1)
    t, _ = tooth_times(spec, 8, lambda t: 6.0 * 1200 * t)
    # 7.3 teeth worth of time vanish: no whole number of pitches explains it
    cut = 100
    times = np.concatenate((t[:cut], t[cut:] + 7.3 * (t[1] - t[0])))
    track = decode_teeth(times, spec)
    assert track.sync_losses == 1
    assert track.run.max() == 1
    assert [f.code for f in track.findings].count("sync-lost") == 1


def test_no_gap_means_no_wheel():
    t = np.arange(500) / 1000.0  # an even tooth train: no missing tooth anywhere
    assert identify(t) is None
    assert len(decode_teeth(t, MissingToothSpec(36, 1)).reference_times) == 0


def test_parse_notation():
    assert MissingToothWheel.parse("60-2") == MissingToothSpec(60, 2)
    assert MissingToothWheel.parse(" 36 - 1 ") == MissingToothSpec(36, 1)
    assert MissingToothWheel.parse("4+1") is None
    with pytest.raises(UsageError, match="can miss"):
        MissingToothWheel.parse("36-40")


def test_leading_flank_is_the_one_after_the_gap_level():
    """Hall: the level held through the gap is 'no tooth'; the flank ending it leads."""
    spec = MissingToothSpec(36, 1)
    lead, _ = tooth_times(spec, 4, lambda t: 6.0 * 1000 * t)
    width = 0.4 * (lead[1] - lead[0])
    for tooth_high in (True, False):
        times = np.sort(np.concatenate((lead, lead + width)))
        d = np.tile([1, -1], len(lead)) if tooth_high else np.tile([-1, 1], len(lead))
        e = Edges(times, d.astype(np.int8), np.ones(len(times)))
        direction, share = leading_direction(e)
        assert direction == (1 if tooth_high else -1)
        assert share == 1.0
