"""Simulated crank and cam sensor captures whose true answer is known exactly.

A :class:`Scenario` (frozen dataclasses, to and from a plain dict) describes the engine, its
speed, the crank wheel and cams with their sensors, disturbances, channel wiring and recorder.
:func:`simulate` makes the samples and the truth in memory; :func:`iter_blocks` streams them in
blocks; :func:`write_scenario` writes a capture of any length to a file. The same scenario and
seed always give the same samples, however they are cut into blocks.

>>> sim = simulate(Scenario(duration_s=0.1, speed=ConstantSpeed(rpm=1200)))
>>> sim.sample_rate, sim.channels, sim.truth["crank"]["wheel"]
(100000.0, ('crank', 'cam_intake'), '60-2')

Modules: :mod:`.scenario` (what to simulate), :mod:`.speed` (exact engine angle),
:mod:`.wheel` (tooth geometry, cam patterns), :mod:`.phase` (cam phase and phaser),
:mod:`.sensors` (Hall and VR physics), :mod:`.chain` (noise, converters, filters),
:mod:`.engine` (the assembled model), :mod:`.render` (samples and files), :mod:`.truth`,
:mod:`.presets`.
"""

from .presets import PRESETS, preset
from .render import Renderer, Simulation, iter_blocks, simulate, write_scenario, write_truth
from .scenario import (
    Cam,
    Channel,
    CoastSpeed,
    ConstantSpeed,
    CrankingSpeed,
    CrankWheel,
    DamagedTooth,
    Dropout,
    HallSensor,
    IdleSpeed,
    IgnitionSpikes,
    Instrument,
    Phaser,
    PhaserMove,
    RampSpeed,
    Runt,
    Scenario,
    SnapSpeed,
    ValveDrive,
    VrSensor,
)
from .speed import Motion
from .truth import compute_truth
from .wheel import cam_pattern, equal_teeth, half_moon, n_plus_one, single_tooth

__all__ = [
    "PRESETS",
    "Cam",
    "Channel",
    "CoastSpeed",
    "ConstantSpeed",
    "CrankWheel",
    "CrankingSpeed",
    "DamagedTooth",
    "Dropout",
    "HallSensor",
    "IdleSpeed",
    "IgnitionSpikes",
    "Instrument",
    "Motion",
    "Phaser",
    "PhaserMove",
    "RampSpeed",
    "Renderer",
    "Runt",
    "Scenario",
    "Simulation",
    "SnapSpeed",
    "ValveDrive",
    "VrSensor",
    "cam_pattern",
    "compute_truth",
    "equal_teeth",
    "half_moon",
    "iter_blocks",
    "n_plus_one",
    "preset",
    "simulate",
    "single_tooth",
    "write_scenario",
    "write_truth",
]
