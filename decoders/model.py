"""What flows between the stages of a decode.

    capture file -> reader (blocks) -> front end (edges) -> wheel decoder (teeth, angles)
                 -> analysis (cam angles per cycle, jitter) -> report / JSON

Small frozen dataclasses; derived values (duration, time of a sample) are computed, never stored.
Times are seconds from the first sample of the capture: sample ``n`` is at ``n / sample_rate``.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import ClassVar, Protocol, runtime_checkable

import numpy as np

#: default number of samples per block when streaming a capture
DEFAULT_BLOCK_SIZE = 1 << 16


@dataclass(frozen=True)
class CaptureInfo:
    """What is known about a capture before any sample is decoded.

    >>> info = CaptureInfo("a.wav", 48000.0, 96000, ("ch0", "ch1"), "wav")
    >>> info.duration_s, info.channel_index("ch1"), info.channel_index("0")
    (2.0, 1, 0)
    """

    #: path of the capture as the user gave it (``file.h5:/dataset`` included)
    path: str
    #: samples per second of every channel
    sample_rate: float
    #: samples per channel
    n_samples: int
    #: channel names, in file order
    channels: tuple[str, ...]
    #: short name of the container format ("wav", "flac", "csv", "hdf5", ...)
    format: str
    #: sample format as stored ("PCM_16", "float32", "text", ...)
    subtype: str = ""
    #: time of the first sample on the instrument's own clock (a scope's pre-trigger time)
    t0: float = 0.0
    #: physical unit of each channel when the file says ("V"), else ""
    units: tuple[str, ...] = ()
    #: full-scale value of each channel when the format has one (1.0 for PCM audio), else nan
    full_scale: tuple[float, ...] = ()
    #: free-form notes the reader wants to pass on (resampling done, comment lines, ...)
    notes: tuple[str, ...] = ()

    @property
    def duration_s(self) -> float:
        """Length of the capture in seconds."""
        return self.n_samples / self.sample_rate

    @property
    def n_channels(self) -> int:
        return len(self.channels)

    def channel_index(self, name_or_index: str | int) -> int:
        """Index of a channel given by name or by 0-based index (as int or digit string).

        Raises :class:`~toothcomb.decoders.errors.UsageError` naming the channels there are.
        """
        from .errors import UsageError

        s = str(name_or_index)
        if s in self.channels:
            return self.channels.index(s)
        try:
            i = int(s)
        except ValueError:
            i = None
        if i is not None and 0 <= i < len(self.channels):
            return i
        have = ", ".join(f"{k}={n}" for k, n in enumerate(self.channels))
        raise UsageError(f"channel {s!r} is not in {self.path} (it has {have})")


@dataclass(frozen=True)
class Block:
    """A run of consecutive samples of every channel."""

    #: index of the first sample of this block in the capture
    start: int
    #: samples, shape (n, n_channels), float64
    data: np.ndarray

    @property
    def stop(self) -> int:
        return self.start + self.data.shape[0]


@runtime_checkable
class CaptureSource(Protocol):
    """An open capture. Readers return one; it streams blocks and never loads the whole file."""

    info: CaptureInfo

    def blocks(self, block_size: int = DEFAULT_BLOCK_SIZE) -> Iterator[Block]:
        """Yield consecutive blocks from the first sample to the last, each at most
        ``block_size`` samples long. May be called more than once (each call starts over)."""
        ...

    def close(self) -> None: ...

    def __enter__(self) -> CaptureSource: ...

    def __exit__(self, *exc: object) -> None: ...


@dataclass(frozen=True)
class ChannelLevels:
    """Level statistics of one channel, gathered in a first streaming pass.

    Front ends place their thresholds from these; ``describe`` prints them.
    """

    #: channel name
    name: str
    n: int
    minimum: float
    maximum: float
    mean: float
    #: standard deviation of the samples
    std: float
    #: percentiles 0.1, 1, 5, 25, 50, 75, 95, 99, 99.9 (from a deterministic subsample)
    percentiles: tuple[float, ...]
    #: robust estimate of the noise (median absolute first difference / sqrt(2) / 0.6745)
    noise: float
    #: fraction of samples at the channel's minimum or maximum code (clipping / full scale)
    clipped_fraction: float
    #: number of NaN or infinite samples seen
    non_finite: int = 0
    #: how many samples were in the subsample that gave the percentiles
    subsample: int = 0

    #: the percentile points that ``percentiles`` holds, in order
    POINTS: ClassVar[tuple[float, ...]] = (0.1, 1, 5, 25, 50, 75, 95, 99, 99.9)
    #: index of the first NaN or infinite sample, None when there is none (or it is not known)
    first_non_finite: int | None = None

    def percentile(self, q: float) -> float:
        """One of the stored percentiles (``q`` must be one of :attr:`POINTS`)."""
        return self.percentiles[self.POINTS.index(q)]

    @property
    def span(self) -> float:
        """Robust peak-to-peak: 99.9th minus 0.1th percentile."""
        return self.percentile(99.9) - self.percentile(0.1)


@dataclass(frozen=True)
class Edges:
    """Edge events of one channel, in time order, from a sensor front end.

    ``direction`` is +1 for a rising transition / rising zero crossing, -1 for falling.
    ``strength`` is the size of the transition (Hall: step height; VR: the peak-to-peak of the
    half-waves around the crossing), in the channel's units; decoders use it to spot weak or
    spurious events.
    """

    times: np.ndarray
    direction: np.ndarray
    strength: np.ndarray

    def __post_init__(self) -> None:
        n = len(self.times)
        if len(self.direction) != n or len(self.strength) != n:
            raise ValueError("Edges arrays must have equal length")

    def __len__(self) -> int:
        return len(self.times)

    @classmethod
    def empty(cls) -> Edges:
        return cls(np.empty(0), np.empty(0, dtype=np.int8), np.empty(0))

    @classmethod
    def concat(cls, parts: list[Edges]) -> Edges:
        parts = [p for p in parts if len(p)]
        if not parts:
            return cls.empty()
        return cls(
            np.concatenate([p.times for p in parts]),
            np.concatenate([p.direction for p in parts]).astype(np.int8),
            np.concatenate([p.strength for p in parts]),
        )

    def select(self, mask: np.ndarray) -> Edges:
        return Edges(self.times[mask], self.direction[mask], self.strength[mask])
