"""Turn a scenario into samples, in one go or block by block, and into files.

Sample ``n`` of a capture is at ``t = n / sample_rate``. A scope or plain-float recording takes
each channel's voltage exactly at those instants; a sound card recording is generated
``oversample`` times faster, AC-coupled, filtered and decimated (see
:class:`~.chain.Decimator`), so its samples are the band-limited signal at the same instants.
Blocks must be asked for in order; their concatenation equals the one-shot result.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import UsageError
from ..model import DEFAULT_BLOCK_SIZE, Block
from .chain import (
    AcCoupling,
    Decimator,
    NoisePages,
    exp_pulses,
    quantise_pcm,
    quantise_scope,
)
from .engine import TAIL_TAUS, build_model
from .scenario import Channel, Scenario

#: longest run of high-rate samples generated at once (bounds memory)
HI_CHUNK = 1 << 18


def _as_scenario(scenario: Scenario | Mapping[str, Any]) -> Scenario:
    if isinstance(scenario, Scenario):
        return scenario
    if isinstance(scenario, Mapping):
        return Scenario.from_dict(scenario)
    raise UsageError(f"scenario {scenario!r} is neither a Scenario nor a dict; give one of those")


def scope_ranges(scenario: Scenario) -> list[tuple[float, float]]:
    """Input range (low, high) of each channel on a scope: the channel's own, the instrument's,
    or one that holds the signal (sensor levels or VR peak at the top speed, spikes, 5 sigma of
    noise, dropout levels, then gain and offset) with a tenth of its span to spare."""
    sc = scenario
    model = build_model(sc)
    out = []
    for ch in sc.resolved_channels():
        if ch.range_v is not None:
            out.append(ch.range_v)
            continue
        if sc.instrument.range_v is not None:
            out.append(sc.instrument.range_v)
            continue
        src = model.source(ch.source)
        if src is None:
            lo, hi = 0.0, 0.0
        elif src.flux is None:
            lo, hi = src.hall_levels()
            lo, hi = min(lo, hi), max(lo, hi)
        else:
            pk = src.peak_volts(model.omega_max)
            lo, hi = -pk, pk
        for d in ch.dropouts:
            lo, hi = min(lo, d.level_v), max(hi, d.level_v)
        if sc.spikes is not None and (not sc.spikes.channels or ch.label in sc.spikes.channels):
            a = sc.spikes.amplitude_v
            lo, hi = (lo + min(a, 0.0)), (hi + max(a, 0.0))
        lo -= 5 * ch.noise_v
        hi += 5 * ch.noise_v
        a, b = sorted((ch.gain * lo + ch.offset_v, ch.gain * hi + ch.offset_v))
        span = max(b - a, 0.1)
        out.append((a - span / 10.0, b + span / 10.0))
    return out


class Renderer:
    """Generates the samples of a scenario block by block (blocks in order, from sample 0)."""

    def __init__(self, scenario: Scenario) -> None:
        self.sc = scenario
        self.model = build_model(scenario)
        self.inst = scenario.instrument
        self.fs = float(self.inst.sample_rate)
        self.channels: tuple[Channel, ...] = scenario.resolved_channels()
        self.names = tuple(c.label for c in self.channels)
        nch = len(self.channels)
        self._next = 0
        sound = self.inst.kind == "soundcard"
        self.factor = self.inst.oversample if sound else 1
        self.noise = [NoisePages(scenario.seed, k, 1 if sound else 0) for k in range(nch)]
        self._ranges = scope_ranges(scenario) if self.inst.kind == "scope" else []
        if sound:
            self.fs_hi = self.fs * self.factor
            self.dec = Decimator(self.factor)
            fc = self.inst.resolved_ac_corner_hz
            self.ac = AcCoupling(fc, self.fs_hi, nch) if fc > 0 else None
            self._warm = self.ac.settle_samples(self.fs_hi) if self.ac is not None else 0
            self._hi_next: int | None = None
            self._buf = np.empty((nch, 0))
            self._buf_start = 0

    # ---------------------------------------------------------------- analog voltages
    def analog(self, idx: np.ndarray, rate: float, noise_factor: float = 1.0) -> np.ndarray:
        """Channel voltages (after gain and offset) at sample indices ``idx`` of a grid at
        ``rate``; shape (n_channels, len(idx)). ``idx`` must be consecutive."""
        t = idx / rate
        motion = self.model.motion
        theta = motion.angle(t)
        omega = motion.omega(t, theta)
        outs: dict[str, np.ndarray] = {}
        for ch in self.channels:
            if ch.source not in outs:
                src = self.model.source(ch.source)
                outs[ch.source] = np.zeros_like(t) if src is None else src.output(t, theta, omega)
        pulses = None
        sp = self.sc.spikes
        if sp is not None:
            times = self.model.spike_times(float(t[0]) - TAIL_TAUS * sp.tau_s, float(t[-1]) + 1e-9)
            pulses = exp_pulses(t, times, sp.amplitude_v, sp.tau_s)
        out = np.empty((len(self.channels), t.size))
        for k, ch in enumerate(self.channels):
            v = outs[ch.source]
            v = -v if ch.reversed else v.copy()
            for d in ch.dropouts:
                m = (t >= d.t_s) & (t < d.t_s + d.duration_s)
                v[m] = d.level_v
            if pulses is not None and (not sp.channels or ch.label in sp.channels):
                v += pulses
            if ch.noise_v > 0:
                white = self.noise[k].normal(int(idx[0]), int(idx[-1]) + 1)
                v += (ch.noise_v * noise_factor) * white
            out[k] = ch.gain * v + ch.offset_v
        return out

    # ---------------------------------------------------------------- blocks
    def render(self, n0: int, n1: int) -> np.ndarray:
        """Samples n0 .. n1-1, shape (n1 - n0, n_channels); call with consecutive ranges."""
        if n0 != self._next:
            raise UsageError(
                f"blocks must follow each other: expected sample {self._next}, got {n0}"
            )
        self._next = n1
        if n1 <= n0:
            return np.empty((0, len(self.channels)))
        if self.inst.kind == "soundcard":
            return self._sound(n0, n1)
        y = self.analog(np.arange(n0, n1, dtype=np.int64), self.fs)
        if self.inst.kind == "scope":
            bits = self.inst.resolved_bits
            for k, (lo, hi) in enumerate(self._ranges):
                y[k] = quantise_scope(y[k], lo, hi, bits)
        return y.T.copy()

    def _sound(self, n0: int, n1: int) -> np.ndarray:
        L, D = self.factor, self.dec.delay
        need_end = (n1 - 1) * L + D + 1
        seg_start = n0 * L - D
        if self._hi_next is None:
            self._hi_next = seg_start - self._warm
            self._buf_start = self._hi_next
        fs_scale = 1.0 / self.inst.full_scale_v
        while self._hi_next < need_end:
            m1 = min(need_end, self._hi_next + HI_CHUNK)
            x = (
                self.analog(np.arange(self._hi_next, m1, dtype=np.int64), self.fs_hi, math.sqrt(L))
                * fs_scale
            )
            if self.ac is not None:
                x = self.ac.process(x)
            self._buf = np.concatenate((self._buf, x), axis=1)
            self._hi_next = m1
            if self._buf_start < seg_start:  # warm-up samples the filter no longer needs
                drop = min(seg_start - self._buf_start, self._buf.shape[1])
                self._buf = self._buf[:, drop:]
                self._buf_start += drop
        x = self._buf[:, seg_start - self._buf_start : need_end - self._buf_start]
        y = self.dec.apply(x, n1 - n0)
        keep_from = n1 * L - D
        drop = keep_from - self._buf_start
        self._buf = self._buf[:, drop:]
        self._buf_start = keep_from
        return quantise_pcm(y, self.inst.resolved_bits).T.copy()


def iter_blocks(
    scenario: Scenario | Mapping[str, Any], block_size: int = DEFAULT_BLOCK_SIZE
) -> Iterator[Block]:
    """The capture of ``scenario`` as consecutive :class:`~toothcomb.decoders.model.Block` s of at
    most ``block_size`` samples; memory stays bounded whatever the duration.

    >>> sc = Scenario(duration_s=0.02)   # 100 kS/s: 2000 samples, crank and one cam
    >>> [b.data.shape for b in iter_blocks(sc, 800)]
    [(800, 2), (800, 2), (400, 2)]
    """
    sc = _as_scenario(scenario)
    if block_size < 1:
        raise UsageError(f"block_size {block_size!r} must be at least 1 sample")
    r = Renderer(sc)
    n = sc.n_samples
    for n0 in range(0, n, block_size):
        n1 = min(n, n0 + block_size)
        yield Block(n0, r.render(n0, n1))


@dataclass(frozen=True, eq=False)
class Simulation:
    """A simulated capture and its exact answer."""

    scenario: Scenario
    #: samples, shape (n, n_channels), float64 (volts, or full scale for a sound card)
    samples: np.ndarray
    #: what a decoder should find (see :func:`~.truth.compute_truth`)
    truth: dict[str, Any] = field(repr=False)

    @property
    def sample_rate(self) -> float:
        return self.scenario.sample_rate

    @property
    def channels(self) -> tuple[str, ...]:
        return tuple(c.label for c in self.scenario.resolved_channels())

    @property
    def duration_s(self) -> float:
        return self.samples.shape[0] / self.sample_rate

    @property
    def units(self) -> str:
        return self.scenario.instrument.units

    def times(self) -> np.ndarray:
        """Time of each sample, seconds."""
        return np.arange(self.samples.shape[0]) / self.sample_rate

    def channel(self, name: str) -> np.ndarray:
        """Samples of one channel by name."""
        if name not in self.channels:
            raise UsageError(
                f"channel {name!r} is not simulated (there are: {', '.join(self.channels)})"
            )
        return self.samples[:, self.channels.index(name)]

    def write(
        self,
        path: str | os.PathLike[str],
        format: str | None = None,
        subtype: str | None = None,
        truth_path: str | os.PathLike[str] | None = None,
    ) -> None:
        """Write the samples as a capture file (format from the suffix unless given) and, when
        ``truth_path`` is given, the truth as JSON."""
        from ..readers.write import write_capture

        sc = self.scenario
        write_capture(
            path,
            self.samples,
            self.sample_rate,
            self.channels,
            format=format,
            subtype=subtype if subtype is not None else _default_subtype(sc, path, format),
            units=self.units,
            comments=_comments(sc),
        )
        if truth_path is not None:
            write_truth(self.truth, truth_path)


def _default_subtype(sc: Scenario, path: str | os.PathLike[str], fmt: str | None) -> str | None:
    f = (fmt or os.path.splitext(os.fspath(path))[1].lstrip(".")).lower()
    if sc.instrument.kind == "soundcard" and f in ("wav", "flac", "aif", "aiff"):
        return f"PCM_{sc.instrument.resolved_bits}"
    return None


def _comments(sc: Scenario) -> list[str]:
    out = ["simulated by toothcomb"]
    if sc.name:
        out.append(f"scenario: {sc.name}")
    if sc.description:
        out.append(sc.description)
    out.append(f"seed: {sc.seed}")
    return out


def write_truth(truth: Mapping[str, Any], path: str | os.PathLike[str]) -> None:
    """Write a truth dict as JSON (atomically: a temporary file moved into place)."""
    p = os.fspath(path)
    tmp = f"{p}.part"
    try:
        with open(tmp, "w", encoding="utf-8") as f:
            json.dump(truth, f, indent=1)
        os.replace(tmp, p)
    except OSError as exc:
        raise UsageError(f"cannot write the truth to {p}: {exc.strerror or exc}") from None


def simulate(scenario: Scenario | Mapping[str, Any], *, teeth: bool = True) -> Simulation:
    """Generate a whole capture in memory, with its truth (``teeth``: include every tooth event).

    >>> sim = simulate(Scenario(duration_s=0.05))
    >>> sim.samples.shape, sim.channels, len(sim.truth["crank"]["reference_times_s"])
    ((5000, 2), ('crank', 'cam_intake'), 1)
    """
    from .truth import compute_truth

    sc = _as_scenario(scenario)
    data = Renderer(sc).render(0, sc.n_samples)
    return Simulation(sc, data, compute_truth(sc, teeth=teeth))


def write_scenario(
    scenario: Scenario | Mapping[str, Any],
    path: str | os.PathLike[str],
    *,
    format: str | None = None,
    subtype: str | None = None,
    block_size: int = DEFAULT_BLOCK_SIZE,
    truth_path: str | os.PathLike[str] | None = None,
    teeth: bool = False,
) -> dict[str, Any]:
    """Write a capture of any length straight to a file, block by block; returns the truth
    (without the per-tooth events unless ``teeth``) and writes it to ``truth_path`` if given."""
    from ..readers.write import open_writer
    from .truth import compute_truth

    sc = _as_scenario(scenario)
    with open_writer(
        path,
        sc.sample_rate,
        [c.label for c in sc.resolved_channels()],
        format=format,
        subtype=subtype if subtype is not None else _default_subtype(sc, path, format),
        units=sc.instrument.units,
        comments=_comments(sc),
    ) as w:
        for b in iter_blocks(sc, block_size):
            w.write(b.data)
    truth = compute_truth(sc, teeth=teeth)
    if truth_path is not None:
        write_truth(truth, truth_path)
    return truth
