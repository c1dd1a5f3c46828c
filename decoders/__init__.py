"""toothcomb.decoders: read crank and cam sensor captures and measure cam timing in crank degrees.

The library behind the ``toothcomb`` command. Data flows one way:

    capture file -> reader (blocks) -> front end (edges) -> wheel decoder (teeth, angles)
                 -> analysis (cam angles per cycle, jitter) -> report / JSON
"""

from .errors import (
    CaptureError,
    DecodeError,
    PluginError,
    SignalError,
    ToothcombError,
    UsageError,
)
from .model import Block, CaptureInfo, ChannelLevels, Edges

__all__ = [
    "Block",
    "CaptureError",
    "CaptureInfo",
    "ChannelLevels",
    "DecodeError",
    "Edges",
    "PluginError",
    "SignalError",
    "ToothcombError",
    "UsageError",
]
