"""The signal simulator: physics checked against outside references, truth, blocks, dict form."""

from __future__ import annotations

import json
import math

import h5py
import numpy as np
import pytest
import soundfile as sf
from scipy import signal
from scipy.integrate import solve_ivp
from toothcomb.decoders.errors import UsageError
from toothcomb.decoders.simulate import (
    PRESETS,
    Cam,
    Channel,
    CoastSpeed,
    ConstantSpeed,
    CrankingSpeed,
    CrankWheel,
    DamagedTooth,
    Dropout,
    HallSensor,
    IdleSpeed,
    IgnitionSpikes,
    Instrument,
    Motion,
    Phaser,
    PhaserMove,
    RampSpeed,
    Runt,
    Scenario,
    SnapSpeed,
    VrSensor,
    cam_pattern,
    compute_truth,
    half_moon,
    iter_blocks,
    preset,
    simulate,
    write_scenario,
)
from toothcomb.decoders.simulate.chain import Decimator, quantise_scope
from toothcomb.decoders.simulate.engine import build_model
from toothcomb.decoders.simulate.sensors import step_response

# ------------------------------------------------------------------------------ helpers


def crossings(y: np.ndarray, fs: float, level: float, direction: int) -> np.ndarray:
    """Times where ``y`` crosses ``level`` (direction +1 rising, -1 falling), linear interpolation
    between samples."""
    d = y - level
    if direction > 0:
        i = np.flatnonzero((d[:-1] < 0) & (d[1:] >= 0))
    else:
        i = np.flatnonzero((d[:-1] > 0) & (d[1:] <= 0))
    frac = d[i] / (d[i] - d[i + 1])
    return (i + frac) / fs


def nearest(found: np.ndarray, wanted: np.ndarray) -> np.ndarray:
    """For each wanted time, the signed error of the nearest found time."""
    k = np.clip(np.searchsorted(found, wanted), 1, len(found) - 1)
    left, right = found[k - 1], found[k]
    pick = np.where(np.abs(left - wanted) < np.abs(right - wanted), left, right)
    return pick - wanted


def circ(x: np.ndarray | float, period: float) -> np.ndarray | float:
    """``x`` wrapped into [-period/2, period/2)."""
    return (x + period / 2) % period - period / 2


def scenario(**kw: object) -> Scenario:
    base: dict[str, object] = {
        "duration_s": 0.2,
        "speed": ConstantSpeed(rpm=1500.0),
        "instrument": Instrument(kind="float", sample_rate=200_000.0),
    }
    base.update(kw)
    return Scenario(**base)  # type: ignore[arg-type]


# ------------------------------------------------------------------------------ wheel and speed


def test_tooth_period_at_constant_speed() -> None:
    rpm, n = 1500.0, 60
    tr = compute_truth(scenario(crank=CrankWheel(wheel="60-2", sensor=HallSensor())))
    ev = tr["crank"]["tooth_events"]
    tooth = np.array(ev["tooth"])
    centre = np.array(ev["centre_s"])
    regular = np.diff(centre)[(tooth[:-1] >= 1) & (tooth[1:] == tooth[:-1] + 1)]
    # source: SI Brochure 9th ed. (BIPM 2019), table 8: 1 min = 60 s; an N-position wheel passes
    # N positions per revolution, so one pitch takes 60 / (rpm * N) s
    assert regular.size > 50
    assert np.allclose(regular, 60.0 / (rpm * n), rtol=0, atol=1e-12)
    assert np.allclose(ev["rpm"], rpm, rtol=1e-12)


def test_60_2_pitch_and_gap() -> None:
    tr = compute_truth(scenario(crank=CrankWheel(wheel="60-2", tooth1_deg=84.0)))
    cr = tr["crank"]
    # source: trade notation N-M (N positions, M missing): pitch 360/60 = 6 deg, and the gap of
    # 2 missing teeth spans 3 pitches = 18 deg between the centres either side of it
    assert cr["pitch_deg"] == pytest.approx(6.0)
    assert (cr["N"], cr["M"]) == (60, 2)
    centres = [row["centre_deg"] for row in cr["teeth"]]
    assert len(centres) == 58
    assert centres[0] == pytest.approx(84.0)
    assert (centres[0] - centres[-1]) % 360.0 == pytest.approx(18.0)
    ev = cr["tooth_events"]
    tooth, t = np.array(ev["tooth"]), np.array(ev["centre_s"])
    k = np.flatnonzero((tooth[:-1] == 58) & (tooth[1:] == 1))
    assert k.size >= 1
    pitch_time = 60.0 / (1500.0 * 60)
    assert t[k + 1] - t[k] == pytest.approx(3 * pitch_time, abs=1e-12)


def test_tooth_width_follows_duty() -> None:
    tr = compute_truth(scenario(crank=CrankWheel(wheel="36-1", duty=0.3, sensor=HallSensor())))
    ev = tr["crank"]["tooth_events"]
    width = np.array(ev["trailing_s"]) - np.array(ev["leading_s"])
    omega = 6.0 * 1500.0
    # tooth width = duty * pitch = 0.3 * 10 deg, passing at 9000 deg/s
    assert np.allclose(width, 3.0 / omega, atol=1e-12)


def test_motion_matches_numerical_integration() -> None:
    sp = CrankingSpeed(rpm=200.0, ripple=0.3, ripple_phase_deg=10.0)
    m = Motion(sp, n_cyl=4, theta0=12.0, seed=0, t_end=1.0)

    def rhs(t: float, y: np.ndarray) -> list[float]:
        return [float(6.0 * m.base_rpm(np.array(t)) * m.ripple_factor(y[0]))]

    # source: scipy.integrate.solve_ivp documentation (DOP853, explicit Runge-Kutta of order 8)
    sol = solve_ivp(
        rhs, (0.0, 1.0), [12.0], method="DOP853", rtol=1e-12, atol=1e-10, dense_output=True
    )
    t = np.linspace(0.0, 1.0, 201)
    assert np.max(np.abs(sol.sol(t)[0] - m.angle(t))) < 1e-6


def test_ramp_follows_constant_acceleration_kinematics() -> None:
    sp = RampSpeed(rpm_start=600.0, rpm_end=3000.0, t_start_s=0.1, t_end_s=0.5)
    m = Motion(sp, n_cyl=4, theta0=5.0, seed=0, t_end=1.0)
    w0 = 6.0 * 600.0
    alpha = 6.0 * (3000.0 - 600.0) / 0.4
    t = np.linspace(0.1, 0.5, 9)
    # source: rotational kinematics at constant angular acceleration,
    # theta = theta0 + w0*t + alpha*t**2/2 (Halliday, Resnick & Walker, Fundamentals of Physics,
    # ch. 10, "Rotation with constant angular acceleration")
    expected = 5.0 + w0 * 0.1 + w0 * (t - 0.1) + 0.5 * alpha * (t - 0.1) ** 2
    assert np.allclose(m.angle(t), expected, rtol=0, atol=1e-9)


def test_coast_down_decays_exponentially() -> None:
    m = Motion(
        CoastSpeed(rpm=900.0, t_off_s=0.2, tau_s=0.5), n_cyl=4, theta0=0.0, seed=0, t_end=2.0
    )
    # source: exponential decay with time constant tau falls to 1/e after tau (definition of
    # the time constant of a first-order system, Ogata, Modern Control Engineering, 5th ed.,
    # sec. 5-2)
    assert float(m.rpm(0.7)) == pytest.approx(900.0 / math.e, rel=1e-12)
    assert float(m.rpm(0.1)) == pytest.approx(900.0, rel=1e-12)


@pytest.mark.parametrize(("n_cyl", "rpm"), [(4, 200.0), (6, 240.0), (8, 150.0)])
def test_cranking_ripple_at_firing_frequency(n_cyl: int, rpm: float) -> None:
    m = Motion(CrankingSpeed(rpm=rpm, ripple=0.25), n_cyl=n_cyl, theta0=33.0, seed=0, t_end=3.0)
    fs, dur = 2000.0, 3.0
    t = np.arange(int(fs * dur)) / fs
    r = m.rpm(t)
    spec = np.abs(np.fft.rfft(r - r.mean()))
    f = np.fft.rfftfreq(t.size, 1.0 / fs)
    # source: a four-stroke engine fires n_cyl times per two revolutions, f = rpm/60 * n_cyl/2
    # (Heywood, Internal Combustion Engine Fundamentals, 1988, ch. 2) -- from memory
    expected = rpm / 60.0 * n_cyl / 2.0
    assert abs(f[np.argmax(spec)] - expected) <= 1.0 / dur
    # the ripple never drives the speed to 0 and the mean over whole ripple periods is the rpm
    assert r.min() > 0.5 * rpm
    assert float(m.angle(dur) - m.angle(0.0)) / (6 * dur) == pytest.approx(rpm, rel=1e-9)


def test_idle_wander_is_seeded_and_bounded() -> None:
    sp = IdleSpeed(rpm=800.0, walk_rpm=20.0, walk_time_s=0.5, ripple=0.0)
    a = Motion(sp, 4, 0.0, seed=1, t_end=5.0)
    b = Motion(sp, 4, 0.0, seed=1, t_end=5.0)
    c = Motion(sp, 4, 0.0, seed=2, t_end=5.0)
    t = np.linspace(0.0, 5.0, 5001)
    ra, rb, rc = a.rpm(t), b.rpm(t), c.rpm(t)
    assert np.array_equal(ra, rb)
    assert np.max(np.abs(ra - rc)) > 1.0
    assert ra.min() >= 800.0 - 60.0 and ra.max() <= 800.0 + 60.0
    assert ra.std() > 2.0


def test_event_times_hit_their_angles_to_a_nanosecond() -> None:
    sc = scenario(
        duration_s=1.0,
        speed=CrankingSpeed(rpm=180.0, ripple=0.3),
        cams=(Cam(phaser=Phaser(moves=(PhaserMove("step", t_s=0.3, to_deg=15.0, tau_s=0.1),))),),
    )
    model = build_model(sc)
    tr = compute_truth(sc)
    ref_t = np.array(tr["crank"]["reference_times_s"])
    th = model.motion.angle(ref_t)
    err = (th - tr["crank"]["reference_angle_deg"] + 180.0) % 360.0 - 180.0
    assert np.all(np.abs(err) / model.motion.omega(ref_t) < 1e-9)
    cam = model.cams["cam_intake"]
    ev = tr["cams"][0]["events"]
    t = np.array([e["time_s"] for e in ev])
    x = cam.angle(t)
    target = np.array([e["pattern_deg"] for e in ev])
    err = (x - target + 360.0) % 720.0 - 360.0
    assert np.all(np.abs(err) / cam.rate(t) < 1e-9)


# ------------------------------------------------------------------------------ sensors


def test_hall_half_point_lags_flank_by_tau_ln2() -> None:
    tau, fs = 20e-6, 2e6
    sc = scenario(
        duration_s=0.12,
        speed=ConstantSpeed(rpm=600.0),
        crank=CrankWheel(wheel="60-2", sensor=HallSensor(low_v=0.0, high_v=5.0, tau_s=tau)),
        instrument=Instrument(kind="float", sample_rate=fs),
    )
    sim = simulate(sc)
    y = sim.channel("crank")
    found = crossings(y, fs, 2.5, +1)
    lead = np.array(sim.truth["crank"]["tooth_events"]["leading_s"])
    lead = lead[(lead > 1e-3) & (lead < 0.119)]
    # source: first-order step response y = 1 - exp(-t/tau) reaches 1/2 at t = tau*ln 2
    # (Ogata, Modern Control Engineering, 5th ed., sec. 5-2, first-order systems)
    err = nearest(found, lead + tau * math.log(2.0))
    assert lead.size > 50
    assert np.max(np.abs(err)) < 5e-9
    refs = np.array(sim.truth["crank"]["reference_50pct_times_s"])
    assert np.allclose(refs - np.array(sim.truth["crank"]["reference_times_s"]), tau * math.log(2))


def test_step_response_matches_first_order_formula() -> None:
    t = np.linspace(0.0, 1e-3, 11)
    y = step_response(t, np.array([2e-4, 6e-4]), np.array([5.0, 0.0]), 0.0, 1e-4)
    rise = 5.0 * (1 - np.exp(-(t - 2e-4) / 1e-4))
    # superposition of two steps through the same first-order system (linearity)
    fall = -5.0 * (1 - np.exp(-(t - 6e-4) / 1e-4))
    expected = np.where(t >= 2e-4, rise, 0.0) + np.where(t >= 6e-4, fall, 0.0)
    assert np.allclose(y, expected, atol=1e-12)


@pytest.mark.parametrize("rpm", [200.0, 600.0, 1800.0])
def test_vr_amplitude_proportional_to_speed(rpm: float) -> None:
    rev = 60.0 / rpm
    sc = scenario(
        duration_s=rev * 1.05,
        speed=ConstantSpeed(rpm=rpm),
        crank=CrankWheel(wheel="60-2", sensor=VrSensor(peak_v_at_200rpm=0.8)),
        instrument=Instrument(kind="float", sample_rate=200.0 * 60 * rpm / 60.0 * 2),
    )
    sim = simulate(sc)
    ev = sim.truth["crank"]["tooth_events"]
    tooth, t = np.array(ev["tooth"]), np.array(ev["centre_s"])
    t0, t1 = t[tooth == 5][0], t[tooth == 50][0]
    ts = sim.times()
    y = sim.channel("crank")[(ts > t0) & (ts < t1)]
    # source: Faraday's law of induction, V = -N dPhi/dt (Griffiths, Introduction to
    # Electrodynamics, 4th ed., sec. 7.2.1); with Phi a function of angle, dPhi/dt =
    # dPhi/dtheta * omega, so the peak voltage grows in proportion to the speed
    assert float(np.max(np.abs(y))) == pytest.approx(0.8 * rpm / 200.0, rel=2e-4)


@pytest.mark.parametrize("reversed_", [False, True])
def test_vr_crosses_zero_at_tooth_centre(reversed_: bool) -> None:
    fs = 1e6
    sc = scenario(
        duration_s=0.1,
        speed=ConstantSpeed(rpm=900.0),
        crank=CrankWheel(wheel="60-2", tooth1_deg=84.0, sensor=VrSensor()),
        channels=(Channel(source="crank", reversed=reversed_),),
        instrument=Instrument(kind="float", sample_rate=fs),
    )
    sim = simulate(sc)
    cr = sim.truth["crank"]
    centres = np.array(cr["tooth_events"]["centre_s"])
    centres = centres[(centres > 1e-4) & (centres < 0.0999)]
    y = sim.channel("crank")
    # source: Faraday's law (Griffiths, sec. 7.2.1): V is proportional to dPhi/dt, which is 0
    # where the flux peaks (the tooth centre) and goes from + to - there; swapped leads invert V
    direction = +1 if reversed_ else -1
    err = nearest(crossings(y, fs, 0.0, direction), centres)
    assert np.max(np.abs(err)) < 2e-8
    wrong = crossings(y, fs, 0.0, -direction)
    assert np.min(np.abs(nearest(wrong, centres))) > 1e-5
    assert cr["polarity"] == ("reversed" if reversed_ else "normal")
    assert cr["event_direction"] == ("rising" if reversed_ else "falling")
    # the VR reference event is tooth 1's centre
    ev = cr["tooth_events"]
    ones = np.array(ev["centre_s"])[np.array(ev["tooth"]) == 1]
    assert len(cr["reference_times_s"]) == 2
    assert np.array_equal(np.array(cr["reference_times_s"]), ones)


def test_vr_clamp_limits_the_output() -> None:
    sc = scenario(
        speed=ConstantSpeed(rpm=3000.0),
        crank=CrankWheel(sensor=VrSensor(peak_v_at_200rpm=1.0, clamp_v=3.0, clamp="soft")),
    )
    y = simulate(sc).channel("crank")
    # unclamped peak 15 V; soft clamp 3*tanh(15/3) (numpy.tanh)
    assert float(np.max(y)) <= 3.0
    assert float(np.max(y)) == pytest.approx(3.0 * math.tanh(15.0 / 3.0), rel=1e-3)


def test_damaged_tooth_runt_and_wide_tooth() -> None:
    fs = 1e6
    sc = scenario(
        duration_s=0.05,
        speed=ConstantSpeed(rpm=1200.0),
        crank=CrankWheel(
            wheel="36-1",
            sensor=VrSensor(peak_v_at_200rpm=1.0),
            damaged=(
                DamagedTooth(tooth=10, kind="weak", amplitude=0.5),
                DamagedTooth(tooth=20, kind="missing"),
            ),
        ),
        instrument=Instrument(kind="float", sample_rate=fs),
    )
    sim = simulate(sc)
    ev = sim.truth["crank"]["tooth_events"]
    assert 20 not in ev["tooth"] and 19 in ev["tooth"] and 21 in ev["tooth"]
    assert [r["state"] for r in sim.truth["crank"]["teeth"][8:10]] == ["ok", "weak"]
    assert sim.truth["disturbances"]["damaged_teeth"][1]["kind"] == "missing"

    hall = scenario(
        duration_s=0.05,
        speed=ConstantSpeed(rpm=1200.0),
        crank=CrankWheel(
            wheel="36-1", sensor=HallSensor(tau_s=0.0), runt=Runt(width_deg=1.0), wide_tooth_deg=2.0
        ),
        instrument=Instrument(kind="float", sample_rate=fs),
    )
    hs = simulate(hall)
    runt_t = hs.truth["disturbances"]["runt"]["leading_times_s"]
    assert len(runt_t) == 1
    y = hs.channel("crank")
    rises = crossings(y, fs, 2.5, +1)
    falls = crossings(y, fs, 2.5, -1)
    k = np.argmin(np.abs(rises - runt_t[0]))
    width = falls[falls > rises[k]][0] - rises[k]
    # a 1 deg runt at 7200 deg/s is 139 us wide (sample-grid resolution 1 us)
    assert width == pytest.approx(1.0 / 7200.0, abs=1.1e-6)
    lead = np.array(hs.truth["crank"]["tooth_events"]["leading_s"])
    trail = np.array(hs.truth["crank"]["tooth_events"]["trailing_s"])
    teeth = np.array(hs.truth["crank"]["tooth_events"]["tooth"])
    assert (trail - lead)[teeth == 35][0] == pytest.approx(7.0 / 7200.0, abs=1e-12)


def test_ac_coupling_tilt_of_a_square_wave() -> None:
    rpm, fc, fs = 600.0, 5.0, 48000.0
    step = 0.5
    sc = scenario(
        duration_s=1.0,
        speed=ConstantSpeed(rpm=rpm),
        cams=(Cam(pattern=half_moon(100.0), sensor=HallSensor(low_v=0.0, high_v=5.0)),),
        channels=(Channel(source="cam_intake", gain=step / 5.0),),
        instrument=Instrument(kind="soundcard", sample_rate=fs, bits=24, ac_corner_hz=fc),
    )
    sim = simulate(sc)
    y = sim.channel("cam_intake")
    tau = 1.0 / (2 * math.pi * fc)
    period = 720.0 / (6 * rpm)
    ev = sim.truth["cams"][0]["events"]
    rise = [e["time_s"] for e in ev if e["direction"] == "rising"]
    fall = [e["time_s"] for e in ev if e["direction"] == "falling"]
    tr = rise[1]
    tf = min(t for t in fall if t > tr)
    assert tf - tr == pytest.approx(period / 2, abs=1e-12)
    na = math.ceil((tr + 2e-3) * fs)
    nb = math.floor((tf - 2e-3) * fs)
    # extrapolate the exponential decay to the two steps
    top = y[na] * math.exp((na / fs - tr) / tau)
    end = y[nb] * math.exp(-(tf - nb / fs) / tau)
    # source: square-wave response of an RC high-pass, percentage tilt
    # P = 2*tanh(T / (4*R*C)) of the amplitude V/2 (Millman & Taub, Pulse, Digital and
    # Switching Waveforms, 1965, ch. 2) -- from memory
    assert (top - end) / (step / 2) == pytest.approx(2 * math.tanh(period / (4 * tau)), rel=5e-4)


def test_decimator_equals_scipy_resample_poly() -> None:
    rng = np.random.default_rng(3)
    x = rng.standard_normal(4000)
    dec = Decimator(4)
    d = dec.delay
    n0, n1 = 100, 900
    got = dec.apply(x[None, n0 * 4 - d : (n1 - 1) * 4 + d + 1], n1 - n0)[0]
    # source: scipy.signal.resample_poly documentation (FIR from firwin with a Kaiser window
    # of beta 5, delay compensated)
    ref = signal.resample_poly(x, 1, 4)[n0:n1]
    assert np.allclose(got, ref, atol=1e-12)


# ------------------------------------------------------------------------------ converters


def test_scope_quantisation_step() -> None:
    sc = scenario(
        duration_s=0.05,
        crank=CrankWheel(sensor=VrSensor(peak_v_at_200rpm=0.5)),
        channels=(Channel(source="crank", noise_v=0.3, range_v=(-5.0, 5.0)),),
        instrument=Instrument(kind="scope", sample_rate=100_000.0, bits=8),
    )
    y = simulate(sc).channel("crank")
    # source: IEEE Std 1241-2010 (ADC terminology), ideal code bin width Q = FSR / 2**N
    q = 10.0 / 2**8
    codes = (y + 5.0) / q
    assert np.allclose(codes, np.round(codes), atol=1e-9)
    assert np.unique(np.round(codes)).size > 50
    assert float(quantise_scope(np.array([99.0]), -5.0, 5.0, 8)[0]) == pytest.approx(5.0 - q)


@pytest.mark.parametrize("bits", [16, 24])
def test_soundcard_quantisation_and_clipping(bits: int) -> None:
    sc = scenario(
        duration_s=0.05,
        speed=ConstantSpeed(rpm=3000.0),
        crank=CrankWheel(sensor=VrSensor(peak_v_at_200rpm=0.2)),
        channels=(Channel(source="crank", gain=1.0),),
        instrument=Instrument(kind="soundcard", sample_rate=44100.0, bits=bits),
    )
    y = simulate(sc).channel("crank")
    # source: two's-complement PCM of b bits holds -2**(b-1) .. 2**(b-1)-1; soundfile reads it
    # as float code / 2**(b-1) (python-soundfile docs, read(dtype='float64'))
    codes = y * 2 ** (bits - 1)
    assert np.array_equal(codes, np.round(codes))
    assert y.min() == -1.0 and y.max() == pytest.approx(1 - 2.0 ** -(bits - 1))


# ------------------------------------------------------------------------------ cams


def _cam_rising(sim_: object, fs: float) -> np.ndarray:
    y = sim_.channel("cam_intake")  # type: ignore[attr-defined]
    return crossings(y, fs, 2.5, +1)


@pytest.mark.parametrize("k", [1, 2, -1])
def test_belt_jump_shifts_cam_by_drive_teeth(k: int) -> None:
    fs = 500_000.0

    def make(j: int) -> object:
        return simulate(
            scenario(
                duration_s=0.2,
                crank=CrankWheel(sensor=HallSensor()),
                cams=(Cam(pattern=((150.0, 200.0),), sprocket_teeth=42, jumped_teeth=j),),
                instrument=Instrument(kind="float", sample_rate=fs),
            )
        )

    a, b = make(0), make(k)
    ea = [e for e in a.truth["cams"][0]["events"] if e["flank"] == "leading"]
    eb = [e for e in b.truth["cams"][0]["events"] if e["flank"] == "leading"]
    # source: the camshaft turns once per 720 deg CA, so one tooth of a T-tooth cam sprocket is
    # 720/T deg CA; T = 42 gives 17.142857 deg CA
    shift = k * 720.0 / 42
    assert circ(eb[0]["angle_after_ref_deg"] - ea[0]["angle_after_ref_deg"] - shift, 360.0) == (
        pytest.approx(0.0, abs=1e-9)
    )
    assert b.truth["cams"][0]["phase"]["jump_deg"] == pytest.approx(shift)
    # the same shift in the samples: each rising edge comes shift / omega later (mod a cycle)
    ta, tb = _cam_rising(a, fs), _cam_rising(b, fs)
    cycle = 720.0 / 9000.0
    for t in tb:
        err = np.min(np.abs(circ(t - ta - shift / 9000.0, cycle)))
        assert err * 9000.0 < 0.01


def test_cam_angle_after_reference_matches_the_samples() -> None:
    fs = 1e6
    sc = scenario(
        duration_s=0.2,
        start_angle_deg=123.0,
        crank=CrankWheel(wheel="60-2", tooth1_deg=84.0, sensor=HallSensor(tau_s=1e-6)),
        cams=(
            Cam(
                pattern=((250.0, 300.0), (500.0, 520.0)),
                offset_deg=3.0,
                sensor=HallSensor(tau_s=1e-6),
            ),
        ),
        instrument=Instrument(kind="float", sample_rate=fs),
    )
    sim = simulate(sc)
    omega = 9000.0
    ref = crossings(sim.channel("crank"), fs, 2.5, +1)
    refs = np.array(sim.truth["crank"]["reference_times_s"])
    ref = ref[np.argmin(np.abs(ref[:, None] - refs[None, :] - 1e-6 * math.log(2)), axis=0)]
    cams = _cam_rising(sim, fs)
    for e in sim.truth["cams"][0]["events"]:
        if e["flank"] != "leading":
            continue
        t = cams[np.argmin(np.abs(cams - e["time_s"]))]
        before = ref[ref <= t]
        if before.size == 0:
            assert not e["after_reference"]
            continue
        assert e["after_reference"]
        assert (t - before[-1]) * omega == pytest.approx(e["angle_after_ref_deg"], abs=0.01)
    edges = sim.truth["cams"][0]["edges"]
    lead = [e for e in edges if e["flank"] == "leading"]
    # static truth: (pattern + offset - reference angle) mod 360
    r = sim.truth["crank"]["reference_angle_deg"]
    assert lead[0]["angle_after_ref_deg"] == pytest.approx((250.0 + 3.0 - r) % 360.0)
    assert lead[1]["angle_after_ref_deg"] == pytest.approx((500.0 + 3.0 - r) % 360.0)
    assert lead[0]["revolution"] != lead[1]["revolution"]


def test_phaser_step_is_first_order() -> None:
    tau, to = 0.05, 20.0
    sc = scenario(
        duration_s=0.6,
        speed=ConstantSpeed(rpm=3000.0),
        cams=(
            Cam(
                pattern=((100.0, 130.0),),
                phaser=Phaser(moves=(PhaserMove("step", t_s=0.2, to_deg=to, tau_s=tau),)),
            ),
        ),
    )
    tr = compute_truth(sc)
    ev = [e for e in tr["cams"][0]["events"] if e["flank"] == "leading"]
    t = np.array([e["time_s"] for e in ev])
    phase = np.array([e["phase_deg"] for e in ev])
    after = np.array([e["angle_after_ref_deg"] for e in ev])
    # source: first-order step response x(t) = X (1 - exp(-t/tau)) (Ogata, Modern Control
    # Engineering, 5th ed., sec. 5-2)
    expected = np.where(t < 0.2, 0.0, to * (1 - np.exp(-(t - 0.2) / tau)))
    assert np.allclose(phase, expected, atol=1e-9)
    assert np.allclose(after - after[0], phase, atol=1e-6)
    mv = tr["cams"][0]["phaser"]["moves"][0]
    assert mv["t10_90_s"] == pytest.approx(tau * math.log(9.0))
    assert mv["peak_rate_deg_s"] == pytest.approx(to / tau)


def test_cam_patterns_shorthand() -> None:
    assert cam_pattern({"kind": "equal", "n": 4, "first_deg": 10, "width_deg": 20}) == (
        (10.0, 30.0),
        (190.0, 210.0),
        (370.0, 390.0),
        (550.0, 570.0),
    )
    sc = Scenario.from_dict(
        {
            "duration_s": 0.05,
            "cams": [{"pattern": {"kind": "single", "at_deg": 710, "width_deg": 30}}],
        }
    )
    assert sc.cams[0].pattern == ((710.0, 740.0),)
    with pytest.raises(UsageError, match=r"cams\[0\]\.pattern\.kind 'star'"):
        Scenario.from_dict({"cams": [{"pattern": {"kind": "star"}}]})


# ------------------------------------------------------------------------------ chain


def test_ignition_spikes_once_per_firing() -> None:
    fs = 500_000.0
    sc = scenario(
        duration_s=0.2,
        n_cyl=4,
        speed=ConstantSpeed(rpm=1200.0),
        crank=CrankWheel(sensor=HallSensor()),
        spikes=IgnitionSpikes(
            angle_deg=-10.0, amplitude_v=3.0, tau_s=20e-6, channels=("cam_intake",)
        ),
        cams=(Cam(pattern=((600.0, 610.0),)),),
        instrument=Instrument(kind="float", sample_rate=fs),
    )
    sim = simulate(sc)
    times = np.array(sim.truth["disturbances"]["spikes"]["times_s"])
    # source: a four-stroke engine fires each cylinder once per 720 deg CA, so 4 cylinders fire
    # every 180 deg CA (Heywood, 1988, ch. 1) -- from memory
    assert np.allclose(np.diff(times), 180.0 / 7200.0, atol=1e-12)
    assert times.size == 8
    model = build_model(sc)
    assert np.allclose((model.motion.angle(times) + 10.0) % 180.0, 0.0, atol=1e-9)
    y = sim.channel("cam_intake")
    for t in times:
        n = math.ceil(t * fs)
        assert y[n] - y[n - 1] == pytest.approx(3.0 * math.exp(-(n / fs - t) / 20e-6), rel=1e-6)
    assert np.max(sim.channel("crank")) <= 5.0


def test_dropout_and_noise() -> None:
    sc = scenario(
        duration_s=0.1,
        crank=CrankWheel(sensor=HallSensor()),
        channels=(
            Channel(source="crank", dropouts=(Dropout(t_s=0.03, duration_s=0.02, level_v=0.7),)),
            Channel(name="spare", source="none", noise_v=0.05),
        ),
    )
    sim = simulate(sc)
    t = sim.times()
    y = sim.channel("crank")
    inside = (t >= 0.03) & (t < 0.05)
    assert np.all(y[inside] == 0.7)
    assert np.ptp(y[t < 0.029]) == pytest.approx(5.0)
    n = sim.channel("spare")
    # white Gaussian noise: sample standard deviation near sigma for 20000 samples
    assert n.std() == pytest.approx(0.05, rel=0.03)
    assert abs(n.mean()) < 0.002
    assert sim.truth["disturbances"]["dropouts"][0]["t_end_s"] == pytest.approx(0.05)


def test_soundcard_noise_is_given_in_the_capture_band() -> None:
    sc = Scenario(
        duration_s=0.5,
        cams=(),
        channels=(Channel(name="spare", source="none", noise_v=0.05, gain=2.0),),
        instrument=Instrument(kind="soundcard", sample_rate=48000.0, bits=24, full_scale_v=2.0),
    )
    y = simulate(sc).channel("spare")
    # white noise of rms 0.05 V in 0..fs/2, times gain 2 over a 2 V full scale: 0.05 FS rms; the
    # anti-alias filter's transition band takes a few per cent
    assert y.std() == pytest.approx(0.05, rel=0.05)


def test_swapped_channels_keep_their_roles_in_the_truth() -> None:
    normal = simulate(scenario(duration_s=0.05))
    swapped = simulate(
        scenario(
            duration_s=0.05,
            channels=(
                Channel(name="crank", source="cam_intake"),
                Channel(name="cam", source="crank"),
            ),
        )
    )
    assert np.array_equal(swapped.channel("crank"), normal.channel("cam_intake"))
    assert np.array_equal(swapped.channel("cam"), normal.channel("crank"))
    roles = {c["name"]: c["role"] for c in swapped.truth["channels"]}
    assert roles == {"crank": "cam_intake", "cam": "crank"}
    assert swapped.truth["crank"]["channel"] == "cam"


# ------------------------------------------------------------------------------ blocks, seeds


@pytest.mark.parametrize("name", sorted(PRESETS))
def test_blocks_equal_one_shot(name: str) -> None:
    sc = preset(name, duration_s=0.12)
    one = simulate(sc, teeth=False).samples
    parts = np.concatenate([b.data for b in iter_blocks(sc, 1237)])
    assert parts.shape == one.shape == (sc.n_samples, len(sc.resolved_channels()))
    assert np.max(np.abs(parts - one)) < 1e-9


def test_seed_reproduces_and_changes_noise() -> None:
    sc = preset("hall-36-1-two-cams-scope", duration_s=0.02)
    a = simulate(sc).samples
    b = simulate(sc).samples
    c = simulate(sc.replace(seed=sc.seed + 1)).samples
    assert np.array_equal(a, b)
    assert np.mean(a != c) > 0.3


# ------------------------------------------------------------------------------ dict form


@pytest.mark.parametrize("name", sorted(PRESETS))
def test_dict_round_trip_through_json(name: str) -> None:
    sc = preset(name)
    again = Scenario.from_dict(json.loads(json.dumps(sc.to_dict())))
    assert again == sc


@pytest.mark.parametrize(
    ("data", "words"),
    [
        ({"speeed": {}}, "speeed is not a known key"),
        ({"speed": {"kind": "cranking", "ripple": 1.2}}, "speed.ripple 1.2 would drive rpm"),
        ({"speed": {"kind": "warp"}}, "speed.kind 'warp' is unknown"),
        ({"crank": {"wheel": "60-61"}}, "crank.wheel '60-61' is not a usable N-M wheel"),
        ({"crank": {"wheel": "sixty"}}, "not in N-M notation"),
        ({"cams": [{"pattern": [[700.0, 650.0]]}]}, "cams[0].pattern window [700.0, 650.0]"),
        (
            {"instrument": {"kind": "soundcard", "sample_rate": 48000, "bits": 12}},
            "instrument.bits 12 is not a sound card depth",
        ),
        ({"channels": [{"source": "cam_x"}]}, "source 'cam_x' is not"),
        ({"duration_s": "long"}, "duration_s 'long' is not a number"),
        ({"crank": {"damaged": [{"tooth": 1}]}}, "tooth 1 cannot be damaged"),
        ({"crank": {"sensor": {"kind": "vr", "spread": 1.5}}}, "crank.sensor.spread 1.5"),
        (
            {
                "cams": [{"phaser": {"moves": [{"t_s": 0.1, "to_deg": 40, "tau_s": 0.0005}]}}],
                "speed": {"kind": "constant", "rpm": 300},
            },
            "phaser of 'cam_intake'",
        ),
        (
            {"channels": [{"source": "cam_intake", "reversed": True}]},
            "reversed leads apply to VR sensors only",
        ),
    ],
)
def test_bad_scenarios_name_the_key(data: dict[str, object], words: str) -> None:
    with pytest.raises(UsageError) as exc:
        Scenario.from_dict(data)
    assert words in str(exc.value)
    assert isinstance(exc.value, ValueError)


def test_dict_tables_without_kind_keep_the_default_kind() -> None:
    sc = Scenario.from_dict(
        {
            "speed": {"rpm": 900},
            "crank": {"sensor": {"peak_v_at_200rpm": 0.5}},
            "cams": [{"sensor": {"tau_s": 0.0}}],
        }
    )
    assert isinstance(sc.speed, ConstantSpeed) and sc.speed.rpm == 900.0
    assert isinstance(sc.crank.sensor, VrSensor) and sc.crank.sensor.peak_v_at_200rpm == 0.5
    assert isinstance(sc.cams[0].sensor, HallSensor) and sc.cams[0].sensor.tau_s == 0.0
    # lists given in Python become tuples: the scenario stays hashable and equal to its dict form
    py = Scenario(cams=[Cam(pattern=[[10, 50]])], duration_s=0.05)  # type: ignore[arg-type]
    assert py == Scenario.from_dict(py.to_dict())
    assert hash(py) == hash(Scenario.from_dict(py.to_dict()))


def test_bad_calls() -> None:
    with pytest.raises(UsageError, match="block_size 0"):
        next(iter_blocks(Scenario(duration_s=0.01), 0))
    with pytest.raises(UsageError, match="neither a Scenario nor a dict"):
        simulate("60-2")  # type: ignore[arg-type]
    with pytest.raises(UsageError, match="preset 'v12'"):
        preset("v12")
    with pytest.raises(UsageError, match="gives 1 samples"):
        Scenario(duration_s=1e-4, instrument=Instrument(sample_rate=10_000.0))
    with pytest.raises(UsageError, match="runs into the next one"):
        Scenario(crank=CrankWheel(wheel="60-2", duty=0.5, wide_tooth_deg=20.0, sensor=HallSensor()))


def test_snap_and_coast_speed_truth() -> None:
    tr = compute_truth(
        scenario(
            duration_s=1.2,
            speed=SnapSpeed(
                rpm=900.0, peak_rpm=3000.0, t_start_s=0.1, rise_s=0.2, hold_s=0.2, fall_s=0.4
            ),
        )
    )
    assert tr["rpm"]["min"] == pytest.approx(900.0)
    assert tr["rpm"]["max"] == pytest.approx(3000.0)
    assert 900.0 < tr["rpm"]["mean"] < 3000.0
    tr = compute_truth(
        scenario(duration_s=0.5, speed=CoastSpeed(rpm=900.0, t_off_s=0.1, tau_s=0.2))
    )
    assert tr["rpm"]["max"] == pytest.approx(900.0)
    assert tr["rpm"]["min"] == pytest.approx(900.0 * math.exp(-2.0), rel=1e-6)


# ------------------------------------------------------------------------------ files


def test_write_wav_and_streamed_hdf5(tmp_path: object) -> None:
    sc = preset("idle-60-2-vr-soundcard", duration_s=0.2)
    sim = simulate(sc)
    wav = tmp_path / "idle.wav"  # type: ignore[operator]
    sim.write(wav, truth_path=tmp_path / "idle.json")  # type: ignore[operator]
    # source: python-soundfile docs, read() returns float64 code / 2**15 for PCM_16
    data, rate = sf.read(wav, always_2d=True)
    assert rate == 48000
    assert np.array_equal(data, sim.samples)
    truth = json.loads((tmp_path / "idle.json").read_text())  # type: ignore[operator]
    assert truth["crank"]["reference_times_s"] == sim.truth["crank"]["reference_times_s"]

    sc2 = preset("cranking-60-2-vr", duration_s=0.1)
    h5 = tmp_path / "crank.h5"  # type: ignore[operator]
    tr = write_scenario(sc2, h5, block_size=3001)
    one = simulate(sc2)
    # source: h5py docs, Dataset[()] reads the whole dataset; the capture layout keeps one 1-D
    # dataset per channel at the root, named by the channel
    with h5py.File(h5, "r") as f:
        got = np.column_stack([f[n][()] for n in one.channels])
        assert float(f.attrs["sample_rate"]) == 100_000.0
    assert np.max(np.abs(got - one.samples)) < 1e-9
    assert "tooth_events" not in tr["crank"]
    assert tr["crank"]["reference_times_s"] == one.truth["crank"]["reference_times_s"]


def test_presets_give_usable_truth() -> None:
    for name in PRESETS:
        sc = preset(name, duration_s=0.3)
        tr = compute_truth(sc, teeth=False)
        json.dumps(tr)
        assert tr["sample_rate"] == sc.sample_rate
        assert [c["name"] for c in tr["channels"]] == [c.label for c in sc.resolved_channels()]
        assert len(tr["cams"]) == len(sc.cams)
        assert all(0.0 <= e["angle_after_ref_deg"] < 360.0 for c in tr["cams"] for e in c["events"])
