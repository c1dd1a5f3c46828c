"""Variable cam timing: the phase trace, moves, holds and findings (analysis.phaser).

Captures are simulated with phasers whose motion is known exactly (ramps, first-order steps,
a sinusoidal hunt), decoded end to end, and the phaser analysis is held against that motion.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from conftest import event_errors, make_capture
from toothcomb.decoders.analysis.phaser import (
    PhaserLimits,
    analyse_phase_trace,
    judge,
)
from toothcomb.decoders.options import DecodeOptions
from toothcomb.decoders.pipeline import decode_capture
from toothcomb.decoders.profiles import learn_profile, loads_profile
from toothcomb.decoders.simulate import Phaser, PhaserMove
from toothcomb.decoders.simulate.presets import preset
from toothcomb.decoders.verdict import compare


def scope_scenario(intake: Phaser, exhaust: Phaser | None = None, duration_s: float = 1.6):
    """36-1 Hall crank at 2000 rpm, four-tooth intake and 3+1 exhaust Hall cams, 8-bit scope at
    250 kS/s (quantisation and noise as a real scope gives them)."""
    sc = preset("hall-36-1-two-cams-scope")
    cams = (
        replace(sc.cams[0], phaser=intake),
        replace(sc.cams[1], phaser=exhaust or Phaser()),
    )
    return replace(sc, cams=cams, duration_s=duration_s)


@pytest.fixture(scope="module")
def decoded(tmp_path_factory):
    """Decode a scenario once per module and phaser setting."""
    cache: dict[str, tuple] = {}

    def _get(key: str, intake: Phaser, exhaust: Phaser | None = None, **opts):
        if key not in cache:
            tmp = tmp_path_factory.mktemp(key)
            path, truth = make_capture(tmp, scope_scenario(intake, exhaust), fmt="h5")
            cache[key] = (path, truth, decode_capture(str(path), DecodeOptions(**opts)))
        return cache[key]

    return _get


RAMP_40 = Phaser(moves=(PhaserMove("ramp", t_s=0.6, to_deg=40.0, duration_s=0.16),))


def cam(result, channel):
    return next(c for c in result.cams if c.channel == channel)


# --------------------------------------------------------------------------- moves


def test_a_40_degree_move_at_250_degrees_per_second(decoded):
    _, truth, r = decoded("ramp40", RAMP_40)
    ph = cam(r, "intake").phaser
    assert ph is not None and len(ph.moves) == 1
    m = ph.moves[0]
    # the simulated ramp: 40 deg CA in 0.16 s = 250 deg CA/s, from 0.60 to 0.76 s
    assert abs(m.travel_deg - 40.0) < 1.0
    assert m.mean_rate_deg_s == pytest.approx(250.0, rel=0.10)
    assert m.peak_rate_deg_s == pytest.approx(250.0, rel=0.10)
    # source: a linear ramp covers 10 % to 90 % of its travel in 0.8 of its duration
    assert m.t10_90_s == pytest.approx(0.8 * 0.16, abs=0.005)
    assert m.t_start_s == pytest.approx(0.60, abs=0.005)
    assert m.t_end_s == pytest.approx(0.76, abs=0.01)
    assert m.overshoot_deg < 0.5
    assert ph.authority_deg == pytest.approx(m.travel_deg)
    assert m.rpm == pytest.approx(2000.0, rel=0.03)
    # 45 deg CA at 250 deg CA/s takes 0.18 s: within the usual 0.2 s, so not called slow
    assert "phaser-slow" not in {f.code for f in cam(r, "intake").findings}
    # the phase trace follows the truth event by event
    truth_moves = truth["cams"][0]["phaser"]["moves"]
    assert truth_moves[0]["travel_deg"] == pytest.approx(40.0)
    assert np.percentile(event_errors(r, truth, cam=0), 95) < 0.3


def test_the_other_cam_is_analysed_on_its_own(decoded):
    _, _, r = decoded("ramp40", RAMP_40)
    ex = cam(r, "exhaust")
    assert ex.phaser is not None and ex.phaser.moves == ()
    assert ex.phaser.parked
    assert "phaser-parked" in {f.code for f in ex.findings}
    assert "phaser-parked" not in {f.code for f in cam(r, "intake").findings}


def test_a_cam_moving_more_than_its_edge_spacing_keeps_each_edge(decoded):
    """The exhaust's extra tooth sits 45 deg CA after another: a 50 deg CA move takes an edge
    past where its neighbour was, and each edge must still keep its own events."""
    move = Phaser(moves=(PhaserMove("ramp", t_s=0.5, to_deg=50.0, duration_s=0.2),))
    _, truth, r = decoded("exhaust50", Phaser(), move)
    ex = cam(r, "exhaust")
    counts = [e.angle.n for e in ex.edges]
    assert len(counts) == 8
    assert max(counts) - min(counts) <= 2
    assert np.percentile(event_errors(r, truth, cam=1), 95) < 0.3
    assert ex.phaser is not None and abs(ex.phaser.authority_deg - 50.0) < 1.0


def test_a_first_order_step_has_the_textbook_rise_time(decoded):
    tau = 0.05
    step = Phaser(moves=(PhaserMove("step", t_s=0.5, to_deg=30.0, tau_s=tau),))
    _, _, r = decoded("step30", step)
    m = cam(r, "intake").phaser.moves[0]
    assert abs(m.travel_deg - 30.0) < 1.0
    # source: first-order step response, 10-90 % rise time = tau * ln 9
    assert m.t10_90_s == pytest.approx(tau * math.log(9.0), rel=0.10)
    # ... and its steepest rate is at the start; measured as the slope over 10 ms
    # (PhaserLimits.rate_span_s), that is travel * (1 - exp(-span / tau)) / span
    span = PhaserLimits().rate_span_s
    assert m.peak_rate_deg_s == pytest.approx(30.0 * (1 - math.exp(-span / tau)) / span, rel=0.15)
    # settling into a 2 % band takes tau * ln 50 (source: same response)
    assert m.settling_s == pytest.approx(tau * math.log(50.0), rel=0.25)


def test_an_overshoot_is_measured_and_flagged(decoded):
    over = Phaser(
        moves=(
            PhaserMove("ramp", t_s=0.6, to_deg=46.0, duration_s=0.16),
            PhaserMove("ramp", t_s=0.76, to_deg=40.0, duration_s=0.06),
        )
    )
    _, _, r = decoded("overshoot", over)
    c = cam(r, "intake")
    assert len(c.phaser.moves) == 1  # the swing back is the move's settling, not a move
    m = c.phaser.moves[0]
    assert abs(m.to_deg - 40.0) < 1.0
    assert 4.5 < m.overshoot_deg < 6.5  # 46 - 40, less what the light smoothing shaves off
    assert "phaser-overshoot" in {f.code for f in c.findings}


# --------------------------------------------------------------------------- judgements


def test_a_slow_phaser_is_flagged(decoded):
    slow = Phaser(moves=(PhaserMove("ramp", t_s=0.4, to_deg=45.0, duration_s=0.6),))
    _, _, r = decoded("slow", slow)
    c = cam(r, "intake")
    m = c.phaser.moves[0]
    assert m.mean_rate_deg_s == pytest.approx(75.0, rel=0.10)
    slow_f = [f for f in c.findings if f.code == "phaser-slow"]
    assert len(slow_f) == 1
    # 45 deg CA at 75 deg CA/s is 0.60 s, three times the usual 0.2 s
    assert "would take 0.60 s" in slow_f[0].message
    assert slow_f[0].time_s == pytest.approx(0.4, abs=0.01)


def test_a_hunting_phaser_is_flagged(decoded):
    hunt = Phaser(hunt_deg=3.0, hunt_hz=2.5, hunt_from_s=0.3)
    _, _, r = decoded("hunt", hunt)
    c = cam(r, "intake")
    assert c.phaser.moves == ()
    hunting = [h for h in c.phaser.holds if h.hunting]
    assert len(hunting) == 1
    assert hunting[0].hunting_amplitude_deg == pytest.approx(3.0, rel=0.15)
    assert hunting[0].hunting_hz == pytest.approx(2.5, rel=0.10)
    assert hunting[0].hunting_t_start_s == pytest.approx(0.3, abs=0.25)
    codes = {f.code for f in c.findings}
    assert "phaser-hunting" in codes and "phaser-parked" not in codes
    assert not c.phaser.parked


def test_a_parked_phaser_is_reported_as_parked(decoded):
    _, _, r = decoded("parked", Phaser())
    for c in r.cams:
        assert c.phaser.moves == () and c.phaser.authority_deg == 0.0
        assert len(c.phaser.holds) == 1
        # an 8-bit scope at 250 kS/s and 2000 rpm: 12 deg CA per 1 ms, 4 us per sample
        assert c.phaser.holds[0].jitter_deg < 0.1
        assert "phaser-parked" in {f.code for f in c.findings}


def test_a_move_in_a_capture_flagged_parked_is_a_fault(decoded):
    _, _, r = decoded("ramp40-parked", RAMP_40, phaser_parked=True)
    c = cam(r, "intake")
    f = [f for f in c.findings if f.code == "phaser-moved-while-parked"]
    assert len(f) == 1 and f[0].severity == "warning"
    assert "+40.0 deg CA" in f[0].message or "+39." in f[0].message
    assert c.phaser.expect_parked
    assert "phaser-moved-while-parked" not in {f.code for f in cam(r, "exhaust").findings}


def test_a_profile_gives_the_base_and_its_own_limits(decoded):
    _, _, parked = decoded("parked", Phaser())
    _, _, slow = decoded(
        "slow", Phaser(moves=(PhaserMove("ramp", t_s=0.4, to_deg=45.0, duration_s=0.6),))
    )
    profile = learn_profile(parked, name="bench")
    judged = compare(slow, profile)
    c = cam(judged, "intake")
    assert c.phaser.base == "expected"
    # the learned angles are where the cam was parked: the first hold sits near 0 deviation
    assert abs(c.phaser.holds[0].phase_deg) < 0.2
    assert abs(c.phaser.moves[0].to_deg - 45.0) < 1.0
    assert "phaser-slow" in {f.code for f in c.findings}
    # a profile that allows 1 s for the full range no longer calls this phaser slow
    text = _with_phaser_table(profile, "full_range_s_max = 1.0")
    relaxed = cam(compare(slow, loads_profile(text)), "intake")
    assert "phaser-slow" not in {f.code for f in relaxed.findings}
    # a profile whose park angle is 5 deg CA away gets a park-offset finding
    moved = _shift_profile(profile, 5.0)
    off = cam(compare(parked, moved), "intake")
    assert abs(off.phaser.holds[0].phase_deg + 5.0) < 0.3
    assert "phaser-park-offset" in {f.code for f in off.findings}


def _with_phaser_table(profile, line: str) -> str:
    from toothcomb.decoders.profiles import dumps_profile

    text = dumps_profile(profile)
    head, sep, rest = text.partition("[[cams]]\n")
    return head + sep + f"phaser = {{ {line} }}\n" + rest


def _shift_profile(profile, deg: float):
    cams = []
    for c in profile.cams:
        edges = tuple(replace(e, angle_deg=(e.angle_deg + deg) % c.period_deg) for e in c.edges)
        cams.append(replace(c, edges=edges, pattern=()))
    return replace(profile, cams=tuple(cams))


# --------------------------------------------------------------------------- the trace itself


def test_outliers_are_set_aside_and_counted():
    t = np.arange(0.0, 2.0, 0.01)
    p = np.zeros(len(t))
    p[[50, 120]] = [9.0, -7.0]  # two events placed badly (noise on the cam wire)
    r = analyse_phase_trace(t, p, np.zeros(len(t), dtype=int))
    assert r.dropped == 2
    assert len(r.time_s) == len(t) - 2
    assert r.moves == ()
    f = judge(r, "intake cam")
    assert [x.code for x in f] == ["phaser-outliers", "phaser-parked"]
    assert "2 event(s) set aside" in f[0].message


def test_noise_alone_is_not_a_move():
    rng = np.random.default_rng(5)
    t = np.sort(rng.uniform(0.0, 3.0, 600))
    p = rng.normal(0.0, 0.15, len(t))
    r = analyse_phase_trace(t, p, np.zeros(len(t), dtype=int))
    assert r.moves == ()
    assert r.holds[0].jitter_deg == pytest.approx(0.15, rel=0.15)
    assert not r.holds[0].hunting


def test_up_and_back_commands_with_holds_are_two_moves_not_hunting():
    t = np.arange(0.0, 3.0, 0.004)
    up = np.clip((t - 0.5) * 250.0, 0.0, 30.0)
    down = np.clip((t - 1.5) * 250.0, 0.0, 30.0)
    r = analyse_phase_trace(t, up - down, np.zeros(len(t), dtype=int))
    assert [round(m.travel_deg) for m in r.moves] == [30, -30]
    assert not any(h.hunting for h in r.holds)
    assert [round(h.phase_deg) for h in r.holds] == [0, 30, 0]


def test_limits_from_a_profile_table_are_checked():
    assert PhaserLimits.from_mapping({"typical_authority_deg": 50}).typical_authority_deg == 50.0
    with pytest.raises(ValueError, match="unknown key 'speed'"):
        PhaserLimits.from_mapping({"speed": 1.0})
    with pytest.raises(ValueError, match="give a positive number"):
        PhaserLimits.from_mapping({"full_range_s_max": "fast"})


def test_json_carries_the_fields_design_names(decoded):
    _, _, r = decoded("ramp40", RAMP_40)
    data = r.to_json()
    for c in data["cams"]:
        ph = c["phaser"]
        assert set(ph) >= {"authority_deg", "moves", "holds", "trace"}
        for m in ph["moves"]:
            assert set(m) >= {
                "t_start_s", "t_end_s", "from_deg", "to_deg", "travel_deg", "peak_rate_deg_s",
                "t10_90_s",
            }
        tr = ph["trace"]
        n = len(tr["time_s"])
        assert n > 100 and len(tr["phase_deg"]) == n == len(tr["rpm"]) == len(tr["edge"])
        assert tr["time_s"] == sorted(tr["time_s"])
        assert np.nanmedian(tr["rpm"]) == pytest.approx(2000.0, rel=0.03)
    assert data["cams"][1]["phaser"]["moves"] == []
