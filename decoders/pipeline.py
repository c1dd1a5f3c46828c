"""The one loop that drives a capture through the stages.

    capture file -> reader (blocks) -> front end (edges) -> wheel decoder (teeth, angles)
                 -> analysis (cam angles per cycle, jitter) -> result

1. a first streaming pass measures every channel's levels (NaN and flat channels are caught);
2. the first seconds (the *probe*) tell what each channel carries and calibrate the front ends;
3. a second streaming pass turns every channel into edges, block by block (the front ends keep
   their own state across blocks, so the edges do not depend on the block size);
4. the crank channel's edges are decoded against its wheel, which gives crank angle as a
   function of time; every cam edge is placed on it, grouped and measured.

Memory is bounded in the number of samples: only the probe and one block are ever held; what is
kept for the whole capture is the edges (a few per tooth).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from .analysis.cams import (
    CamEvents,
    build_cam_result,
    choose_phase,
    is_symmetric,
    locate,
    tooth_level_direction,
    vr_centre_direction,
)
from .analysis.identify import ChannelLook, look_at_channel
from .analysis.jitter import crank_jitter
from .analysis.timeline import CrankTimeline
from .errors import DecodeError, UsageError
from .levels import check_finite, measure_levels
from .model import CaptureInfo, CaptureSource, ChannelLevels, Edges
from .options import DecodeOptions
from .plugins import FRONTENDS, WHEELS, plugin, plugins
from .readers import open_capture
from .result import CamResult, CrankResult, DecodeResult, Finding, RpmStats
from .wheels.base import ToothTrack
from .wheels.missing_tooth import (
    MissingToothSpec,
    decode_teeth,
    gap_candidates,
    gap_ratios,
    identify,
    leading_direction,
)

#: progress callback: (what, done, total)
Progress = Callable[[str, int, int], None]

#: length of the probe: the first seconds of the capture, at most this many samples
PROBE_SECONDS = 4.0
PROBE_MAX_SAMPLES = 1 << 21
#: fewest samples per tooth period that still time teeth well
# common practice, no source: below about 8 samples per tooth the flank/crossing interpolation
# and the gap ratios both degrade quickly
MIN_SAMPLES_PER_TOOTH = 8.0


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


@dataclass(frozen=True)
class CrankDecode:
    """The crank channel decoded."""

    channel: int
    sensor: str
    spec: MissingToothSpec
    #: +1/-1: direction of the events the wheel was followed on
    direction: int
    polarity: str
    track: ToothTrack
    findings: tuple[Finding, ...]
    how: str


def _wheel_from_hint(text: str) -> MissingToothSpec:
    for name, wheel in plugins(WHEELS).items():
        spec = wheel.parse(text)
        if spec is not None:
            if not isinstance(spec, MissingToothSpec):
                raise UsageError(f"wheel {text!r} is a {name} pattern, which decode cannot use yet")
            return spec
    raise UsageError(
        f"wheel {text!r} is not in a known notation; give it as N-M (e.g. 60-2, 36-1, 24-1)"
    )


def _hint_score(times: np.ndarray, spec: MissingToothSpec) -> tuple[int, float]:
    """How well one direction's events show ``spec``'s gap: (gaps at M+1, median gap ratio)."""
    cand = gap_candidates(times)
    if len(cand) == 0:
        return 0, 0.0
    r = gap_ratios(times)[cand]
    good = np.abs(r / (spec.missing + 1) - 1.0) < 0.2
    return int(np.count_nonzero(good)), float(np.median(r))


def crank_direction(
    edges: Edges, sensor: str, wheel: MissingToothSpec | None = None
) -> tuple[int, str]:
    """Direction of the crank events the wheel is followed on, and the lead polarity.

    Hall: the leading flank (the one that ends the level held through the gap). VR: the tooth
    centre crossing, the direction whose intervals show the whole gap in one interval (the
    other direction splits it in two, so its largest ratio is smaller); rising centre crossings
    mean the leads are reversed.
    """
    if sensor == "hall":
        direction, _share = leading_direction(edges)
        return direction, "normal"
    dirs = (1, -1)
    times = {d: edges.times[edges.direction == d] for d in dirs}
    if wheel is not None:
        scores = {d: _hint_score(times[d], wheel) for d in dirs}
    else:
        guesses = {d: identify(times[d]) for d in dirs}
        scores = {d: (1, g.gap_ratio) if g is not None else (0, 0.0) for d, g in guesses.items()}
    direction = max(dirs, key=lambda d: (scores[d][0] > 0, scores[d][1]))
    return direction, "normal" if direction == -1 else "reversed"


def decode_crank(
    edges: Edges,
    channel: int,
    sensor: str,
    name: str,
    wheel: MissingToothSpec | None,
    sample_rate: float,
) -> CrankDecode:
    """Find the event direction and the wheel, then follow the wheel tooth by tooth."""
    findings: list[Finding] = []
    direction, polarity = crank_direction(edges, sensor, wheel)
    if polarity == "reversed":
        findings.append(
            Finding(
                "warning",
                "vr-reversed",
                f"crank VR leads on {name} are reversed: tooth centres cross zero rising; "
                "angles are measured on the correct crossings",
            )
        )
    times = {d: edges.times[edges.direction == d] for d in (1, -1)}
    t = times[direction]
    guess = identify(t)
    if wheel is None:
        if guess is None:
            raise DecodeError(_no_gap_reason(name, t, sample_rate))
        spec = guess.spec
        how = f"identified from the tooth periods (confidence {guess.confidence:.2f})"
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
        if guess is not None and guess.spec != wheel and guess.confidence >= 0.8:
            findings.append(
                Finding(
                    "warning",
                    "wheel-mismatch",
                    f"the crank tooth pattern looks like {guess.spec.name}, not the {wheel.name} "
                    "given",
                )
            )
    track = decode_teeth(t, spec)
    if len(track.reference_times) == 0:
        few = _too_few_samples(t, sample_rate)
        raise DecodeError(
            few
            or f"no {spec.name} gap found on crank channel {name!r} in {len(t)} tooth events; "
            "check the wheel (--wheel) and the channel (--crank)"
        )
    return CrankDecode(
        channel, sensor, spec, direction, polarity, track, tuple(findings) + track.findings, how
    )


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
        f"at {MIN_SAMPLES_PER_TOOTH * rate:.0f} Hz or more"
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


def _stream_edges(
    source: CaptureSource,
    frontends: dict[int, object],
    block_size: int,
    progress: Progress | None,
) -> dict[int, Edges]:
    parts: dict[int, list[Edges]] = {c: [] for c in frontends}
    total = source.info.n_samples
    for block in source.blocks(block_size):
        for c, fe in frontends.items():
            parts[c].append(fe.process(block.data[:, c], block.start))  # type: ignore[attr-defined]
        if progress is not None:
            progress("edges", block.stop, total)
    for c, fe in frontends.items():
        parts[c].append(fe.finish())  # type: ignore[attr-defined]
    return {c: Edges.concat(p) for c, p in parts.items()}


def _samples_per_tooth(track: ToothTrack, sample_rate: float) -> float:
    one = np.flatnonzero(track.pitches == 1)
    one = one[one > 0]
    if len(one) == 0:
        return float("inf")
    dt = track.times[one] - track.times[one - 1]
    return float(np.min(dt) * sample_rate)


def _crank_result(
    info: CaptureInfo, cd: CrankDecode, findings: list[Finding]
) -> CrankResult:
    track = cd.track
    times_mid, rpm = track.rpm_per_tooth()
    span_deg = 0.0
    span_s = 0.0
    for idx in track.runs:
        if len(idx) >= 2:
            span_deg += track.angles[idx[-1]] - track.angles[idx[0]]
            span_s += track.times[idx[-1]] - track.times[idx[0]]
    mean_rpm = span_deg / span_s / 6.0 if span_s > 0 else float("nan")
    if len(rpm):
        rpm_stats = RpmStats(float(np.min(rpm)), float(mean_rpm), float(np.max(rpm)))
    else:
        rpm_stats = RpmStats(float("nan"), float(mean_rpm), float("nan"))
    step = max(1, len(rpm) // 2000)
    trace = tuple((float(a), float(b)) for a, b in zip(times_mid[::step], rpm[::step], strict=True))
    return CrankResult(
        channel=info.channels[cd.channel],
        sensor=cd.sensor,  # type: ignore[arg-type]
        wheel=cd.spec.name,
        positions=cd.spec.positions,
        missing=cd.spec.missing,
        polarity=cd.polarity,  # type: ignore[arg-type]
        event_direction="rising" if cd.direction > 0 else "falling",
        rpm=rpm_stats,
        revolutions=int(span_deg // 360.0),
        sync_losses=track.sync_losses,
        reference_times_s=tuple(float(x) for x in track.reference_times),
        extra_teeth=track.extra,
        missing_teeth=track.missing,
        jitter=crank_jitter(track),
        findings=tuple(cd.findings) + tuple(findings),
        rpm_trace=trace,
    )


def _pick_crank(
    edges: dict[int, Edges], looks: dict[int, ChannelLook], info: CaptureInfo
) -> tuple[int, str]:
    """The channel whose events show a missing-tooth wheel most clearly."""
    best: tuple[float, int] | None = None
    for c, e in edges.items():
        scores = []
        for d in (1, -1):
            g = identify(e.times[e.direction == d])
            if g is not None:
                scores.append(g.confidence * min(1.0, g.gaps / 4.0))
        if scores:
            s = max(scores)
            # among equals, the channel with more teeth per second is the crank
            key = (round(s, 2), len(e))
            if best is None or key > best[0]:  # type: ignore[operator]
                best = (key, c)  # type: ignore[assignment]
    if best is None:
        for c, e in edges.items():
            few = _too_few_samples(e.times[e.direction == 1], info.sample_rate)
            if few and looks[c].edge_rate_hz == max(lk.edge_rate_hz for lk in looks.values()):
                raise DecodeError(f"channel {info.channels[c]!r}: {few}")
        have = ", ".join(f"{info.channels[c]} ({looks[c].kind})" for c in looks)
        raise DecodeError(
            f"no channel shows a missing-tooth crank wheel (channels: {have}); give the crank "
            "channel with --crank and its wheel with --wheel"
        )
    return best[1], "identified: the channel whose tooth periods show a missing-tooth gap"


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
    with open_capture(path, sample_rate=opts.sample_rate) as src:
        info = src.info
        fs = info.sample_rate
        lv_progress = (lambda d, t: progress("levels", d, t)) if progress else None
        levels = measure_levels(src, opts.block_size, progress=lv_progress)
        check_finite(levels, fs)
        crank = info.channel_index(opts.crank) if opts.crank is not None else None
        cams = [info.channel_index(c) for c in opts.cams]
        if crank is not None and crank in cams:
            raise UsageError(f"channel {info.channels[crank]!r} is given as both crank and cam")
        if len(set(cams)) != len(cams):
            raise UsageError("the same cam channel is given twice")
        n_probe = int(min(info.n_samples, PROBE_MAX_SAMPLES, max(1, PROBE_SECONDS * fs)))
        probe = read_probe(src, n_probe, opts.block_size)
        used = sorted({crank, *cams} - {None}) if (crank is not None and cams) else list(
            range(info.n_channels)
        )
        looks: dict[int, ChannelLook] = {}
        for c in used:
            hint = opts.crank_sensor if c == crank else opts.cam_sensor
            looks[c] = look_at_channel(probe[:, c], fs, levels[c], hint=hint)
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
        frontends = {
            c: plugin(FRONTENDS, looks[c].kind)(fs, levels[c], **looks[c].frontend_options)
            for c in live
        }
        edges = _stream_edges(src, frontends, opts.block_size, progress)

    choices: dict[str, str] = {}
    global_findings: list[Finding] = []
    if crank is None:
        crank, why = _pick_crank({c: edges[c] for c in live}, looks, info)
        choices["crank"] = f"{info.channels[crank]}: {why}"
    else:
        choices["crank"] = f"{info.channels[crank]}: given by the user"
    crank_name = info.channels[crank]
    try:
        cd = decode_crank(edges[crank], crank, looks[crank].kind, crank_name, wheel, fs)
    except DecodeError as exc:
        # a tooth train sampled too coarsely shows up as a strong spectral line
        line = looks[crank].line_hz
        if line > 0 and fs / line < MIN_SAMPLES_PER_TOOTH:
            raise DecodeError(
                f"crank channel {crank_name!r}: {fs:g} Hz gives {fs / line:.1f} samples per "
                f"tooth at the {line:.0f} teeth per second its spectrum shows; at least "
                f"{MIN_SAMPLES_PER_TOOTH:g} are needed: record at "
                f"{MIN_SAMPLES_PER_TOOTH * line:.0f} Hz or more"
            ) from exc
        raise
    choices["crank_sensor"] = f"{looks[crank].kind}: {looks[crank].reason}"
    choices["wheel"] = f"{cd.spec.name}: {cd.how}"
    spt = _samples_per_tooth(cd.track, fs)
    crank_findings: list[Finding] = []
    if spt < MIN_SAMPLES_PER_TOOTH:
        crank_findings.append(
            Finding(
                "warning",
                "few-samples",
                f"{fs:g} Hz gives only {spt:.1f} samples per tooth at the highest speed seen; at "
                f"least {MIN_SAMPLES_PER_TOOTH:g} are needed for precise timing",
            )
        )
    timeline = CrankTimeline(cd.track, max_pitches=cd.spec.missing + 1)

    if not cams:
        cams = [c for c in live if c != crank]
    # locate every cam's events, then fix the cycle phase from the first cam that can
    located: dict[int, tuple[CamEvents, int, int, list[Finding]]] = {}
    for c in cams:
        name = info.channels[c]
        fnd: list[Finding] = []
        if looks[c].kind in ("flat", "noise"):
            fnd.append(
                Finding("warning", "cam-no-signal", f"cam channel {name!r}: {looks[c].reason}")
            )
            located[c] = (CamEvents(*(np.empty(0),) * 2, np.empty(0), np.empty(0, int)), 0, 1, fnd)
            continue
        e = edges[c]
        if looks[c].kind == "vr":
            centre = vr_centre_direction(e)
            e = e.select(e.direction == centre)
            leading = centre
        else:
            leading, share = tooth_level_direction(e)
            if abs(share - 0.5) < 0.05:
                fnd.append(
                    Finding(
                        "info",
                        "cam-tooth-level",
                        f"cam {name!r} spends about half the cycle at each level (a half-moon?); "
                        "its high level is taken as the tooth",
                    )
                )
        ev, dropped = locate(e, timeline)
        if dropped:
            fnd.append(
                Finding(
                    "info",
                    "cam-unlocated",
                    f"{dropped} event(s) on cam {name!r} had no crank angle (before the first "
                    "reference event, or where crank teeth were missing) and were left out",
                )
            )
        located[c] = (ev, dropped, leading, fnd)

    shift = None
    source_cam = None
    for c in cams:
        ev = located[c][0]
        if len(ev.times) and not is_symmetric(ev):
            shift = choose_phase(ev, located[c][2])
            source_cam = c
            break
    if shift is None and any(len(located[c][0].times) for c in cams):
        global_findings.append(
            Finding(
                "info",
                "phase-unknown",
                "no cam pattern differs between the two crank revolutions, so the cycle phase "
                "(which revolution is which) is unknown; angles are given per revolution",
            )
        )
    cam_results: list[CamResult] = []
    for c in cams:
        ev, _dropped, leading, fnd = located[c]
        sensor = looks[c].kind if looks[c].kind in ("hall", "vr") else "hall"
        cam_results.append(
            build_cam_result(
                info.channels[c],
                sensor,  # type: ignore[arg-type]
                ev,
                timeline,
                shift,
                leading,
                fnd,
                phase_source=(c == source_cam),
            )
        )
        choices[f"cam {info.channels[c]}"] = f"{sensor}: {looks[c].reason}"
    for c in used:
        if c != crank and c not in cams and looks[c].kind in ("flat", "noise"):
            global_findings.append(
                Finding(
                    "info", "channel-unused", f"channel {info.channels[c]!r}: {looks[c].reason}"
                )
            )
    crank_result = _crank_result(info, cd, crank_findings)
    return DecodeResult(info, crank_result, tuple(cam_results), tuple(global_findings), choices)


__all__ = ["ChannelLevels", "DecodeOptions", "decode_capture", "read_probe"]
