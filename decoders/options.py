"""Options of a decode: what the user tells toothcomb instead of letting it work things out."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

from .model import DEFAULT_BLOCK_SIZE

SensorHint = Literal["hall", "vr"]


@dataclass(frozen=True)
class DecodeOptions:
    """Hints and settings for :func:`toothcomb.decoders.pipeline.decode_capture`.

    Every field left at its default is worked out from the capture.
    """

    #: crank channel, by name or 0-based index
    crank: str | None = None
    #: cam channels, by name or 0-based index; empty: every other channel that carries a signal
    cams: tuple[str, ...] = ()
    #: crank wheel in trade notation ("60-2", "36-1"); None: identified from the tooth periods
    wheel: str | None = None
    #: crank sensor kind; None: identified from the waveform
    crank_sensor: SensorHint | None = None
    #: cam sensor kind (applies to every cam); None: identified per channel
    cam_sensor: SensorHint | None = None
    #: sample rate in Hz for files that do not carry one (or to override a CSV time column)
    sample_rate: float | None = None
    #: samples per block when streaming; results do not depend on it
    block_size: int = DEFAULT_BLOCK_SIZE
    #: the cam phasers should stay parked in this capture (cranking, valve unplugged): any
    #: move is reported as a fault
    phaser_parked: bool = False
    #: channels carrying a phaser valve's PWM command, each "CH" or "CH=CAM" (the cam channel it
    #: drives); empty: a channel that switches at a steady frequency of its own is taken as one
    valves: tuple[str, ...] = ()
    #: "low-side" or "high-side" valve drive; None: told from the flyback spikes
    valve_drive: str | None = None
    #: on a long capture, run the crank's front end in a second process beside the decode
    #: (Linux, two cores or more; :mod:`toothcomb.decoders.worker`); the result is the same
    worker_process: bool = True
