"""What wheel decoders share: the decoded tooth track and the wheel plugin contract."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Protocol

import numpy as np

from ..result import Finding


@dataclass(frozen=True)
class ToothTrack:
    """The crank wheel's teeth as decoded: every accepted tooth event with its crank angle.

    Angles are crank degrees counted from the first reference event of the *sync run* the tooth
    belongs to (``revolution * 360 + (tooth - 1) * pitch``). A sync run ends when sync is lost;
    the next one counts from its own first reference event, because the number of revolutions
    in between is not known for certain.
    """

    #: event time of each accepted tooth (s)
    times: np.ndarray
    #: crank angle of each tooth within its sync run (deg)
    angles: np.ndarray
    #: sync run of each tooth (0, 1, ...)
    run: np.ndarray
    #: tooth number on the wheel, 1 = first tooth after the gap
    tooth: np.ndarray
    #: pitches from the previous accepted tooth of the same run (0 for a run's first tooth)
    pitches: np.ndarray
    #: every reference event (tooth 1) found (s)
    reference_times: np.ndarray
    #: crank pitch (deg)
    pitch_deg: float
    #: edges that were not teeth (runt pulses, spikes that got through, noise)
    extra: int = 0
    #: teeth expected but not seen (dropouts, damaged teeth)
    missing: int = 0
    sync_losses: int = 0
    findings: tuple[Finding, ...] = field(default=())

    def __len__(self) -> int:
        return len(self.times)

    @classmethod
    def concat(cls, parts: list[ToothTrack], pitch_deg: float) -> ToothTrack:
        """Pieces from a streaming tracker, in order, as one track. Counters (extra, missing,
        sync losses) are running totals, so the last piece's are kept."""
        parts = list(parts)
        if not parts:
            e = np.empty(0)
            return cls(e, e, e.astype(int), e.astype(int), e.astype(int), e, pitch_deg)
        last = parts[-1]
        return cls(
            times=np.concatenate([p.times for p in parts]),
            angles=np.concatenate([p.angles for p in parts]),
            run=np.concatenate([p.run for p in parts]).astype(int),
            tooth=np.concatenate([p.tooth for p in parts]).astype(int),
            pitches=np.concatenate([p.pitches for p in parts]).astype(int),
            reference_times=np.concatenate([p.reference_times for p in parts]),
            pitch_deg=pitch_deg,
            extra=last.extra,
            missing=last.missing,
            sync_losses=last.sync_losses,
            findings=tuple(f for p in parts for f in p.findings),
        )

    @property
    def runs(self) -> list[np.ndarray]:
        """Index arrays of the teeth of each sync run."""
        if len(self.run) == 0:
            return []
        cuts = np.flatnonzero(np.diff(self.run)) + 1
        return np.split(np.arange(len(self.run)), cuts)

    def rpm_per_tooth(self) -> tuple[np.ndarray, np.ndarray]:
        """(time, rpm) at the middle of each interval between consecutive accepted teeth."""
        ok = self.pitches > 0
        idx = np.flatnonzero(ok)
        idx = idx[idx > 0]
        dt = self.times[idx] - self.times[idx - 1]
        deg = self.pitches[idx] * self.pitch_deg
        rpm = deg / dt / 6.0
        return 0.5 * (self.times[idx] + self.times[idx - 1]), rpm


class WheelPlugin(Protocol):
    """The contract of a ``toothcomb.wheels`` plugin."""

    name: str

    @staticmethod
    def parse(text: str) -> object | None:
        """The wheel spec ``text`` names, or None when this plugin does not know the notation."""
        ...

    @staticmethod
    def decoder(spec: object) -> object: ...
