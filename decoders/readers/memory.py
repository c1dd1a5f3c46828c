"""Samples in memory as a capture source, and reading one span of a capture.

Used where a few revolutions of a capture are looked at again (the plot's waveform panel, the
terminal preview): the span is read by streaming the blocks up to its end, never the whole file.

>>> import numpy as np
>>> from toothcomb.decoders.model import CaptureInfo
>>> src = ArraySource(CaptureInfo("mem", 1000.0, 10, ("a",), "memory"), np.arange(10.0)[:, None])
>>> read_span(src, 3, 6)[:, 0].tolist()
[3.0, 4.0, 5.0]
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import numpy as np

from ..model import CaptureInfo
from .base import SourceBase


class ArraySource(SourceBase):
    """Samples already read (n_samples x n_channels), as a capture source."""

    def __init__(self, info: CaptureInfo, data: np.ndarray) -> None:
        super().__init__(info)
        self._data = data

    def _pieces(self, block_size: int) -> Iterator[np.ndarray]:
        yield self._data


def read_span(source: Any, first: int, stop: int, block_size: int = 1 << 16) -> np.ndarray:
    """Samples ``first .. stop - 1`` of every channel (fewer at the end of the capture): the
    blocks up to ``stop`` are streamed, those before ``first`` dropped, reading ends at ``stop``.
    """
    parts = []
    for block in source.blocks(block_size):
        if block.stop <= first:
            continue
        parts.append(block.data[max(0, first - block.start) : stop - block.start])
        if block.stop >= stop:
            break
    if not parts:
        return np.empty((0, source.info.n_channels))
    return np.concatenate(parts)
