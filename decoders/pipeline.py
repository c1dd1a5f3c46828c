"""The one loop that drives a capture through the stages (being written)."""

from __future__ import annotations

from collections.abc import Callable

from .options import DecodeOptions
from .result import DecodeResult

#: progress callback: (what, done, total)
Progress = Callable[[str, int, int], None]


def decode_capture(
    path: str, options: DecodeOptions | None = None, progress: Progress | None = None
) -> DecodeResult:
    """Decode a capture file: crank wheel, cam edges in crank degrees, jitter."""
    raise NotImplementedError("decode_capture is being written")
