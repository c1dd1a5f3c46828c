"""A cam phaser's valve command against the cam's response.

The valve's duty (from :mod:`toothcomb.decoders.actuators.pwm`) and the cam's phase trace (from
:mod:`.phaser`) are put on one time grid. A vane phaser turns at a rate that grows with how far
the duty sits from the duty at which it holds still, some time after the valve is commanded;
so the cam's rate is fitted as ``rate(t) = b * (duty(t - delay) - hold)`` by least squares over
a range of delays, leaving out the times the cam rests against an end stop. That gives:

- the **hold duty** (where the fitted rate is zero) and the **delay**;
- the **rate per duty point** ``b`` (deg CA/s per %), and its sign: whether more duty advanced
  or retarded the cam -- against the expected direction (more duty advances, by default) that
  tells a cam moving **the wrong way**;
- the **drift** while the duty sat at the hold duty (the steady-state error of the hold);
- a command held well away from the hold duty during which the cam, with room to move, moved
  less than ``stuck_max_deg``: the cam **does not follow**.

Each limit is a documented default (:class:`ValveLimits`) that a profile can override.

>>> t = np.arange(0.0, 2.0, 0.004)
>>> duty = np.where((t > 0.5) & (t < 0.8), 75.0, 50.0)
>>> phase = -8.0 * np.cumsum(np.where(np.roll(duty, 10) > 50, 25.0, 0.0)) * 0.004
>>> fit = fit_response(t, duty, t, phase)
>>> round(fit.hold), round(fit.rate_per_pct), round(fit.delay_s, 2)
(50, -8, 0.04)
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import Any

import numpy as np

from ..actuators.pwm import PwmTrace
from ..result import ActuatorResult, Finding, PhaserResult
from .phaser import _running_median

#: causes of a cam that does not follow its valve, listed as possibilities, never as a verdict
# common practice, no source
SUSPECTS = (
    "valve stuck, oil screen clogged, low oil pressure or temperature, phaser locking pin not "
    "released"
)


@dataclass(frozen=True)
class ValveLimits:
    """What a valve command and the cam's response are judged against (profile: ``valve``)."""

    #: more duty than the hold duty advances the cam (usual for intake phaser valves; common
    #: practice, no source); false when more duty retards it
    duty_advances: bool = True
    #: the hold duty to assume when the capture cannot tell it (the cam did not move), %
    hold_pct: float = 50.0
    #: duty within this of the hold duty asks the cam to hold, % points
    deadband_pct: float = 3.0
    #: a command at least this far from the hold duty ...
    command_min_pct: float = 10.0
    #: ... held at least this long must move a cam that has room to move, s
    command_min_s: float = 0.2
    #: a cam that moved less than this during such a command did not follow, deg CA
    stuck_max_deg: float = 1.0
    #: below this rate per duty point the phaser is sluggish, deg CA/s per % (a full 45 deg CA in
    #: 0.2 s at about 25 points off hold is 9; common practice, no source)
    rate_per_pct_min: float = 3.0
    #: a response later than this after the command is slow, s (common practice, no source)
    delay_max_s: float = 0.15
    #: longest delay searched, s
    delay_search_s: float = 0.3

    @classmethod
    def from_mapping(cls, data: dict[str, Any], where: str = "valve") -> ValveLimits:
        """Limits from a profile table; unknown keys and bad values raise ``ValueError``.

        >>> ValveLimits.from_mapping({"duty_advances": False}).duty_advances
        False
        """
        known = {f.name: f for f in fields(cls)}
        out: dict[str, Any] = {}
        for key, value in data.items():
            if key not in known:
                raise ValueError(
                    f"{where}: unknown key {key!r}; known keys are {', '.join(sorted(known))}"
                )
            if key == "duty_advances":
                if not isinstance(value, bool):
                    raise ValueError(f"{where}.{key} = {value!r}; give true or false")
                out[key] = value
                continue
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not (
                np.isfinite(value) and value > 0
            ):
                raise ValueError(f"{where}.{key} = {value!r}; give a positive number")
            out[key] = float(value)
        return cls(**out)


@dataclass(frozen=True)
class ResponseFit:
    """``rate = rate_per_pct * (duty(t - delay_s) - hold)`` fitted to a cam's rate."""

    hold: float
    rate_per_pct: float
    delay_s: float
    r2: float
    #: grid samples used (not resting against an end stop)
    n: int


def _grid(t_duty: np.ndarray, t_phase: np.ndarray) -> tuple[np.ndarray, float]:
    spacing = float(np.median(np.diff(t_phase))) if len(t_phase) > 1 else 0.01
    dt = max(0.005, 1.5 * spacing)
    t0 = max(float(t_duty[0]), float(t_phase[0]))
    t1 = min(float(t_duty[-1]), float(t_phase[-1]))
    if t1 - t0 < 5 * dt:
        return np.empty(0), dt
    return np.arange(t0, t1, dt), dt


def _phase_on_grid(t_phase: np.ndarray, phase: np.ndarray, grid: np.ndarray, dt: float,
                   ) -> tuple[np.ndarray, np.ndarray]:
    sm = _running_median(phase, 2)
    p = np.interp(grid, t_phase, sm)
    rate = np.gradient(p, dt) if len(grid) > 1 else np.zeros_like(p)
    return p, rate


def fit_response(t_duty: np.ndarray, duty: np.ndarray, t_phase: np.ndarray, phase: np.ndarray,
                 delay_search_s: float = 0.3) -> ResponseFit:
    """Fit the cam's rate to the delayed duty (see the module docstring)."""
    grid, dt = _grid(t_duty, t_phase)
    nan = ResponseFit(float("nan"), float("nan"), float("nan"), float("nan"), 0)
    if len(grid) == 0:
        return nan
    p, rate = _phase_on_grid(t_phase, phase, grid, dt)
    lo, hi = float(np.min(p)), float(np.max(p))
    at_end = ((p < lo + 1.0) | (p > hi - 1.0)) & (np.abs(rate) < 5.0)
    # first all samples; then again without those resting against an end stop while the
    # command pushes them further into it
    best = _best_fit(grid, dt, t_duty, duty, rate, np.zeros(len(grid), dtype=bool),
                     delay_search_s)
    if np.isfinite(best.hold) and best.rate_per_pct != 0:
        d = np.interp(grid - best.delay_s, t_duty, duty)
        push = np.sign(best.rate_per_pct * (d - best.hold))
        pinned = at_end & (
            ((push < 0) & (p < lo + 1.0)) | ((push > 0) & (p > hi - 1.0))
        )
        if np.any(pinned):
            again = _best_fit(grid, dt, t_duty, duty, rate, pinned, delay_search_s)
            if np.isfinite(again.r2):
                best = again
    return best


def _best_fit(grid: np.ndarray, dt: float, t_duty: np.ndarray, duty: np.ndarray,
              rate: np.ndarray, skip: np.ndarray, delay_search_s: float) -> ResponseFit:
    best = ResponseFit(float("nan"), float("nan"), float("nan"), float("nan"), 0)
    for delay in np.arange(0.0, delay_search_s + 1e-9, dt):
        d = np.interp(grid - delay, t_duty, duty)
        use = ~skip & (grid - delay >= t_duty[0])
        if np.count_nonzero(use) < 5:
            continue
        x, y = d[use], rate[use]
        if float(np.std(x)) == 0:
            continue
        b, a = np.polyfit(x, y, 1)
        resid = y - (a + b * x)
        ss = float(np.sum((y - np.mean(y)) ** 2))
        r2 = 1.0 - float(np.sum(resid**2)) / ss if ss > 0 else 0.0
        if not np.isfinite(best.r2) or r2 > best.r2:
            hold = -a / b if b != 0 else float("nan")
            best = ResponseFit(float(hold), float(b), float(delay), r2, int(np.count_nonzero(use)))
    return best


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """(first, last) index of each run of True."""
    out = []
    i, n = 0, len(mask)
    while i < n:
        if mask[i]:
            j = i
            while j + 1 < n and mask[j + 1]:
                j += 1
            out.append((i, j))
            i = j + 1
        else:
            i += 1
    return out


def analyse_valve(
    trace: PwmTrace,
    channel: str,
    drive: str | None,
    drive_how: str,
    phaser: PhaserResult | None = None,
    cam: str | None = None,
    pairing: str | None = None,
    label: str | None = None,
    limits: ValveLimits | None = None,
) -> ActuatorResult:
    """The valve's duty and frequency, and, with the cam's phaser trace, how the cam followed."""
    lim = limits or ValveLimits()
    who = label or (f"cam {cam!r}" if cam else "the cam")
    if len(trace) == 0:
        return ActuatorResult(
            channel, drive, drive_how, float("nan"), float("nan"), float("nan"), float("nan"),
            cam=cam, pairing=pairing,
            findings=(
                Finding("warning", "valve-no-pwm", f"valve channel {channel!r}: no PWM periods "
                        "were found (the solenoid was not switched, or the channel is another "
                        "signal)"),
            ),
        )
    duty = trace.duty_pct
    smooth = _running_median(duty, 2)
    t_mid = trace.t_on_s + trace.period_s / 2.0
    base = ActuatorResult(
        channel=channel,
        drive=drive,
        drive_how=drive_how,
        pwm_hz=trace.hz,
        duty_mean=float(100.0 * np.sum(trace.on_s) / np.sum(trace.period_s)),
        duty_min=float(np.min(smooth)),
        duty_max=float(np.max(smooth)),
        time_s=tuple(float(x) for x in trace.t_on_s),
        duty_pct=tuple(float(x) for x in duty),
        hz=tuple(float(x) for x in 1.0 / trace.period_s),
        cam=cam,
        pairing=pairing,
    )
    findings: list[Finding] = []
    if drive is None:
        findings.append(
            Finding("info", "valve-drive-unknown", f"valve channel {channel!r}: {drive_how}; "
                    "taken as low-side drive (the low level means the solenoid is on)")
        )
    if phaser is None or len(phaser.time_s) < 10:
        return _with(base, findings)
    tp = np.asarray(phaser.time_s)
    pp = np.asarray(phaser.phase_deg)
    grid, dt = _grid(t_mid, tp)
    if len(grid) == 0:
        return _with(base, findings)
    p, rate = _phase_on_grid(tp, pp, grid, dt)
    moved = float(np.max(p) - np.min(p))
    d_grid = np.interp(grid, t_mid, smooth)
    fit = fit_response(t_mid, smooth, tp, pp, lim.delay_search_s)
    fit_ok = (
        moved >= 2.0 * lim.stuck_max_deg and np.isfinite(fit.r2) and fit.r2 >= 0.3
        and np.isfinite(fit.hold) and 0.0 <= fit.hold <= 100.0
    )
    hold = fit.hold if fit_ok else lim.hold_pct
    expect = -1.0 if lim.duty_advances else 1.0  # phase direction for duty above hold
    follows = True
    more = None
    if fit_ok:
        more = "advances" if fit.rate_per_pct < 0 else "retards"

    # commands held away from the hold duty, and what the cam did meanwhile
    delay = fit.delay_s if fit_ok else 0.0
    d_cmd = np.interp(grid - delay, t_mid, smooth)
    far = np.abs(d_cmd - hold) >= lim.command_min_pct
    lo, hi = float(np.min(p)), float(np.max(p))
    worst_stuck = None
    for a, b in _runs(far):
        if grid[b] - grid[a] < lim.command_min_s:
            continue
        cmd = float(np.median(d_cmd[a : b + 1]))
        want = expect * np.sign(cmd - hold)
        travel = float(p[b] - p[a])
        span = float(np.max(p[a : b + 1]) - np.min(p[a : b + 1]))
        room = (p[a] > lo + 2.0) if want < 0 else (p[a] < hi - 2.0)
        if span < lim.stuck_max_deg and (room or moved < 2.0 * lim.stuck_max_deg):
            item = (grid[b] - grid[a], cmd, span, float(grid[a]))
            if worst_stuck is None or item[0] > worst_stuck[0]:
                worst_stuck = item
        _ = travel
    if worst_stuck is not None:
        follows = False
        dur, cmd, span, t0 = worst_stuck
        findings.append(
            Finding(
                "warning",
                "valve-not-followed",
                f"{who} does not follow its valve command (duty {cmd:.0f} % for {dur:.1f} s, "
                f"cam moved {span:.1f} deg CA); possible causes: {SUSPECTS}",
                t0,
            )
        )
    elif fit_ok and np.sign(fit.rate_per_pct) != expect:
        follows = False
        far_idx = int(np.argmax(np.abs(d_cmd - hold)))
        cmd = float(d_cmd[far_idx])
        asks = "advance" if expect * np.sign(cmd - hold) < 0 else "retard"
        did = "retarded" if fit.rate_per_pct * (cmd - hold) > 0 else "advanced"
        findings.append(
            Finding(
                "warning",
                "valve-wrong-way",
                f"{who} moves the wrong way for its valve command: duty {cmd:.0f} % "
                f"({cmd - hold:+.0f} points from the hold duty {hold:.0f} %) asks it to {asks}, "
                f"and it {did} ({abs(fit.rate_per_pct):.1f} deg CA/s per point; {moved:.1f} "
                f"deg CA range); possible causes: valve or its wiring swapped, wrong valve "
                f"fitted, or the expected direction is not this engine's (profile valve "
                f"duty_advances)",
            )
        )
    elif fit_ok and abs(fit.rate_per_pct) < lim.rate_per_pct_min:
        off = float(np.max(np.abs(d_cmd - hold)))
        findings.append(
            Finding(
                "warning",
                "valve-sluggish",
                f"{who} follows its valve command sluggishly: {abs(fit.rate_per_pct):.1f} deg "
                f"CA/s per duty point (at {off:.0f} points from the hold duty it reached "
                f"{abs(fit.rate_per_pct) * off:.0f} deg CA/s), less than the "
                f"{lim.rate_per_pct_min:g} usual; possible causes: {SUSPECTS}",
            )
        )
    step_delay = _step_delay(trace.t_on_s, smooth, phaser, lim)
    delay_s = step_delay if step_delay is not None else (fit.delay_s if fit_ok else None)
    if delay_s is not None and delay_s > lim.delay_max_s and follows:
        findings.append(
            Finding(
                "warning",
                "valve-slow-response",
                f"{who} starts to move {delay_s:.2f} s after its valve command changes, "
                f"later than the {lim.delay_max_s:g} s usual",
            )
        )
    if not np.any(np.abs(d_grid - d_grid[0]) > lim.deadband_pct):
        findings.append(
            Finding(
                "info",
                "valve-steady",
                f"the valve on {channel!r} was held at {float(np.median(smooth)):.0f} % duty "
                "throughout: the capture shows no command to move the cam",
            )
        )
    near = np.abs(d_cmd - hold) < lim.deadband_pct
    drift = float(np.mean(rate[near])) if np.count_nonzero(near) >= 5 else None
    return _with(
        base,
        findings,
        hold_duty=hold if fit_ok else None,
        follows=follows,
        delay_s=delay_s,
        rate_per_pct=fit.rate_per_pct if fit_ok else None,
        fit_r2=fit.r2 if np.isfinite(fit.r2) else None,
        more_duty=more,
        drift_deg_s=drift,
    )


def _step_delay(t_on: np.ndarray, duty: np.ndarray, phaser: PhaserResult,
                lim: ValveLimits) -> float | None:
    """Median time from a step of the duty to the start of the cam move that follows it (moves
    with no step in the half second before them are left out)."""
    jumps = np.flatnonzero(np.abs(np.diff(duty)) >= lim.deadband_pct) + 1
    if len(jumps) == 0 or not phaser.moves:
        return None
    # a step spread over a few smoothed periods counts from its first period
    first = jumps[np.concatenate(([True], np.diff(jumps) > 3))]
    steps = t_on[first]
    delays = []
    for m in phaser.moves:
        k = int(np.searchsorted(steps, m.t_start_s, side="right")) - 1
        if k >= 0 and 0.0 <= m.t_start_s - steps[k] <= 0.5:
            delays.append(m.t_start_s - steps[k])
    return float(np.median(delays)) if delays else None


def _with(base: ActuatorResult, findings: list[Finding], **changes: Any) -> ActuatorResult:
    from dataclasses import replace

    return replace(base, findings=tuple(findings), **changes)
