"""Invented demo scenarios: typical wheels, sensors and recorders, ready to simulate.

>>> sorted(PRESETS)[:2]
['belt-jumped-scope', 'cranking-60-2-vr']
>>> preset("cranking-60-2-vr", duration_s=0.5).speed.kind
'cranking'
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from ..errors import UsageError
from .scenario import (
    Cam,
    Channel,
    ConstantSpeed,
    CrankingSpeed,
    CrankWheel,
    HallSensor,
    IdleSpeed,
    IgnitionSpikes,
    Instrument,
    Phaser,
    PhaserMove,
    Scenario,
    SnapSpeed,
    VrSensor,
)
from .wheel import equal_teeth, half_moon, n_plus_one, single_tooth


def _idle_soundcard() -> Scenario:
    return Scenario(
        name="idle-60-2-vr-soundcard",
        description=PRESETS["idle-60-2-vr-soundcard"],
        duration_s=4.0,
        seed=11,
        n_cyl=4,
        start_angle_deg=37.0,
        speed=IdleSpeed(rpm=800.0, walk_rpm=12.0, walk_time_s=1.5, ripple=0.03),
        crank=CrankWheel(wheel="60-2", tooth1_deg=84.0, sensor=VrSensor(peak_v_at_200rpm=0.35)),
        cams=(Cam(name="cam_intake", pattern=((60.0, 240.0),), sensor=HallSensor()),),
        channels=(
            Channel(name="crank", source="crank", gain=0.5, noise_v=0.004),
            Channel(name="cam", source="cam_intake", gain=0.2, noise_v=0.004),
        ),
        instrument=Instrument(
            kind="soundcard", sample_rate=48000.0, bits=16, ac_corner_hz=5.0, full_scale_v=2.0
        ),
    )


def _hall_scope() -> Scenario:
    return Scenario(
        name="hall-36-1-two-cams-scope",
        description=PRESETS["hall-36-1-two-cams-scope"],
        duration_s=0.5,
        seed=23,
        n_cyl=4,
        start_angle_deg=200.0,
        speed=ConstantSpeed(rpm=2000.0, ripple=0.01),
        crank=CrankWheel(wheel="36-1", tooth1_deg=70.0, duty=0.5, sensor=HallSensor(tau_s=1e-6)),
        cams=(
            Cam(
                name="cam_intake",
                pattern=equal_teeth(4, first_deg=40.0, width_deg=30.0),
                sensor=HallSensor(tooth_level="low", tau_s=2e-6),
            ),
            Cam(
                name="cam_exhaust",
                pattern=n_plus_one(3, first_deg=300.0, width_deg=20.0, extra_after_deg=45.0),
                sensor=HallSensor(tau_s=2e-6),
            ),
        ),
        channels=(
            Channel(name="crank", source="crank", noise_v=0.03),
            Channel(name="intake", source="cam_intake", noise_v=0.03),
            Channel(name="exhaust", source="cam_exhaust", noise_v=0.03),
        ),
        instrument=Instrument(kind="scope", sample_rate=250_000.0, bits=8, range_v=(-1.0, 6.0)),
    )


def _cranking() -> Scenario:
    return Scenario(
        name="cranking-60-2-vr",
        description=PRESETS["cranking-60-2-vr"],
        duration_s=3.0,
        seed=5,
        n_cyl=4,
        start_angle_deg=300.0,
        speed=CrankingSpeed(rpm=220.0, ripple=0.25, ripple_phase_deg=-20.0),
        crank=CrankWheel(wheel="60-2", tooth1_deg=114.0, sensor=VrSensor(peak_v_at_200rpm=0.8)),
        cams=(Cam(name="cam_intake", pattern=half_moon(30.0), sensor=HallSensor()),),
        channels=(
            Channel(name="crank", source="crank", noise_v=0.005),
            Channel(name="cam_intake", source="cam_intake", noise_v=0.01),
        ),
        instrument=Instrument(kind="float", sample_rate=100_000.0),
    )


def _phaser() -> Scenario:
    return Scenario(
        name="phaser-sweep-60-2-hall",
        description=PRESETS["phaser-sweep-60-2-hall"],
        duration_s=2.5,
        seed=31,
        n_cyl=4,
        speed=ConstantSpeed(rpm=2500.0, ripple=0.01),
        crank=CrankWheel(wheel="60-2", tooth1_deg=90.0, sensor=HallSensor(tau_s=1e-6)),
        cams=(
            Cam(
                name="cam_intake",
                pattern=n_plus_one(4, first_deg=20.0, width_deg=15.0, extra_after_deg=40.0),
                phaser=Phaser(
                    moves=(
                        PhaserMove("step", t_s=0.5, to_deg=25.0, tau_s=0.08),
                        PhaserMove("ramp", t_s=1.5, to_deg=0.0, duration_s=0.5),
                    )
                ),
            ),
            Cam(name="cam_exhaust", pattern=single_tooth(400.0, 40.0)),
        ),
        channels=(
            Channel(name="crank", source="crank", noise_v=0.02),
            Channel(name="cam_intake", source="cam_intake", noise_v=0.02),
            Channel(name="cam_exhaust", source="cam_exhaust", noise_v=0.02),
        ),
        instrument=Instrument(kind="float", sample_rate=200_000.0),
    )


def _belt_jumped() -> Scenario:
    return Scenario(
        name="belt-jumped-scope",
        description=PRESETS["belt-jumped-scope"],
        duration_s=0.4,
        seed=42,
        n_cyl=4,
        speed=ConstantSpeed(rpm=1500.0, ripple=0.02),
        crank=CrankWheel(wheel="60-2", tooth1_deg=84.0, sensor=VrSensor(peak_v_at_200rpm=0.5)),
        cams=(
            Cam(
                name="cam_intake",
                pattern=equal_teeth(3, first_deg=100.0, width_deg=25.0),
                sprocket_teeth=42,
                jumped_teeth=1,
            ),
        ),
        channels=(
            Channel(name="crank", source="crank", noise_v=0.02),
            Channel(name="cam", source="cam_intake", noise_v=0.02),
        ),
        instrument=Instrument(kind="scope", sample_rate=500_000.0, bits=8),
    )


def _snap() -> Scenario:
    return Scenario(
        name="snap-60-2-vr-spikes",
        description=PRESETS["snap-60-2-vr-spikes"],
        duration_s=2.0,
        seed=7,
        n_cyl=4,
        speed=SnapSpeed(
            rpm=900.0,
            peak_rpm=4500.0,
            t_start_s=0.3,
            rise_s=0.35,
            hold_s=0.3,
            fall_s=0.9,
            ripple=0.02,
        ),
        crank=CrankWheel(
            wheel="60-2",
            tooth1_deg=84.0,
            sensor=VrSensor(peak_v_at_200rpm=0.3, clamp_v=4.0, clamp="soft"),
        ),
        cams=(Cam(name="cam_intake", pattern=equal_teeth(2, first_deg=120.0, width_deg=90.0)),),
        channels=(
            Channel(name="crank", source="crank", gain=0.25, reversed=True, noise_v=0.01),
            Channel(name="cam", source="cam_intake", gain=0.15, noise_v=0.01),
        ),
        spikes=IgnitionSpikes(angle_deg=-12.0, amplitude_v=1.5, tau_s=25e-6),
        instrument=Instrument(kind="soundcard", sample_rate=96000.0, bits=24, ac_corner_hz=10.0),
    )


_BUILDERS: dict[str, Callable[[], Scenario]] = {
    "idle-60-2-vr-soundcard": _idle_soundcard,
    "hall-36-1-two-cams-scope": _hall_scope,
    "cranking-60-2-vr": _cranking,
    "phaser-sweep-60-2-hall": _phaser,
    "belt-jumped-scope": _belt_jumped,
    "snap-60-2-vr-spikes": _snap,
}

#: preset name -> one-line description
PRESETS: dict[str, str] = {
    "idle-60-2-vr-soundcard": "four-cylinder at idle: 60-2 VR crank, single-window Hall cam, "
    "sound card 48 kHz 16-bit",
    "hall-36-1-two-cams-scope": "36-1 Hall crank with intake and exhaust Hall cams on an 8-bit "
    "scope, 250 kS/s, 2000 rpm",
    "cranking-60-2-vr": "starter cranking at 220 rpm with 25 % compression ripple: 60-2 VR "
    "crank, half-moon Hall cam, float samples at 100 kS/s",
    "phaser-sweep-60-2-hall": "60-2 Hall crank at 2500 rpm; the intake phaser steps 25 deg late "
    "and ramps back, the exhaust cam stays put; float samples at 200 kS/s",
    "belt-jumped-scope": "60-2 VR crank and Hall cam at 1500 rpm; the cam belt has jumped one "
    "tooth of a 42-tooth sprocket (17.14 deg CA late); 8-bit scope at 500 kS/s",
    "snap-60-2-vr-spikes": "throttle snap 900 -> 4500 rpm with ignition spikes: 60-2 VR crank "
    "with reversed leads and a soft clamp, Hall cam, sound card 96 kHz 24-bit",
}


def preset(name: str, **changes: Any) -> Scenario:
    """A demo scenario by name, with top-level fields changed (``duration_s``, ``seed``, ...)."""
    if name not in _BUILDERS:
        raise UsageError(
            f"preset {name!r} does not exist; choose one of {', '.join(sorted(_BUILDERS))}"
        )
    sc = _BUILDERS[name]()
    if changes:
        fields = set(sc.__dataclass_fields__)
        for k in changes:
            if k not in fields:
                raise UsageError(
                    f"{k!r} is not a scenario field; change one of {', '.join(sorted(fields))}"
                )
        sc = sc.replace(**changes)
    return sc
