"""Phaser valve commands: PWM decode (frequency, duty, drive side) and the cam's response.

The simulator drives a phaser from a PWM valve command (low- or high-side drive, flyback spike
at each turn-off, battery ripple, scope noise and 8-bit quantisation) and moves the cam at a
rate that grows with the duty's distance from the hold duty; the decode is held against that.
"""

from __future__ import annotations

import json
from dataclasses import replace

import numpy as np
import pytest
from conftest import make_capture
from toothcomb.cli.main import main
from toothcomb.decoders.actuators.pwm import pwm_trace, steady_share
from toothcomb.decoders.analysis.actuator import ValveLimits
from toothcomb.decoders.options import DecodeOptions
from toothcomb.decoders.pipeline import decode_capture
from toothcomb.decoders.readers import open_capture
from toothcomb.decoders.simulate import Channel, ValveDrive
from toothcomb.decoders.simulate.phase import valve_trajectory
from toothcomb.decoders.simulate.presets import preset

#: the command: hold, ask to advance (75 %), hold, ask to retard (30 %), hold
COMMAND = ((0.0, 50.0), (0.5, 75.0), (1.0, 50.0), (1.3, 30.0), (1.6, 50.0))


def valve_scenario(valve: ValveDrive, duration_s: float = 2.0):
    """36-1 Hall crank at 2000 rpm, four-tooth intake cam driven by ``valve`` (recorded on
    channel 'ocv'), 3+1 exhaust cam, 8-bit scope at 250 kS/s."""
    sc = preset("hall-36-1-two-cams-scope")
    cams = (replace(sc.cams[0], valve=valve), sc.cams[1])
    ocv = Channel(name="ocv", source="valve:cam_intake", noise_v=0.05, range_v=(-35.0, 50.0))
    return replace(sc, cams=cams, channels=(*sc.channels, ocv), duration_s=duration_s)


@pytest.fixture(scope="module")
def decoded(tmp_path_factory):
    cache: dict[str, tuple] = {}

    def _get(key: str, valve: ValveDrive, **opts):
        if key not in cache:
            tmp = tmp_path_factory.mktemp(key)
            path, truth = make_capture(tmp, valve_scenario(valve), fmt="h5")
            cache[key] = (path, truth, decode_capture(str(path), DecodeOptions(**opts)))
        return cache[key]

    return _get


def intake(result):
    return next(c for c in result.cams if c.channel == "intake")


def codes(findings) -> set[str]:
    return {f.code for f in findings}


# --------------------------------------------------------------------------- the PWM itself


@pytest.mark.parametrize("drive", ["low-side", "high-side"])
def test_duty_and_frequency_from_pwm_with_flyback_and_noise(decoded, drive):
    valve = ValveDrive(duty_pct=((0.0, 20.0), (0.6, 55.0), (1.2, 85.0)), drive=drive, hz=250.0)
    path, _, r = decoded(f"pwm-{drive}", valve, valves=("ocv",))
    (act,) = r.actuators
    assert act.drive == drive
    t_on = np.array(act.time_s)
    duty = np.array(act.duty_pct)
    # the command each period was switched with (the simulator's truth)
    want = valve.duty_at(t_on + 1e-6)
    assert len(duty) > 450
    assert np.max(np.abs(duty - want)) < 0.5
    assert act.pwm_hz == pytest.approx(250.0, rel=1e-3)
    # source: duty = on-time / period, counted independently on the raw samples: the share of
    # samples on the "on" side of the mid level over whole periods of the middle step
    with open_capture(str(path)) as src:
        x = np.concatenate([b.data[:, src.info.channels.index("ocv")] for b in src.blocks(1 << 16)])
    fs = 250_000.0
    seg = x[int(0.7 * fs) : int(1.1 * fs)]  # 100 whole periods at 55 %
    mid = 0.5 * (np.percentile(seg, 5) + np.percentile(seg, 95))
    on = seg < mid if drive == "low-side" else seg > mid
    assert 100.0 * np.mean(on) == pytest.approx(55.0, abs=0.5)
    inside = (t_on > 0.7) & (t_on < 1.09)
    assert np.mean(duty[inside]) == pytest.approx(100.0 * np.mean(on), abs=0.3)


def test_pwm_trace_of_ideal_edges():
    t_on = np.arange(50) / 200.0
    times = np.sort(np.concatenate((t_on, t_on + 0.0015)))
    direction = np.tile([1, -1], 50)  # high-side: on = rising
    tr = pwm_trace(times, direction, on_direction=1)
    # source: 1.5 ms on in a 5 ms period is 30 % duty at 200 Hz
    assert tr.hz == pytest.approx(200.0)
    assert np.allclose(tr.duty_pct, 30.0)
    assert steady_share(t_on) == 1.0


# --------------------------------------------------------------------------- command vs response


def test_a_cam_that_follows_its_command(decoded):
    _, _, r = decoded("follows", ValveDrive(duty_pct=COMMAND))
    cam = intake(r)
    act = cam.actuator
    assert act is not None and act.channel == "ocv" and act.pairing == "proposed"
    assert act.follows is True
    # the simulated phaser: hold duty 50 % (1 point dead band), 8 deg CA/s per point, more
    # duty advances, 30 ms from command to motion
    assert act.hold_duty == pytest.approx(50.0, abs=1.5)
    assert act.rate_per_pct == pytest.approx(-8.0, rel=0.15)
    assert act.more_duty == "advances"
    assert act.delay_s == pytest.approx(0.03, abs=0.01)
    assert not {c for c in codes(act.findings) if c.startswith("valve-") and c != "valve-paired"}
    # and the cam really went to its advance stop and back
    assert [round(m.travel_deg) for m in cam.phaser.moves] == [-45, 45]


def test_a_stuck_cam_does_not_follow(decoded):
    _, _, r = decoded("stuck", ValveDrive(duty_pct=COMMAND, stuck=True))
    act = intake(r).actuator
    assert act.follows is False
    (f,) = [f for f in act.findings if f.code == "valve-not-followed"]
    assert "does not follow its valve command (duty 75 % for 0.5 s, cam moved 0.0 deg CA)" in (
        f.message
    )
    assert "locking pin" in f.message  # the usual suspects, as possibilities
    assert f.time_s == pytest.approx(0.5, abs=0.05)


def test_a_sluggish_cam_is_flagged(decoded):
    _, _, r = decoded("sluggish", ValveDrive(duty_pct=COMMAND, gain_deg_s_per_pct=1.0))
    act = intake(r).actuator
    assert act.follows is True
    assert act.rate_per_pct == pytest.approx(-1.0, rel=0.25)
    (f,) = [f for f in act.findings if f.code == "valve-sluggish"]
    assert f"{abs(act.rate_per_pct):.1f} deg CA/s per duty point" in f.message
    assert abs(act.rate_per_pct) < ValveLimits().rate_per_pct_min


def test_a_cam_moving_the_wrong_way(decoded):
    valve = ValveDrive(duty_pct=COMMAND, wrong_way=True, stops_deg=(-45.0, 45.0))
    _, _, r = decoded("wrong", valve)
    cam = intake(r)
    act = cam.actuator
    assert act.follows is False
    assert act.more_duty == "retards"
    assert act.rate_per_pct == pytest.approx(8.0, rel=0.15)
    (f,) = [f for f in act.findings if f.code == "valve-wrong-way"]
    assert "asks it to advance, and it retarded" in f.message
    assert round(cam.phaser.moves[0].travel_deg) == 45


def test_the_pairing_can_be_named(decoded):
    _, _, r = decoded("named", ValveDrive(duty_pct=COMMAND), valves=("ocv=intake",))
    act = intake(r).actuator
    assert act.pairing == "given" and act.cam == "intake"
    assert "valve-channel" not in codes(r.findings)  # named, not found
    assert next(c for c in r.cams if c.channel == "exhaust").actuator is None


# --------------------------------------------------------------------------- output


def test_report_and_json_show_duty_beside_phase(decoded, tmp_path, capsys):
    path, _, _ = decoded("follows", ValveDrive(duty_pct=COMMAND))
    js = tmp_path / "r.json"
    code = main(["decode", str(path), "--json", str(js), "--width", "100"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    text = captured.out
    assert "valve command on ocv: PWM 250.0 Hz, low-side drive, duty 30-75 %" in text
    assert "valve duty, same time axis" in text
    lines = text.splitlines()
    duty_top = next(i for i, line in enumerate(lines) if line.strip().startswith("75 % ┤"))
    # the duty strip spans the same times as the phase strip above it
    time_rows = [line for line in lines[:duty_top + 8] if line.strip().endswith(" s")]
    assert len(time_rows) >= 2 and time_rows[-1] == time_rows[-2]
    data = json.loads(js.read_text())
    cam = next(c for c in data["cams"] if c["channel"] == "intake")
    act = cam["actuator"]
    # the fields DESIGN.md names
    assert set(act) >= {"channel", "pwm_hz", "duty", "hold_duty", "follows", "delay_s", "findings"}
    assert set(act["duty"]) == {"mean", "min", "max"}
    assert act["follows"] is True and isinstance(act["findings"], list)
    assert len(act["trace"]["time_s"]) == len(act["trace"]["duty_pct"]) > 400


# --------------------------------------------------------------------------- the simulator


def test_simulated_phaser_stops_at_its_end_stops():
    valve = ValveDrive(duty_pct=((0.0, 100.0),), gain_deg_s_per_pct=10.0, deadband_pct=0.0,
                       delay_s=0.0, max_rate_deg_s=300.0, stops_deg=(-40.0, 0.0))
    t, p = valve_trajectory(valve, 1.0)
    # 50 points over hold would be 500 deg CA/s; capped at 300: the stop at 40 deg CA is reached
    # after 40 / 300 s and held
    assert np.interp(0.1, t, p) == pytest.approx(-30.0, abs=0.1)
    assert np.min(p) == -40.0 and p[-1] == -40.0


def test_a_profile_sets_which_way_more_duty_should_move_the_cam(decoded):
    from toothcomb.decoders.profiles import dumps_profile, learn_profile, loads_profile
    from toothcomb.decoders.verdict import compare

    _, _, r = decoded("follows", ValveDrive(duty_pct=COMMAND))
    profile = learn_profile(r, name="bench")
    text = dumps_profile(profile)
    head, sep, rest = text.partition('[[cams]]\nname = "intake"\n')
    assert sep, "the learned profile names the intake cam"
    relaxed = loads_profile(head + sep + "valve = { duty_advances = false }\n" + rest)
    act = intake(compare(r, relaxed)).actuator
    # the same capture, judged against an engine whose valve retards with more duty
    assert act.follows is False
    assert "valve-wrong-way" in codes(act.findings)
    assert "intake cam moves the wrong way" in next(
        f.message for f in act.findings if f.code == "valve-wrong-way"
    )
    # and the learned profile alone keeps the default: the cam follows
    assert intake(compare(r, profile)).actuator.follows is True


def test_the_plot_draws_the_duty_on_the_phase_time_axis(decoded):
    pytest.importorskip("matplotlib")
    from toothcomb.cli.plot import build_figure

    _, _, r = decoded("follows", ValveDrive(duty_pct=COMMAND))
    fig = build_figure(r, ["phase"])
    axes = {ax.get_label(): ax for ax in fig.get_axes()}
    phase, duty = axes["phase:intake"], axes["duty:intake"]
    # one time axis: the duty's axes is a twin of the phase axes
    assert duty.get_shared_x_axes().joined(duty, phase)
    (line,) = [ln for ln in duty.get_lines() if ln.get_gid() == "duty-intake"]
    act = intake(r).actuator
    assert list(line.get_xdata()) == list(act.time_s)
    assert max(line.get_ydata()) == pytest.approx(75.0, abs=0.5)
