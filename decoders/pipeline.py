"""The one loop that drives a capture through the stages.

    capture file -> reader (blocks) -> front end (edges) -> wheel decoder (teeth, angles)
                 -> analysis (cam angles per cycle, jitter) -> result

1. a first streaming pass measures every channel's levels (NaN and flat channels are caught);
2. the first seconds (the *probe*) tell what each channel carries and calibrate the front ends;
3. the edges of the first seconds identify the crank channel, its event direction (leading flank
   or tooth-centre crossing, which also tells reversed VR leads) and the wheel;
4. a second streaming pass turns every channel into edges block by block, follows the wheel
   tooth by tooth, places every cam edge on the crank angle the teeth give, and gathers the
   crank's statistics and jitter as it goes;
5. at the end the cam events are grouped into the distinct edges of each cam pattern.

Every stage keeps its own state across blocks, so nothing depends on the block size. Memory is
bounded in the length of the capture: only the probe, one block and a few teeth are held; what is
kept for the whole capture is the reference events and the cam events (each reported anyway).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from contextlib import ExitStack
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from .actuators.pwm import PwmActuator, drive_side, steady_share
from .analysis.actuator import analyse_valve
from .analysis.campattern import cam_patterns, match_cam
from .analysis.cams import (
    CamEvents,
    build_cam_result,
    choose_phase,
    is_symmetric,
    tooth_level_from_times,
    vr_centre_direction,
)
from .analysis.identify import ChannelLook, look_at_channel
from .analysis.jitter import CrankJitter, tooth_offsets
from .analysis.phaser import with_phaser
from .analysis.timeline import CamLocator
from .edgepass import EdgeBatch, EdgePass, Received
from .errors import DecodeError, SignalError, UsageError
from .levels import CLIP_SHARE, FiniteWatch, check_finite, estimate_levels
from .model import CaptureInfo, CaptureSource, ChannelLevels, Edges
from .options import DecodeOptions
from .plugins import ACTUATORS, FRONTENDS, WHEELS, plugin, plugins
from .readers import open_capture
from .result import ActuatorResult, CamResult, CrankResult, DecodeResult, Finding, RpmStats
from .wheels.base import ToothTrack
from .wheels.missing_tooth import (
    MissingToothSpec,
    gap_candidates,
    gap_fit,
    identify,
    leading_direction,
    split_gaps,
)
from .wheels.pattern import PatternSpec, decode_any, library_wheels, make_tracker, score

#: a crank wheel: an N-M wheel, or any tooth layout from the pattern library
WheelSpec = MissingToothSpec | PatternSpec

#: progress callback: (what, done, total)
Progress = Callable[[str, int, int], None]

#: length of the probe: the first seconds of the capture, at most this many samples
PROBE_SECONDS = 4.0
PROBE_MAX_SAMPLES = 1 << 21
#: fewest samples per tooth period that still time teeth well (fewer: a warning)
# common practice, no source: below about 8 samples per tooth the flank/crossing interpolation
# and the gap ratios both degrade quickly
MIN_SAMPLES_PER_TOOTH = 8.0
#: fewer samples per tooth than this at the mean speed: the decode is refused, not guessed
# common practice, no source: at 5 samples per tooth period a VR half-wave is 2.5 samples long
SAMPLES_PER_TOOTH_REFUSED = 5.0
#: edges the front ends gather, over as many blocks as it takes, before the tooth tracker, the
#: cam locator and the statistics take them (results do not depend on it)
EDGES_PER_HANDOVER = 8192
#: most points kept in the per-tooth engine speed trace (longer captures are thinned by time)
TRACE_POINTS = 50_000


def read_probe(source: CaptureSource, n: int, block_size: int) -> np.ndarray:
    """The first ``n`` samples of every channel, shape (n', channels)."""
    parts = []
    have = 0
    for block in source.blocks(block_size):
        take = min(n - have, block.data.shape[0])
        parts.append(block.data[:take])
        have += take
        if have >= n:
            break
    if not parts:
        return np.empty((0, source.info.n_channels))
    return np.concatenate(parts)


def _wheel_from_hint(text: str) -> WheelSpec:
    for name, wheel in plugins(WHEELS).items():
        spec = wheel.parse(text)
        if spec is not None:
            if not isinstance(spec, MissingToothSpec | PatternSpec):
                raise UsageError(f"wheel {text!r} is a {name} pattern, which decode cannot use yet")
            return spec
    raise UsageError(
        f"wheel {text!r} is not in a known notation; give it as N-M (e.g. 60-2, 36-1, 24-1), "
        "a pattern library name (see `toothcomb patterns`) or a pattern file's path"
    )


def _hint_score(times: np.ndarray, spec: WheelSpec) -> tuple[int, int, float]:
    """How well one direction's events show ``spec``'s gap: (whole gaps, gaps split by a runt
    edge, minus the median misfit of the whole ones); larger is better, in that order. For a
    library wheel: (tooth-1 matches, when most come a revolution apart; 0, minus their median
    misfit)."""
    if isinstance(spec, PatternSpec):
        sc = score(times, spec)
        good = sc.matches if sc.confidence >= LIBRARY_CONFIDENCE else 0
        return good, 0, -sc.misfit if good else -1.0
    whole = np.empty(0, dtype=int)
    cand = gap_candidates(times)
    m, err = gap_fit(times)
    if len(cand):
        whole = cand[m[cand] == spec.missing]
    split = split_gaps(np.asarray(times, float), 1, len(times) - 4, spec.missing)
    fit = -float(np.median(err[whole])) if len(whole) else -1.0
    return len(whole), len(split), fit


def crank_direction(
    edges: Edges, sensor: str, wheel: WheelSpec | None = None
) -> tuple[int, str]:
    """Direction of the crank events the wheel is followed on, and the lead polarity.

    Hall: the leading flank (the one that ends the level held through the gap). VR: the tooth
    centre crossing, the direction whose intervals show the whole gap in one interval (the
    other direction splits it in two, so its largest ratio is smaller); rising centre crossings
    mean the leads are reversed.
    """
    dirs = (1, -1)
    times = {d: edges.times[edges.direction == d] for d in dirs}
    if sensor == "hall":
        if isinstance(wheel, PatternSpec):
            return _hall_pattern_direction(edges, wheel), "normal"
        direction, _share = leading_direction(edges)
        return direction, "normal"
    if wheel is not None:
        hint = {d: _hint_score(times[d], wheel) for d in dirs}
        direction = max(dirs, key=lambda d: (hint[d][0] > 0, hint[d][2], hint[d][1]))
        return direction, "normal" if direction == -1 else "reversed"
    guesses = {d: identify(times[d], clean=False) for d in dirs}
    scores = {d: (1, g.gap_ratio) if g is not None else (0, 0.0) for d, g in guesses.items()}
    direction = max(dirs, key=lambda d: (scores[d][0] > 0, scores[d][1]))
    return direction, "normal" if direction == -1 else "reversed"


@dataclass(frozen=True)
class CrankPlan:
    """How the crank channel is to be followed: worked out from the first seconds."""

    channel: int
    sensor: str
    spec: WheelSpec
    #: +1/-1: direction of the events the wheel is followed on
    direction: int
    polarity: str
    how: str
    findings: tuple[Finding, ...] = ()


def plan_crank(
    edges: Edges,
    channel: int,
    sensor: str,
    name: str,
    wheel: WheelSpec | None,
    sample_rate: float,
) -> CrankPlan:
    """Find the event direction and the wheel from the first seconds' edges."""
    findings: list[Finding] = []
    if wheel is None:
        lib = library_match(edges, sensor)
        if lib is not None:
            direction, polarity, found = lib
            if polarity == "reversed":
                findings.append(_vr_reversed(name))
            how = (f"identified from the tooth periods as the library wheel {found.spec.name} "
                   f"(confidence {found.confidence:.2f})")
            findings += _flank_note(edges, sensor, found.spec, direction, name)
            return CrankPlan(channel, sensor, found.spec, direction, polarity, how,
                             tuple(findings))
    direction, polarity = crank_direction(edges, sensor, wheel)
    if polarity == "reversed":
        findings.append(_vr_reversed(name))
    t = edges.times[edges.direction == direction]
    guess = identify(t)
    if wheel is None:
        if guess is None:
            raise DecodeError(_no_gap_reason(name, t, sample_rate))
        spec = guess.spec
        how = f"identified from the tooth periods (confidence {guess.confidence:.2f})"
        if guess.confidence < MIN_CONFIDENCE:
            raise DecodeError(
                f"the tooth pattern on crank channel {name!r} does not settle on one wheel: the "
                f"best guess, {spec.name}, fits only {guess.confidence:.0%} of the revolutions; "
                "give the wheel with --wheel N-M, or record a cleaner signal"
            )
        if guess.confidence < 0.8:
            findings.append(
                Finding(
                    "warning",
                    "wheel-uncertain",
                    f"the crank wheel looks like {spec.name} but only {guess.confidence:.0%} of "
                    "the gaps agree; give --wheel N-M to be sure",
                )
            )
    else:
        spec = wheel
        how = "given by the user"
        if isinstance(wheel, PatternSpec):
            guess = None  # the N-M guess says nothing about a library wheel
        if guess is not None and guess.spec != wheel and guess.confidence >= 0.8:
            findings.append(
                Finding(
                    "warning",
                    "wheel-mismatch",
                    f"the crank tooth pattern looks like {guess.spec.name}, not the {wheel.name} "
                    "given",
                )
            )
    return CrankPlan(channel, sensor, spec, direction, polarity, how,
                     tuple(findings) + _flank_note(edges, sensor, spec, direction, name))


def _vr_reversed(name: str) -> Finding:
    return Finding(
        "warning",
        "vr-reversed",
        f"crank VR leads on {name} are reversed: tooth centres cross zero rising; "
        "angles are measured on the correct crossings",
    )


#: least share of revolutions a library wheel must fit when it is identified without a hint
# common practice, no source
LIBRARY_CONFIDENCE = 0.8


def _odd_per_rev(track: ToothTrack) -> float:
    """Extra and missing teeth per revolution of a decode, a lost sync counting as ten."""
    revs = max(len(track.reference_times), 1)
    return (track.extra + track.missing + 10 * track.sync_losses) / revs


def library_match(edges: Edges, sensor: str) -> tuple[int, str, Any] | None:
    """A library wheel (other than N-M ones, which ``identify`` finds from the gap alone) that
    the edges show, with the event direction and lead polarity: (direction, polarity, score), or
    None.

    When the gap alone identifies an N-M wheel surely and the teeth follow it without a single
    odd tooth, nothing is looked for. Otherwise a candidate's tooth-1 matches must come once per
    revolution in most revolutions, at least two; the wheel is then followed tooth by tooth
    through the edges, and kept only if that loses sync at most once, finds no more odd teeth
    than a wrong ``--wheel`` hint is allowed (a 60-2 wheel also shows a two-gap wheel's tooth-1
    window, but not its second gap), and fewer than the N-M wheel's decode does."""
    dirs = (1, -1)
    times = {d: edges.times[edges.direction == d] for d in dirs}
    nm_odd = math.inf
    # the N-M wheel on the direction an N-M decode would follow: on a clean wheel it ends the
    # search at once
    d_nm, _polarity = crank_direction(edges, sensor)
    guess = identify(times[d_nm])
    if guess is not None and guess.confidence >= MIN_CONFIDENCE:
        nm_odd = _odd_per_rev(decode_any(times[d_nm], guess.spec))
        if nm_odd == 0.0 and guess.confidence >= 0.95:
            return None
    cands = []
    for spec in library_wheels().values():
        if not isinstance(spec, PatternSpec):
            continue
        for d in dirs:
            sc = score(times[d], spec)
            if sc.matches < 2 or sc.confidence < LIBRARY_CONFIDENCE:
                continue
            cands.append(((sc.confidence, sc.matches, -sc.misfit), d, sc))
    for _key, d, sc in sorted(cands, key=lambda c: c[0], reverse=True):
        track = decode_any(times[d], sc.spec)
        revs = max(len(track.reference_times), 1)
        if track.sync_losses > 1 or track.extra + track.missing > HINT_ODD_PER_REV * revs:
            continue
        if _odd_per_rev(track) >= nm_odd:
            return None  # an N-M wheel explains the teeth at least as well
        if sensor == "hall":
            d = _hall_pattern_direction(edges, sc.spec)
            return d, "normal", score(times[d], sc.spec)
        return d, "normal" if d == -1 else "reversed", sc
    return None


def _flank_note(
    edges: Edges, sensor: str, spec: WheelSpec, direction: int, name: str
) -> tuple[Finding, ...]:
    """A note when a Hall crank's leading flank could not be told from the signal."""
    if sensor != "hall" or not isinstance(spec, PatternSpec):
        return ()
    if leading_direction(edges)[1] >= 0.9:
        return ()
    flank = "rising" if direction > 0 else "falling"
    return (
        Finding(
            "info",
            "hall-flank-assumed",
            f"the {spec.name} wheel on {name!r} has no long level once per revolution, so the "
            f"signal does not show which flank a tooth starts with; the {flank} flanks are "
            f"followed and tooth 1's {flank} flank is the reference event",
        ),
    )


def _hall_pattern_direction(edges: Edges, spec: PatternSpec) -> int:
    """The flank a library wheel is followed on, for a Hall crank. With long levels once or
    more per revolution (gaps), the flank that ends them leads, as on an N-M wheel. Without
    (an extra tooth), the signal does not show which level is a tooth: the one direction whose
    events show the wheel, or the rising flanks when both do."""
    direction, share = leading_direction(edges)
    if share >= 0.9:
        return direction
    ok = [
        d for d in (1, -1)
        if (sc := score(edges.times[edges.direction == d], spec)).matches >= 2
        and sc.confidence >= LIBRARY_CONFIDENCE
    ]
    return ok[0] if len(ok) == 1 else 1


def _rate_needed(teeth_per_s: float) -> float:
    """The sample rate giving MIN_SAMPLES_PER_TOOTH, rounded up to a whole kHz."""
    return math.ceil(MIN_SAMPLES_PER_TOOTH * teeth_per_s / 1000.0) * 1000.0


def _too_few_samples(t: np.ndarray, sample_rate: float) -> str | None:
    """The sentence for a crank sampled too coarsely to decode, or None."""
    if len(t) < 3:
        return None
    spt = float(np.median(np.diff(t))) * sample_rate
    if spt >= MIN_SAMPLES_PER_TOOTH:
        return None
    rate = 1.0 / float(np.median(np.diff(t)))
    return (
        f"{sample_rate:g} Hz gives {spt:.1f} samples per crank tooth at the observed "
        f"{rate:.0f} teeth per second; at least {MIN_SAMPLES_PER_TOOTH:g} are needed: record "
        f"at {_rate_needed(rate):g} Hz or more"
    )


def _no_gap_reason(name: str, t: np.ndarray, sample_rate: float) -> str:
    few = _too_few_samples(t, sample_rate)
    if few:
        return few
    if len(t) < 8:
        return f"crank channel {name!r} shows only {len(t)} tooth events; no wheel can be decoded"
    return (
        f"no missing-tooth gap found on crank channel {name!r}: none of its {len(t)} tooth "
        "intervals is clearly longer than its neighbours; record at least two revolutions, or "
        "check the crank channel (--crank)"
    )


class CrankStats:
    """Engine speed, revolutions, reference events and a speed trace, gathered from the teeth
    as they stream in."""

    def __init__(self, duration_s: float) -> None:
        self.refs: list[np.ndarray] = []
        self.rpm_min = math.inf
        self.rpm_max = -math.inf
        # first and last (time, angle) of each sync run: the mean speed is their spans' ratio,
        # exact whatever pieces the teeth came in
        self._span: dict[int, list[float]] = {}
        self.min_pitch_period = math.inf
        self._last: tuple[int, float, float, float] | None = None  # run, time, angle, first a
        self._first: dict[int, tuple[float, float]] = {}
        self._bucket = max(duration_s / TRACE_POINTS, 1e-9)
        self._next_bucket = -math.inf
        #: the speed trace, as pieces of (times, rpm)
        self._trace: list[tuple[np.ndarray, np.ndarray]] = []
        self.findings: list[Finding] = []
        self.extra = self.missing = self.losses = 0

    def add(self, track: ToothTrack) -> None:
        self.refs.append(track.reference_times)
        self.findings.extend(track.findings)
        self.extra, self.missing, self.losses = track.extra, track.missing, track.sync_losses
        if len(track) == 0:
            return
        t, a, r, p = track.times, track.angles, track.run, track.pitches
        if self._last is not None:
            t = np.concatenate(([self._last[1]], t))
            a = np.concatenate(([self._last[2]], a))
            r = np.concatenate(([self._last[0]], r))
            p = np.concatenate(([0], p))
        same = r[1:] == r[:-1]
        dt = np.diff(t)[same]
        dp = np.diff(a)[same]
        if len(dt):
            rpm = dp / dt / 6.0
            self.rpm_min = min(self.rpm_min, float(rpm.min()))
            self.rpm_max = max(self.rpm_max, float(rpm.max()))
            one = (p[1:][same] == 1) & (dp > 0)
            if np.any(one):
                self.min_pitch_period = min(self.min_pitch_period, float(dt[one].min()))
            self._thin(0.5 * (t[1:] + t[:-1])[same], rpm)
        # each stretch of teeth of one run, in order: a run's span starts at its first tooth
        # and ends at its last
        cut = np.flatnonzero(r[1:] != r[:-1])
        firsts = np.concatenate(([0], cut + 1)).tolist()
        lasts = np.concatenate((cut, [len(r) - 1])).tolist()
        for i0, i1 in zip(firsts, lasts, strict=True):
            span = self._span.setdefault(int(r[i0]), [float(t[i0]), float(a[i0]), 0.0, 0.0])
            span[2], span[3] = float(t[i1]), float(a[i1])
        self._last = (int(r[-1]), float(t[-1]), float(a[-1]), 0.0)

    def _thin(self, mid: np.ndarray, rpm: np.ndarray) -> None:
        """Add to the speed trace the first point at or after the start of each time bucket
        after the bucket of the last point kept (``mid`` rises)."""
        # where the bucket after each point's own starts, and the first point at or after it
        bucket = np.floor(mid / self._bucket)
        after = (bucket + 1) * self._bucket
        nxt = np.maximum(np.searchsorted(mid, after, side="left"), np.arange(1, len(mid) + 1))
        j = int(np.searchsorted(mid, self._next_bucket, side="left"))
        if j >= len(mid):
            return
        # the points kept are, but for rounding at a bucket's edge, the first of each bucket:
        # taken when following ``nxt`` from j confirms them
        take = np.flatnonzero(bucket[1:] != bucket[:-1]) + 1
        take = np.concatenate(([j], take[take > j]))
        if not (np.array_equal(nxt[take[:-1]], take[1:]) and nxt[take[-1]] >= len(mid)):
            follow = nxt.tolist()
            chain = [j]
            while (j := follow[j]) < len(mid):
                chain.append(j)
            take = np.array(chain)
        self._trace.append((mid[take], rpm[take]))
        self._next_bucket = float(after[take[-1]])

    def trace(self) -> np.ndarray:
        """The speed trace: (time s, rpm) rows."""
        if not self._trace:
            return np.empty((0, 2))
        return np.column_stack([np.concatenate(c) for c in zip(*self._trace, strict=True)])

    @property
    def deg(self) -> float:
        """Crank degrees followed, over all sync runs."""
        return float(sum(v[3] - v[1] for v in self._span.values()))

    @property
    def sec(self) -> float:
        """Seconds over which the crank was followed, over all sync runs."""
        return float(sum(v[2] - v[0] for v in self._span.values()))

    @property
    def reference_times(self) -> np.ndarray:
        return np.concatenate(self.refs) if self.refs else np.empty(0)


#: a given wheel that shows more extra and missing teeth than this per revolution is the wrong
#: wheel (a damaged tooth adds one per revolution, a runt one more; common practice, no source)
HINT_ODD_PER_REV = 2.5
#: fewest tooth positions of a crank wheel toothcomb looks for on its own
MIN_POSITIONS = 4
#: least share of revolutions that must agree on a wheel identified without a hint
# common practice, no source
MIN_CONFIDENCE = 0.6


def _pick_crank(
    edges: dict[int, Edges],
    looks: dict[int, ChannelLook],
    info: CaptureInfo,
    wheel: WheelSpec | None = None,
) -> tuple[int, str]:
    """The crank channel: among the channels whose events show a plausible missing-tooth wheel
    (at least four positions, most revolutions agreeing; or the wheel given), the one with the
    most teeth per second. A cam pattern can look like a small wheel, but it never has the
    crank's tooth rate.
    """
    plausible: list[tuple[int, int, str]] = []
    for c, e in edges.items():
        direction, _pol = crank_direction(e, looks[c].kind, wheel)
        t = e.times[e.direction == direction]
        if wheel is not None:
            whole, split, _fit = _hint_score(t, wheel)
            if whole + split >= 2:
                plausible.append((len(e), c, wheel.name))
            continue
        g = identify(t)
        if g is not None and g.spec.positions >= MIN_POSITIONS and g.confidence >= MIN_CONFIDENCE:
            plausible.append((len(e), c, g.spec.name))
        elif (lib := library_match(e, looks[c].kind)) is not None:
            plausible.append((len(e), c, lib[2].spec.name))
    if plausible:
        _n, c, name = max(plausible)
        return c, f"identified: the busiest channel whose tooth periods show a gap ({name})"
    # nothing plausible: say why, about the channels that could have been the crank
    busiest = max(edges, key=lambda c: len(edges[c]))
    e = edges[busiest]
    few = _too_few_samples(e.times[e.direction == 1], info.sample_rate)
    if few:
        raise DecodeError(f"channel {info.channels[busiest]!r}: {few}")
    parts = [f"{info.channels[busiest]} ({looks[busiest].kind}, {len(e)} edges): no tooth "
             "interval stands out as a gap"]
    parts += [
        f"{info.channels[c]}: {lk.reason}"
        for c, lk in looks.items()
        if lk.kind not in ("hall", "vr")
    ]
    raise DecodeError(
        "no channel shows a missing-tooth crank wheel (" + "; ".join(parts) + "); give the "
        "crank channel with --crank and its wheel with --wheel"
    )


def _frontend(look: ChannelLook, sample_rate: float, levels: ChannelLevels):
    return plugin(FRONTENDS, look.kind)(sample_rate, levels, **look.frontend_options)


class _Clipped:
    """A front end fed with the samples clipped to the channel's two plateaus: a solenoid's
    flyback spike at each turn-off is cut off (it lies beyond a plateau), the midpoint crossing
    of each flank is left exactly where it was."""

    def __init__(self, inner: Any, levels: ChannelLevels) -> None:
        self.inner = inner
        lo, hi = levels.percentile(5), levels.percentile(95)
        margin = 0.1 * (hi - lo)
        self.lo, self.hi = lo - margin, hi + margin

    @property
    def settled_s(self) -> float:
        return float(getattr(self.inner, "settled_s", 0.0))

    def process(self, samples: np.ndarray, start: int) -> Edges:
        return self.inner.process(np.clip(samples, self.lo, self.hi), start)

    def finish(self) -> Edges:
        return self.inner.finish()

    def release(self) -> Edges:
        release = getattr(self.inner, "release", None)
        return release() if release is not None else Edges.empty()


@dataclass
class _CamState:
    """What is gathered about one cam channel during the streaming pass."""

    leading: int = 1
    direction_only: int | None = None  # VR: only the tooth-centre crossings are events
    events: list[tuple[np.ndarray, ...]] = field(default_factory=list)
    high_s: float = 0.0
    total_s: float = 0.0
    last: tuple[float, int] | None = None  # time, direction of the last edge seen
    notes: list[Finding] = field(default_factory=list)

    def levels(self, e: Edges) -> None:
        """Time spent high / in total, for the tooth level of a two-level cam."""
        if len(e) == 0:
            return
        t = e.times
        d = e.direction
        if self.last is not None:
            t = np.concatenate(([self.last[0]], t))
            d = np.concatenate(([self.last[1]], d))
        dur = np.diff(t)
        self.high_s += float(np.sum(dur[d[:-1] > 0]))
        self.total_s += float(np.sum(dur))
        self.last = (float(t[-1]), int(d[-1]))


def decode_capture(
    path: str, options: DecodeOptions | None = None, progress: Progress | None = None
) -> DecodeResult:
    """Decode a capture file: crank wheel, cam edges in crank degrees, jitter.

    Raises :class:`~toothcomb.decoders.errors.CaptureError` / ``UsageError`` / ``SignalError``
    (exit code 2) for bad input and :class:`~toothcomb.decoders.errors.DecodeError` (exit code 3)
    when the crank cannot be decoded.
    """
    opts = options or DecodeOptions()
    wheel = _wheel_from_hint(opts.wheel) if opts.wheel else None
    parsing = (lambda d, t: progress("parsing", d, t)) if progress else None
    with (
        open_capture(path, sample_rate=opts.sample_rate, progress=parsing) as src,
        ExitStack() as ending,
    ):
        info = src.info
        fs = info.sample_rate
        lv_progress = (lambda d, t: progress("levels", d, t)) if progress else None
        levels = estimate_levels(src, opts.block_size, progress=lv_progress)
        check_finite(levels, fs)
        _check_recorded(levels, info)
        # levels taken from windows may have missed a NaN: the blocks are watched instead
        watch = FiniteWatch(src, opts.block_size, active=levels[0].n < info.n_samples)
        crank = info.channel_index(opts.crank) if opts.crank is not None else None
        cams = [info.channel_index(c) for c in opts.cams]
        if crank is not None and crank in cams:
            raise UsageError(f"channel {info.channels[crank]!r} is given as both crank and cam")
        if len(set(cams)) != len(cams):
            raise UsageError("the same cam channel is given twice")
        valves = _valve_specs(opts.valves, info, crank, cams)
        n_probe = int(min(info.n_samples, PROBE_MAX_SAMPLES, max(1, PROBE_SECONDS * fs)))
        probe = read_probe(src, n_probe, opts.block_size)
        watch.check(probe)
        used = (
            sorted({crank, *cams, *valves} - {None})
            if (crank is not None and cams)
            else list(range(info.n_channels))
        )
        looks: dict[int, ChannelLook] = {}
        for c in used:
            hint = opts.crank_sensor if c == crank else opts.cam_sensor
            if c in valves:
                hint = "hall"
            looks[c] = look_at_channel(probe[:, c], fs, levels[c], hint=hint)
        # a channel with spikes beyond one of two plateaus may be a valve's PWM (the flyback
        # at each turn-off): it is also followed as one, and told apart once decoded
        auto_valves = not opts.cams and not opts.valves
        as_pwm = {
            c: look_at_channel(probe[:, c], fs, levels[c], hint="hall")
            for c in used
            if auto_valves and c != crank and drive_side(levels[c])[0] is not None
        }
        clip_marks = _clip_marks(probe, levels, looks, info)
        del probe
        if crank is not None and looks[crank].kind in ("flat", "noise"):
            raise DecodeError(
                f"crank channel {info.channels[crank]!r} has no usable signal: "
                f"{looks[crank].reason}"
            )
        live = [c for c in used if looks[c].kind in ("hall", "vr")]
        if not live:
            raise DecodeError(
                f"no channel of {info.path} carries a signal ("
                + "; ".join(f"{info.channels[c]}: {looks[c].reason}" for c in used)
                + ")"
            )

        # -- one pass of every live channel through its front end, from here to the end --
        fronts: dict[int, Any] = {}
        for c in live:
            if c not in valves:
                fronts[c] = _frontend(looks[c], fs, levels[c])
            elif looks[c].kind == "hall":
                fronts[c] = _Clipped(_frontend(looks[c], fs, levels[c]), levels[c])
        pwm_views = {
            c: _Clipped(_frontend(as_pwm[c], fs, levels[c]), levels[c]) for c in as_pwm if c in live
        }
        total = info.n_samples
        edge_pass = EdgePass(src, fronts, pwm_views, opts.block_size, watch)
        ending.callback(edge_pass.close)
        got = Received(edge_pass, (lambda s: progress("edges", s, total)) if progress else None)

        # -- the first seconds: which channel is the crank, which way, which wheel --
        choices: dict[str, str] = {}
        seconds = PROBE_SECONDS
        while True:
            stop = int(min(total, max(1.0, seconds * fs)))
            whole = stop >= total
            got.until(math.inf if whole else stop / fs)
            head = {c: got.edges(c, None if whole else stop / fs) for c in fronts}
            try:
                if crank is None:
                    c_pick, why = _pick_crank(head, looks, info, wheel)
                else:
                    c_pick, why = crank, "given by the user"
                name = info.channels[c_pick]
                plan = plan_crank(head[c_pick], c_pick, looks[c_pick].kind, name, wheel, fs)
                break
            except DecodeError as exc:
                if whole:
                    _aliased(exc, head, looks, info, wheel, crank)
                    _too_coarse(exc, looks, crank, info)
                    raise
                seconds *= 4.0
        crank = c_pick
        choices["crank"] = f"{info.channels[crank]}: {why}"
        choices["crank_sensor"] = _sensor_choice(looks[crank])
        early: list[Finding] = []
        if opts.crank is None and crank != 0:
            early.append(
                Finding(
                    "info",
                    "crank-channel",
                    f"the crank signal is on channel {info.channels[crank]!r}, not the first "
                    "channel (inputs swapped or in another order); found from its tooth "
                    "pattern",
                )
            )
        choices["wheel"] = f"{plan.spec.name}: {plan.how}"
        if not cams:
            cams = [c for c in live if c != crank and c not in valves]
        pwm_plugin = plugin(ACTUATORS, "pwm")
        pwm = {v: pwm_plugin() for v in valves if v in live and looks[v].kind == "hall"}
        # cam channels that may turn out to be a valve command (told apart once decoded)
        maybe_pwm = {c: pwm_plugin() for c in cams if c in as_pwm}
        followed = {c for c in [crank, *cams, *pwm] if c in live}
        edge_pass.keep(followed | set(maybe_pwm))
        if opts.worker_process:
            edge_pass.hand_off({crank})
        state: dict[int, _CamState] = {c: _CamState() for c in cams}
        for c in cams:
            if looks[c].kind == "vr":
                centre = vr_centre_direction(head[c])
                state[c].direction_only = centre
                state[c].leading = centre
                if centre > 0:
                    state[c].notes.append(
                        Finding(
                            "warning",
                            "vr-reversed",
                            f"cam VR leads on {info.channels[c]!r} are reversed: tooth "
                            "centres cross zero rising; angles are measured on the correct "
                            "crossings",
                        )
                    )
        offsets, offset_findings = _tooth_offsets(head[crank], plan, info.channels[crank])
        offset_findings += _clipped_teeth(clip_marks, head[crank], plan, info)
        del head

        # -- the whole capture: the edges, block by block, as the front ends find them --
        tracker = make_tracker(plan.spec, offsets)
        locator = CamLocator(max_pitches=plan.spec.max_step)
        jitter = CrankJitter(plan.spec.pitch_deg)
        stats = CrankStats(info.duration_s)
        stats.findings.extend(early + offset_findings)

        def take(edges: dict[int, Edges], teeth: ToothTrack) -> None:
            for c, e in edges.items():
                if c == crank:
                    continue
                if c in pwm:
                    pwm[c].add(e)
                    continue
                st = state[c]
                if st.direction_only is None:
                    st.levels(e)
                else:
                    e = e.select(e.direction == st.direction_only)
                locator.add_cam(c, e.times, e.direction)
            jitter.add(teeth)
            stats.add(teeth)
            for c, ev in locator.add_teeth(teeth).items():
                state[c].events.append(ev)

        # the per-edge stages take the edges of several blocks at once: what they find does
        # not depend on how the edges are cut, and a call per block would cost more than the
        # block's samples do
        waiting: dict[int, list[Edges]] = {c: [] for c in followed}
        settled = math.inf

        def hand_over() -> None:
            edges = {c: Edges.concat(parts) for c, parts in waiting.items()}
            for parts in waiting.values():
                parts.clear()
            ce = edges[crank]
            teeth = tracker.feed(ce.times[ce.direction == plan.direction])
            take(edges, teeth)
            locator.forget_before(settled)

        held = 0

        def handle(batch: EdgeBatch) -> None:
            nonlocal held, settled
            for c in followed:
                e = batch.edges.get(c)
                if e is not None and len(e):
                    waiting[c].append(e)
                    held += len(e)
            for c, e in batch.extra.items():
                if c in maybe_pwm:
                    maybe_pwm[c].add(e)
            if not batch.final:
                settled = min(
                    (batch.settled.get(c, 0.0) for c in cams if c in followed),
                    default=math.inf,
                )
            if held >= EDGES_PER_HANDOVER:
                hand_over()
                held = 0

        fresh = got.stop
        for batch in got:
            handle(batch)
            if progress is not None and batch.stop > fresh:
                progress("edges", batch.stop, total)
        hand_over()
        take({}, tracker.finish())
        jitter.flush()
        for c, ev in locator.finish().items():
            state[c].events.append(ev)
        # steps on the crank channel that did not hold: a short pulse gives at most one of
        # each direction
        rejected = edge_pass.rejected(crank)
        pulses = max(rejected.values(), default=0)
        if pulses:
            stats.extra += pulses
            stats.findings.append(
                Finding(
                    "info",
                    "extra-edge",
                    f"{pulses} short pulse(s) on crank channel {info.channels[crank]!r} did not "
                    "hold long enough to be teeth (runt pulses or ignition spikes) and were "
                    "ignored",
                )
            )

    refs = stats.reference_times
    revs = stats.deg / 360.0
    if stats.losses >= 3 and stats.losses > 0.2 * max(revs, 1.0):
        raise DecodeError(
            f"crank channel {info.channels[crank]!r} does not follow the {plan.spec.name} "
            f"wheel: sync was lost {stats.losses} times in {revs:.0f} revolutions; check the "
            "wheel (--wheel), or leave it out to let toothcomb identify it"
        )
    odd = stats.extra + stats.missing
    if wheel is not None and odd >= 10 and odd > HINT_ODD_PER_REV * max(revs, 1.0):
        raise DecodeError(
            f"crank channel {info.channels[crank]!r} does not follow the {plan.spec.name} "
            f"wheel: {stats.extra} extra and {stats.missing} missing teeth in {revs:.0f} "
            "revolutions; check the wheel (--wheel), or leave it out to let toothcomb identify it"
        )
    if len(refs) == 0:
        _too_coarse(DecodeError("no reference event"), looks, crank, info)
        raise DecodeError(
            f"no {plan.spec.name} gap found on crank channel {info.channels[crank]!r}; check the "
            "wheel (--wheel) and the channel (--crank)"
        )
    valve_work = _Valves(valves, pwm, maybe_pwm, levels, opts.valve_drive)
    return _result(
        info, plan, stats, jitter, cams, state, locator, looks, choices, fs, opts.phaser_parked,
        valve_work,
    )


# --------------------------------------------------------------------------- valve channels


@dataclass
class _Valves:
    """Valve command channels: which, the cam each drives (None: to be proposed), their PWM
    collectors, and cam channels that may turn out to be valves."""

    pairs: dict[int, int | None]
    pwm: dict[int, PwmActuator]
    maybe_pwm: dict[int, PwmActuator]
    levels: list[ChannelLevels]
    drive_hint: str | None
    #: channels found to be valves without a hint, and why
    found: dict[int, str] = field(default_factory=dict)


def _valve_specs(specs: tuple[str, ...], info: CaptureInfo, crank: int | None,
                 cams: list[int]) -> dict[int, int | None]:
    """``CH`` or ``CH=CAM`` hints -> {valve channel: cam channel or None}."""
    out: dict[int, int | None] = {}
    for text in specs:
        ch, sep, cam = text.partition("=")
        v = info.channel_index(ch.strip())
        c = info.channel_index(cam.strip()) if sep else None
        if v == crank:
            raise UsageError(f"channel {info.channels[v]!r} is given as both crank and valve")
        if v in cams:
            raise UsageError(f"channel {info.channels[v]!r} is given as both cam and valve")
        if c is not None and (c == v or c == crank):
            raise UsageError(
                f"--valve {text!r}: a valve drives a cam; name a cam channel after '='"
            )
        if v in out:
            raise UsageError(f"valve channel {info.channels[v]!r} is given twice")
        out[v] = c
    return out


#: share of PWM periods within 0.3 % of their median for a channel to be a steady PWM
PWM_STEADY = 0.95
#: a cam's events, measured in crank degrees, are at least this steady
CAM_LOCKED = 0.5


def _pwm_not_cam(collector: PwmActuator, ev: CamEvents) -> str | None:
    """Why a channel taken for a cam is a PWM valve command instead (None: it is a cam).

    A PWM switches at a steady frequency of its own: its periods in time hardly vary while the
    same periods in crank degrees follow every change of engine speed. A cam is the other way
    round. When the engine speed does not vary at all the two cannot be told apart, and the
    channel stays a cam (``--valve`` names it).
    """
    t, d = collector.edges()
    rising = t[d > 0]
    if len(rising) < 20 or steady_share(rising) < PWM_STEADY:
        return None
    angle = np.sort(ev.crank_angle[(ev.direction > 0) & (ev.run == np.bincount(ev.run).argmax())]
                    ) if len(ev.times) else np.empty(0)
    if len(angle) >= 3 and steady_share(angle) >= CAM_LOCKED:
        return None
    hz = 1.0 / float(np.median(np.diff(rising)))
    return (
        f"it switches at a steady {hz:.1f} Hz that does not follow the engine speed: read as a "
        "valve command (PWM)"
    )


def _valve_results(
    vw: _Valves, info: CaptureInfo, cams: list[CamResult], crank: CrankResult
) -> tuple[list[CamResult], list[ActuatorResult], list[Finding]]:
    """Decode each valve channel and pair it with the cam it drives."""
    findings: list[Finding] = []
    by_name = {c.channel: i for i, c in enumerate(cams)}
    out: list[ActuatorResult] = []
    lonely = len(vw.pairs) == 1
    for v, cam_idx in vw.pairs.items():
        name = info.channels[v]
        if v in vw.found:
            findings.append(
                Finding("info", "valve-channel", f"channel {name!r}: {vw.found[v]}; name it "
                        "with --valve if that is wrong")
            )
        if v not in vw.pwm:
            findings.append(
                Finding("warning", "valve-no-signal", f"valve channel {name!r} does not switch "
                        "between two levels; no valve command was read")
            )
            continue
        if vw.drive_hint:
            drive, how = vw.drive_hint, "given by the user"
        else:
            drive, how = drive_side(vw.levels[v])
        trace = vw.pwm[v].finish(drive)  # type: ignore[arg-type]
        target: int | None = None
        pairing = None
        if cam_idx is not None:
            target = by_name.get(info.channels[cam_idx])
            pairing = "given"
            if target is None:
                findings.append(
                    Finding("warning", "valve-cam-missing", f"valve channel {name!r} is paired "
                            f"with {info.channels[cam_idx]!r}, which was not decoded as a cam")
                )
        elif lonely and cams:
            target = max(range(len(cams)), key=lambda i: _activity(cams[i]))
            pairing = "proposed"
            findings.append(
                Finding(
                    "info",
                    "valve-paired",
                    f"valve channel {name!r} is taken to drive cam {cams[target].channel!r} "
                    + ("(the only cam)" if len(cams) == 1 else "(the cam whose phase moved most)")
                    + f"; name the pairing with --valve {name}=CAM if it drives another",
                )
            )
        elif cams:
            findings.append(
                Finding("info", "valve-unpaired", f"valve channel {name!r}: several valves and "
                        f"no pairing given; name it with --valve {name}=CAM")
            )
        cam = cams[target] if target is not None else None
        result = analyse_valve(
            trace, name, drive, how,
            cam.phaser if cam is not None else None,
            cam.channel if cam is not None else None,
            pairing,
            f"cam {cam.channel!r}" if cam is not None else None,
        )
        out.append(result)
        if target is not None:
            cams[target] = replace(cams[target], actuator=result)
    return cams, out, findings


def _activity(cam: CamResult) -> float:
    """How much a cam's phase moved (largest travel, else the spread of its holds)."""
    ph = cam.phaser
    if ph is None:
        return 0.0
    if ph.moves:
        return ph.authority_deg
    return max((h.pp_deg for h in ph.holds), default=0.0)


#: a tooth is placed at its measured angle when it sits this far (in pitches) from its nominal
#: one, and that far beyond four standard errors
# common practice, no source
TOOTH_OFFSET_MIN = 0.05


def _tooth_offsets(
    edges: Edges, plan: CrankPlan, name: str
) -> tuple[dict[int, float], list[Finding]]:
    """Teeth that sit away from their nominal angle (a wide tooth, a bent one), measured on the
    first seconds; angles between teeth are then interpolated from where they really are."""
    track = decode_any(edges.times[edges.direction == plan.direction], plan.spec)
    pitch = plan.spec.pitch_deg
    K = plan.spec.teeth
    # find the worst tooth, take it out of the fits, look again: at most two teeth
    picked: set[int] = set()
    found = tooth_offsets(track)
    for _ in range(2):
        cands = [
            (abs(mean), tooth)
            for tooth, (mean, sem, n) in found.items()
            if tooth != 1
            and tooth not in picked
            and n >= 3
            and abs(mean) > TOOTH_OFFSET_MIN * pitch
            and abs(mean) > 4.0 * sem
        ]
        if not cands:
            break
        picked.add(max(cands)[1])
        found = tooth_offsets(track, exclude=frozenset(picked))

    def off(k: int) -> float:
        return abs(found.get((k - 1) % K + 1, (0.0, 0.0, 0))[0])

    out: dict[int, float] = {}
    findings: list[Finding] = []
    for tooth in sorted(picked):
        mean, _sem, n = found[tooth]
        # a tooth out of place stands alone; a smooth pattern over many teeth is speed ripple
        # the local fit did not follow, not the wheel
        others = max(off(tooth - 2), off(tooth - 1), off(tooth + 1), off(tooth + 2))
        if abs(mean) > TOOTH_OFFSET_MIN * pitch and abs(mean) > 3.0 * others:
            out[tooth] = mean
            findings.append(
                Finding(
                    "info",
                    "tooth-offset",
                    f"crank tooth {tooth} on {name!r} sits {mean:+.2f} deg from its nominal "
                    f"position (a wide, narrow or bent tooth, {n} revolutions); angles use its "
                    "measured position",
                )
            )
    if len(out) > 2:  # not single teeth: leave the wheel as drawn
        return {}, []
    return out, findings


def _sensor_choice(look: ChannelLook) -> str:
    if look.kind not in ("hall", "vr"):
        return f"{look.kind}: {look.reason}"
    return f"{look.kind} (confidence {look.confidence:.2f}): {look.reason}"


# --------------------------------------------------------------------------- guard rails

#: a cam pattern is looked for over at most this many edge intervals
CAM_PERIOD_MAX = 8
#: fewest engine cycles a capture should span (each cam edge seen twice, cycle phase fixed)
# common practice, no source
MIN_CYCLES = 2.0
#: share of the crank teeth that must sit flat at the converter's limit for a clipping warning
# common practice, no source: "most teeth"
CLIPPED_TEETH_SHARE = 0.5


def _check_recorded(levels: tuple[ChannelLevels, ...], info: CaptureInfo) -> None:
    """Refuse (exit 2) a capture of one sample, or one whose every channel holds one value
    throughout: nothing was recorded. Only when the levels cover every sample."""
    if info.n_samples < 2:
        raise SignalError(
            f"{info.path} holds a single sample; a decode needs a recording of at least two "
            "engine cycles: record for longer"
        )
    if not levels or min(lv.n for lv in levels) < info.n_samples:
        return
    if all(lv.maximum == lv.minimum for lv in levels):
        values = ", ".join(f"{lv.name} = {lv.minimum:.6g}" for lv in levels[:4])
        raise SignalError(
            f"every channel of {info.path} holds one value throughout ({values}, over all "
            f"{info.n_samples} samples): nothing was recorded; check the probes and the inputs "
            "and record again"
        )


def _clip_marks(
    probe: np.ndarray,
    levels: tuple[ChannelLevels, ...],
    looks: dict[int, ChannelLook],
    info: CaptureInfo,
) -> dict[int, tuple[np.ndarray, float]]:
    """For each channel that clips (a VR sensor flat at its extreme, or any sensor flat at the
    converter's full scale): which probe samples sit at the clip level, and that level."""
    out: dict[int, tuple[np.ndarray, float]] = {}
    for c, look in looks.items():
        lv = levels[c]
        if look.kind not in ("hall", "vr") or lv.maximum <= lv.minimum:
            continue
        x = probe[:, c]
        fs_c = info.full_scale[c] if c < len(info.full_scale) else math.nan
        marks = np.zeros(len(x), dtype=bool)
        level = math.nan
        for end in (lv.maximum, lv.minimum):
            at = x == end
            at_limit = math.isfinite(fs_c) and abs(end) >= fs_c * (1 - 2.0**-14)
            if np.mean(at) >= CLIP_SHARE and (look.kind == "vr" or at_limit):
                marks |= at
                level = end if math.isnan(level) else level
        if marks.any():
            out[c] = (marks, level)
    return out


def _clipped_teeth(
    marks: dict[int, tuple[np.ndarray, float]], edges: Edges, plan: CrankPlan, info: CaptureInfo
) -> list[Finding]:
    """A warning when most crank teeth of the first seconds sit flat at the clip level (two or
    more samples in a row at it within the tooth period)."""
    if plan.channel not in marks:
        return []
    at, level = marks[plan.channel]
    t = edges.times[edges.direction == plan.direction]
    idx = np.clip(np.round(t * info.sample_rate).astype(np.int64), 0, len(at))
    if len(idx) < 3:
        return []
    # run[k]: samples before k that sit at the clip level together with the one before them
    run = np.concatenate(([0], np.cumsum(np.concatenate(([False], at[1:] & at[:-1])))))
    flat = run[idx[1:]] - run[idx[:-1]] > 0
    share = float(np.mean(flat))
    if share <= CLIPPED_TEETH_SHARE:
        return []
    name = info.channels[plan.channel]
    unit = info.units[plan.channel] if plan.channel < len(info.units) else ""
    return [
        Finding(
            "warning",
            "clipping",
            f"crank channel {name!r} is clipped on {int(flat.sum())} of {len(flat)} teeth "
            f"({share:.0%}) in the first {len(at) / info.sample_rate:.3g} s: it sits flat at "
            f"{level:+.6g}{(' ' + unit) if unit else ''}; flanks and zero crossings still time "
            "the teeth, but the input is overdriven: lower its level (a divider) so the tooth "
            "shapes are recorded",
        )
    ]


def _cam_pattern_period(t: np.ndarray) -> float | None:
    """Seconds after which the intervals between one direction's cam edges repeat (the shortest
    lag of up to :data:`CAM_PERIOD_MAX` intervals that fits all of them within 5 %), or None."""
    d = np.diff(t)
    for m in range(1, CAM_PERIOD_MAX + 1):
        if len(d) < 2 * m + 1:
            return None
        if np.all(np.abs(d[m:] - d[:-m]) <= 0.05 * d[m:]):
            return float(np.median(np.convolve(d, np.ones(m), "valid")))
    return None


def _aliased(
    exc: DecodeError,
    edges: dict[int, Edges],
    looks: dict[int, ChannelLook],
    info: CaptureInfo,
    wheel: WheelSpec | None,
    crank: int | None,
) -> None:
    """Replace a failure by the sentence about aliasing when a cam shows an engine speed at which
    the given wheel's tooth frequency lies above half the sample rate.

    The cam turns once per engine cycle and is slow enough to be sampled well; taking its
    pattern to repeat once per cycle, the speed it shows sets the crank's tooth frequency. A
    tooth frequency above half the sample rate cannot be recorded: it shows folded to a lower
    one (source: Nyquist-Shannon sampling theorem; Shannon, Proc. IRE 37 (1949) 10-21).
    """
    if wheel is None:
        return
    fs = info.sample_rate
    busiest = crank if crank is not None else max(edges, key=lambda c: len(edges[c]))
    for c, e in edges.items():
        if c == busiest or looks[c].kind not in ("hall", "vr"):
            continue
        period = _cam_pattern_period(e.times[e.direction == 1])
        if period is None or period <= 0:
            continue
        rpm = 120.0 / period
        teeth = rpm / 60.0 * wheel.positions
        if teeth <= fs / 2:
            continue
        raise DecodeError(
            f"cam channel {info.channels[c]!r} repeats every {period:.4g} s, {rpm:.0f} rpm at "
            f"one pattern per engine cycle, when the {wheel.name} crank wheel passes "
            f"{teeth:.0f} teeth per second, above half the {fs:g} Hz sample rate: the crank "
            f"signal is aliased (its teeth show folded to a lower frequency); record at "
            f"{_rate_needed(teeth):g} Hz or more"
        ) from exc


def _short_capture(info: CaptureInfo, mean_rpm: float) -> list[Finding]:
    """A warning when the capture spans fewer than :data:`MIN_CYCLES` engine cycles."""
    if not (mean_rpm > 0):
        return []
    cycle_s = 120.0 / mean_rpm
    cycles = info.duration_s / cycle_s
    if cycles >= MIN_CYCLES:
        return []
    return [
        Finding(
            "warning",
            "short-capture",
            f"the capture lasts {info.duration_s:.3g} s, {cycles:.2f} engine cycles at the mean "
            f"{mean_rpm:.0f} rpm (one cycle, 720 deg CA, takes {cycle_s:.3g} s); at least "
            f"{MIN_CYCLES:g} are needed to see each cam edge more than once: record for "
            f"{MIN_CYCLES * cycle_s:.2g} s or longer",
        )
    ]


def _too_coarse(
    exc: DecodeError, looks: dict[int, ChannelLook], crank: int | None, info: CaptureInfo
) -> None:
    """Replace a failure by the sentence about too few samples when that is the cause."""
    fs = info.sample_rate
    cands = [crank] if crank is not None else list(looks)
    for c in cands:
        line = looks[c].line_hz
        if line > 0 and fs / line < MIN_SAMPLES_PER_TOOTH and looks[c].kind in ("hall", "vr"):
            raise DecodeError(
                f"crank channel {info.channels[c]!r}: {fs:g} Hz gives {fs / line:.1f} samples "
                f"per tooth at the {line:.0f} teeth per second its spectrum shows; at least "
                f"{MIN_SAMPLES_PER_TOOTH:g} are needed: record at "
                f"{_rate_needed(line):g} Hz or more"
            ) from exc


def _result(
    info: CaptureInfo,
    plan: CrankPlan,
    stats: CrankStats,
    jitter: CrankJitter,
    cams: list[int],
    state: dict[int, _CamState],
    locator: CamLocator,
    looks: dict[int, ChannelLook],
    choices: dict[str, str],
    fs: float,
    parked: bool = False,
    valve_work: _Valves | None = None,
) -> DecodeResult:
    crank_findings: list[Finding] = list(plan.findings) + stats.findings
    mean_rpm = stats.deg / stats.sec / 6.0 if stats.sec > 0 else float("nan")
    teeth_per_s = mean_rpm / 60.0 * plan.spec.positions
    if teeth_per_s > 0 and fs / teeth_per_s < SAMPLES_PER_TOOTH_REFUSED:
        raise DecodeError(
            f"crank channel {info.channels[plan.channel]!r}: {fs:g} Hz gives "
            f"{fs / teeth_per_s:.1f} samples per tooth at the observed {teeth_per_s:.0f} teeth "
            f"per second ({mean_rpm:.0f} rpm); at least {MIN_SAMPLES_PER_TOOTH:g} are needed: "
            f"record at {_rate_needed(teeth_per_s):g} Hz or more"
        )
    spt = stats.min_pitch_period * fs
    if spt < MIN_SAMPLES_PER_TOOTH:
        crank_findings.append(
            Finding(
                "warning",
                "few-samples",
                f"{fs:g} Hz gives only {spt:.1f} samples per tooth at the highest speed seen; at "
                f"least {MIN_SAMPLES_PER_TOOTH:g} are needed for precise timing",
            )
        )
    crank_findings += _short_capture(info, mean_rpm)
    if stats.sec > 0:
        rpm = RpmStats(stats.rpm_min, mean_rpm, stats.rpm_max)
    else:
        rpm = RpmStats(float("nan"), mean_rpm, float("nan"))
    trace = stats.trace()
    crank_result = CrankResult(
        channel=info.channels[plan.channel],
        sensor=plan.sensor,  # type: ignore[arg-type]
        wheel=plan.spec.name,
        positions=plan.spec.positions,
        missing=plan.spec.missing,
        teeth_deg=plan.spec.teeth_deg,
        polarity=plan.polarity,  # type: ignore[arg-type]
        event_direction="rising" if plan.direction > 0 else "falling",
        rpm=rpm,
        revolutions=int(stats.deg // 360.0),
        sync_losses=stats.losses,
        reference_times_s=tuple(np.asarray(stats.reference_times, dtype=float).tolist()),
        extra_teeth=stats.extra,
        missing_teeth=stats.missing,
        jitter=jitter.result(),
        findings=tuple(crank_findings),
        rpm_trace=tuple(zip(*(c.tolist() for c in trace.T), strict=True)),
    )

    located: dict[int, CamEvents] = {}
    for c in cams:
        parts = state[c].events
        if parts:
            cols = [np.concatenate(col) for col in zip(*parts, strict=True)]
            located[c] = CamEvents(cols[0], cols[1].astype(int), cols[2], cols[3].astype(int),
                                   cols[4])
        else:
            located[c] = CamEvents.empty()
    vw = valve_work or _Valves({}, {}, {}, [], None)
    for c, collector in vw.maybe_pwm.items():
        why = _pwm_not_cam(collector, located[c])
        if why is not None:
            cams = [x for x in cams if x != c]
            vw.pwm[c] = collector
            vw.pairs[c] = None
            vw.found[c] = why
    for c in cams:
        st = state[c]
        if st.direction_only is None and st.total_s > 0:
            st.leading, _share = tooth_level_from_times(st.high_s, st.total_s)

    global_findings: list[Finding] = []
    shift = None
    source_cam = None
    for c in cams:
        ev = located[c]
        if len(ev.times) and not is_symmetric(ev):
            shift = choose_phase(ev, state[c].leading)
            source_cam = c
            break
    if shift is None and any(len(located[c].times) for c in cams):
        global_findings.append(
            Finding(
                "info",
                "phase-unknown",
                "no cam pattern differs between the two crank revolutions, so the cycle phase "
                "(which revolution is which) is unknown and angles are given per revolution; a "
                "cam whose pattern differs between revolutions, recorded alongside, would fix it",
            )
        )
    cam_results: list[CamResult] = []
    # the pattern library's cam patterns (a broken user file is a UsageError, exit 2)
    library = cam_patterns() if cams else {}
    for c in cams:
        name = info.channels[c]
        st = state[c]
        fnd: list[Finding] = list(st.notes)
        if looks[c].kind in ("flat", "noise"):
            fnd.append(
                Finding("warning", "cam-no-signal", f"cam channel {name!r}: {looks[c].reason}")
            )
        elif st.direction_only is None and st.total_s > 0:
            share_high = st.high_s / st.total_s
            if abs(share_high - 0.5) < 0.05:
                fnd.append(
                    Finding(
                        "info",
                        "cam-tooth-level",
                        f"cam {name!r} spends about half the cycle at each level (a half-moon?); "
                        "its high level is taken as the tooth",
                    )
                )
        dropped = locator.dropped.get(c, 0)
        if dropped:
            fnd.append(
                Finding(
                    "info",
                    "cam-unlocated",
                    f"{dropped} event(s) on cam {name!r} had no crank angle (before the first "
                    "reference event, or where crank teeth were missing) and were left out",
                )
            )
        sensor = looks[c].kind if looks[c].kind in ("hall", "vr") else "hall"
        cam = build_cam_result(
            name, sensor, located[c], shift, st.leading, fnd,  # type: ignore[arg-type]
            phase_source=(c == source_cam),
        )
        cam = replace(cam, library=tuple(match_cam(cam, library)))
        cam_results.append(with_phaser(cam, trace, parked=parked))
        choices[f"cam {name}"] = _sensor_choice(looks[c])
    actuators: list[ActuatorResult] = []
    if vw.pairs:
        cam_results, actuators, more = _valve_results(vw, info, cam_results, crank_result)
        global_findings.extend(more)
    for c in looks:
        if c != plan.channel and c not in cams and c not in vw.pairs and looks[c].kind in (
            "flat", "noise"
        ):
            global_findings.append(
                Finding(
                    "info", "channel-unused", f"channel {info.channels[c]!r}: {looks[c].reason}"
                )
            )
    return DecodeResult(
        info, crank_result, tuple(cam_results), tuple(global_findings), choices,
        actuators=tuple(actuators),
    )


__all__ = ["ChannelLevels", "DecodeOptions", "decode_capture", "read_probe"]
