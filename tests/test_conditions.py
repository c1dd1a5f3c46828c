"""Real-world capture conditions, one simulated capture each, decoded and held against the truth.

Every test decodes with no hints unless the condition is about hints, and checks three things:
the crank (wheel, sensor kind, lead polarity, every reference event that the capture holds and no
invented one), the cam angles (each true edge and each single event, within a stated tolerance),
and that whatever went wrong on the way (reversed leads, missing teeth, spurious edges, a dead
channel) is *reported* in the findings instead of passing silently.

Tolerances (deg CA), common practice, no source: 0.1-0.3 for clean captures, where the error
budget is sub-sample interpolation and tooth-to-tooth interpolation of the crank angle; up to 1
for the harshest cranking, spike and noise cases.
"""

from __future__ import annotations

import math
import re
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from conftest import (
    cam_errors,
    cam_event_check,
    finding_codes,
    local_rpm,
    make_capture,
    reference_check,
    result_channel,
)
from toothcomb.decoders.errors import DecodeError
from toothcomb.decoders.options import DecodeOptions
from toothcomb.decoders.pipeline import decode_capture
from toothcomb.decoders.readers.write import write_capture
from toothcomb.decoders.result import DecodeResult
from toothcomb.decoders.simulate import (
    Cam,
    Channel,
    CoastSpeed,
    ConstantSpeed,
    CrankingSpeed,
    CrankWheel,
    DamagedTooth,
    Dropout,
    HallSensor,
    IgnitionSpikes,
    Instrument,
    Runt,
    Scenario,
    SnapSpeed,
    VrSensor,
    equal_teeth,
    simulate,
)
from toothcomb.decoders.simulate.engine import build_model
from toothcomb.decoders.simulate.scenario import SpeedProfile

#: tooth 1's centre, deg CA after firing TDC of cylinder 1 (the gap ends here)
TOOTH1_DEG = 84.0

#: an intake cam with two windows that differ between the two crank revolutions, so the cycle
#: phase is known; its last edge comes 4 deg CA after the centre of the last crank tooth, in
#: the gap, where the crank angle is interpolated across three pitches
TWO_WINDOWS = ((120.0, 190.0), (400.0, 430.0))


def vr(peak: float = 0.5, **kw: Any) -> VrSensor:
    """A VR crank sensor with ``peak`` volts at 200 rpm."""
    return VrSensor(peak_v_at_200rpm=peak, **kw)


def engine(
    *,
    speed: SpeedProfile | None = None,
    wheel: str = "60-2",
    crank_sensor: HallSensor | VrSensor | None = None,
    n_cyl: int = 4,
    duration_s: float = 1.0,
    instrument: Instrument | None = None,
    crank_channel: Channel | None = None,
    cam_channel: Channel | None = None,
    cams: tuple[Cam, ...] | None = None,
    channels: tuple[Channel, ...] | None = None,
    spikes: IgnitionSpikes | None = None,
    seed: int = 7,
    start_angle_deg: float = 30.0,
    **wheel_kw: Any,
) -> Scenario:
    """A four-stroke engine with a crank wheel and one Hall intake cam; every part can be
    swapped. Default: 60-2 VR crank at 1500 rpm, float samples at 50 kS/s."""
    crank = CrankWheel(wheel=wheel, tooth1_deg=TOOTH1_DEG, sensor=crank_sensor or vr(), **wheel_kw)
    cams = cams or (Cam(name="cam_intake", pattern=TWO_WINDOWS, sensor=HallSensor()),)
    if channels is None:
        channels = (
            crank_channel or Channel(name="crank", source="crank", noise_v=0.003),
            cam_channel or Channel(name="cam", source="cam_intake", noise_v=0.01),
        )
    return Scenario(
        duration_s=duration_s,
        seed=seed,
        n_cyl=n_cyl,
        start_angle_deg=start_angle_deg,
        speed=speed or ConstantSpeed(rpm=1500.0, ripple=0.02),
        crank=crank,
        cams=cams,
        channels=channels,
        spikes=spikes,
        instrument=instrument or Instrument(kind="float", sample_rate=50_000.0),
    )


def check_crank(r: DecodeResult, truth: dict, ref_tol: float) -> None:
    """The wheel, the sensor kind, the polarity, and every reference event the capture holds."""
    crank = truth["crank"]
    assert r.crank.channel == result_channel(r, truth, crank["channel"]), r.choices
    assert r.crank.wheel == crank["wheel"], r.choices.get("wheel")
    assert r.crank.sensor == crank["sensor"], r.choices.get("crank_sensor")
    assert r.crank.polarity == crank["polarity"]
    want, found, invented, errs = reference_check(r, truth)
    assert want >= 2, "the capture must hold at least two decodable reference events"
    assert found == want, f"{found} of {want} reference events found"
    assert invented == 0, f"{invented} decoded reference events match no true one"
    assert np.max(errs) < ref_tol, f"reference timing error {np.max(errs):.3f} deg CA"


def check_cams(r: DecodeResult, truth: dict, tol: float, event_tol: float | None = None) -> None:
    """Each true cam edge within ``tol`` (mean), each single event within ``event_tol``, no
    spurious event."""
    for k in range(len(truth["cams"])):
        errs = cam_errors(r, truth, cam=k)
        assert max(errs.values()) < tol, (k, errs)
        n_true, spurious, per_event = cam_event_check(r, truth, cam=k)
        assert n_true > 0
        assert spurious == 0, f"cam {k}: {spurious} decoded events match no true event"
        missed = int(np.count_nonzero(np.isnan(per_event)))
        assert missed == 0, f"cam {k}: {missed} of {n_true} true events not decoded"
        assert np.max(per_event) < (event_tol or tol), (k, np.max(per_event))


def decode(
    tmp_path: Path, scenario: Scenario, fmt: str = "h5", options: DecodeOptions | None = None
) -> tuple[DecodeResult, dict]:
    """Simulate ``scenario``, write it as ``fmt`` and decode it: (result, truth)."""
    path, truth = make_capture(tmp_path, scenario, fmt)
    return decode_capture(str(path), options), truth


# ---------------------------------------------------------------------------------------------
# cranking and fast speed changes


def ripple_phase(n_cyl: int, where: str, wheel: str = "60-2") -> float:
    """Ripple phase (crank angle of the speed minimum) that puts the middle of the wheel gap at
    the speed minimum ("min"), in the steepest deceleration ("decel") or the steepest
    acceleration ("accel"). The ripple has n_cyl/2 cycles per revolution."""
    n, m = (int(v) for v in wheel.split("-"))
    gap_middle = TOOTH1_DEG - (m + 1) * 360.0 / n / 2.0
    quarter = 360.0 / (n_cyl / 2.0) / 4.0
    return gap_middle + {"min": 0.0, "decel": quarter, "accel": -quarter}[where]


@pytest.mark.parametrize(
    "rpm,ripple,wheel,sensor,where",
    [
        (150.0, 0.30, "60-2", "vr", "decel"),
        (150.0, 0.30, "60-2", "vr", "accel"),
        (220.0, 0.20, "36-1", "hall", "min"),
        (300.0, 0.10, "60-2", "hall", "decel"),
        (250.0, 0.25, "36-2", "vr", "accel"),
    ],
)
def test_cranking_with_compression_ripple(tmp_path, rpm, ripple, wheel, sensor, where):
    """Starter cranking, four cylinders: the speed swings at the firing frequency."""
    sc = engine(
        speed=CrankingSpeed(rpm=rpm, ripple=ripple, ripple_phase_deg=ripple_phase(4, where, wheel)),
        wheel=wheel,
        crank_sensor=vr() if sensor == "vr" else HallSensor(),
        duration_s=2.0,
    )
    r, truth = decode(tmp_path, sc)
    check_crank(r, truth, ref_tol=0.3)
    check_cams(r, truth, tol=0.3, event_tol=0.5)
    assert r.crank.sync_losses == 0 and "sync-lost" not in finding_codes(r)
    # the decoded per-tooth speed follows the ripple: its extremes are the true ones
    assert r.crank.rpm.min == pytest.approx(truth["rpm"]["min"], rel=0.03)
    assert r.crank.rpm.max == pytest.approx(truth["rpm"]["max"], rel=0.03)
    # and it swings at the firing frequency
    # source: firing frequency of a four-stroke engine = rpm/60 * n_cyl/2 (one firing per
    # cylinder every two revolutions; Heywood, Internal Combustion Engine Fundamentals, ch. 1)
    t, v = np.array(r.crank.rpm_trace).T
    grid = np.linspace(t[0], t[-1], 4096)
    spectrum = np.abs(np.fft.rfft(np.interp(grid, t, v) - np.mean(v)))
    freqs = np.fft.rfftfreq(len(grid), grid[1] - grid[0])
    firing_hz = truth["rpm"]["mean"] / 60.0 * 4 / 2.0
    assert abs(freqs[np.argmax(spectrum)] - firing_hz) < 1.5 / (t[-1] - t[0])


@pytest.mark.parametrize("n_cyl", [6, 8])
@pytest.mark.parametrize("where", ["min", "decel", "accel"])
def test_large_engine_cranking_swing_85_to_225_rpm(tmp_path, n_cyl, where):
    """A large engine cranks with a very uneven speed, about 85..225 rpm: with
    rpm = base*(1 - a*cos)/sqrt(1 - a**2), a = 0.45 and base 140 rpm give 86..227 rpm."""
    a, base = 0.45, 140.0
    sc = engine(
        speed=CrankingSpeed(rpm=base, ripple=a, ripple_phase_deg=ripple_phase(n_cyl, where)),
        n_cyl=n_cyl,
        duration_s=2.0,
    )
    r, truth = decode(tmp_path, sc)
    assert truth["rpm"]["min"] < 90 and truth["rpm"]["max"] > 220
    check_crank(r, truth, ref_tol=1.0)
    check_cams(r, truth, tol=1.0)
    assert "vr-reversed" not in finding_codes(r)


@pytest.mark.parametrize("sensor", ["vr", "hall"])
def test_6500_rpm(tmp_path, sensor):
    """Top speed: 6500 rpm on a 60-2 wheel is 6500 teeth per second; a VR on a 96 kHz sound
    card (14.8 samples per tooth), a Hall on a 1 MS/s 8-bit scope."""
    if sensor == "vr":
        inst = Instrument(kind="soundcard", sample_rate=96_000.0, bits=24, full_scale_v=20.0)
        crank = vr(0.3)
    else:
        inst = Instrument(kind="scope", sample_rate=1e6, bits=8)
        crank = HallSensor(tau_s=1e-6)
    sc = engine(
        speed=ConstantSpeed(rpm=6500.0, ripple=0.01),
        crank_sensor=crank,
        duration_s=0.15,
        instrument=inst,
    )
    r, truth = decode(tmp_path, sc, fmt="flac" if sensor == "vr" else "h5")
    # 14.8 samples per tooth is enough: no warning about timing precision
    assert "few-samples" not in finding_codes(r)
    check_crank(r, truth, ref_tol=0.2)
    check_cams(r, truth, tol=0.2)
    assert r.crank.rpm.mean == pytest.approx(6500.0, rel=0.01)


def test_throttle_snap_800_to_6500_rpm(tmp_path):
    """A throttle snap: 800 -> 6500 rpm in 0.15 s (about 38000 rpm/s) and back."""
    sc = engine(
        speed=SnapSpeed(
            rpm=800.0, peak_rpm=6500.0, t_start_s=0.1, rise_s=0.15, hold_s=0.1, fall_s=0.5
        ),
        duration_s=1.0,
        instrument=Instrument(kind="float", sample_rate=100_000.0),
    )
    r, truth = decode(tmp_path, sc)
    check_crank(r, truth, ref_tol=0.2)
    check_cams(r, truth, tol=0.3)
    assert r.crank.sync_losses == 0
    assert r.crank.rpm.max == pytest.approx(6500.0, rel=0.03)
    assert r.crank.rpm.min == pytest.approx(800.0, rel=0.03)


@pytest.mark.parametrize("sensor", ["vr", "hall"])
def test_coast_down_to_standstill(tmp_path, sensor):
    """Switch-off: the speed decays from 900 rpm to a crawl (4 rpm at the end). The decoder keeps
    every revolution the signal holds and invents no tooth: each decoded reference is a true
    one, and each decoded tooth speed is the true speed there."""
    sc = engine(
        speed=CoastSpeed(rpm=900.0, t_off_s=0.1, tau_s=0.35, ripple=0.1),
        crank_sensor=vr() if sensor == "vr" else HallSensor(),
        duration_s=2.0,
    )
    r, truth = decode(tmp_path, sc)
    assert truth["rpm"]["min"] < 5.0
    check_crank(r, truth, ref_tol=0.3)
    check_cams(r, truth, tol=0.3)
    t, v = np.array(r.crank.rpm_trace).T
    true = build_model(sc).motion.rpm(t)
    assert np.max(np.abs(v / true - 1.0)) < 0.05
    assert r.crank.rpm.min > 0.0


# ---------------------------------------------------------------------------------------------
# sound card


@pytest.mark.parametrize("corner_hz", [2.0, 5.0, 20.0])
def test_soundcard_ac_coupled_hall_crank_and_slow_hall_cam(tmp_path, corner_hz):
    """Hall crank and Hall cam through a sound card's AC coupling while cranking at 200 rpm:
    the cam windows last tens of milliseconds, so at a 20 Hz corner each arrives as one positive
    and one negative spike."""
    sc = engine(
        speed=CrankingSpeed(rpm=200.0, ripple=0.2),
        crank_sensor=HallSensor(),
        duration_s=2.0,
        crank_channel=Channel(name="crank", source="crank", gain=0.15, noise_v=0.002),
        cam_channel=Channel(name="cam", source="cam_intake", gain=0.15, noise_v=0.002),
        instrument=Instrument(
            kind="soundcard", sample_rate=48_000.0, bits=16, ac_corner_hz=corner_hz
        ),
    )
    sim = simulate(sc)
    path = tmp_path / "capture.wav"
    sim.write(path)
    truth = sim.truth
    # the condition is in the capture: across the first cam window the recorded level decays
    # as exp(-t/tau) with tau = 1/(2 pi fc)
    # source: step response of a first-order RC high-pass (Horowitz & Hill, The Art of
    # Electronics, 3rd ed., sec. 1.4)
    ev = [e for e in truth["cams"][0]["events"] if e["window"] == 0]
    t_on, t_off = ev[0]["time_s"], ev[1]["time_s"]
    tau = 1.0 / (2 * math.pi * corner_hz)
    cam = sim.channel("cam")
    i_on, i_off = (round(x * 48_000.0) for x in (t_on, t_off))
    step = np.max(cam[i_on : i_on + 48]) - np.median(cam[i_on - 200 : i_on - 20])
    left = cam[i_off - 30] - np.median(cam[i_on - 200 : i_on - 20])
    assert left / step == pytest.approx(math.exp(-(t_off - t_on) / tau), abs=0.05)
    if corner_hz == 20.0:
        assert left / step < 0.15  # a spike, not a level
    r = decode_capture(str(path))
    check_crank(r, truth, ref_tol=0.2)
    check_cams(r, truth, tol=0.2)


@pytest.mark.parametrize(
    "rate,bits", [(44_100.0, 16), (48_000.0, 24), (96_000.0, 16), (192_000.0, 24)]
)
def test_soundcard_rates_and_depths(tmp_path, rate, bits):
    """VR crank and Hall cam at 3000 rpm through a sound card at 44.1..192 kHz, 16 and 24 bit."""
    sc = engine(
        speed=ConstantSpeed(rpm=3000.0, ripple=0.02),
        crank_sensor=vr(0.3),
        duration_s=0.4,
        crank_channel=Channel(name="crank", source="crank", gain=0.15, noise_v=0.002),
        cam_channel=Channel(name="cam", source="cam_intake", gain=0.15, noise_v=0.002),
        instrument=Instrument(kind="soundcard", sample_rate=rate, bits=bits, ac_corner_hz=5.0),
    )
    r, truth = decode(tmp_path, sc, fmt="flac")
    assert r.capture.sample_rate == rate
    check_crank(r, truth, ref_tol=0.1)
    check_cams(r, truth, tol=0.15)


@pytest.mark.parametrize("sensor", ["vr", "hall"])
def test_soundcard_clipping_at_full_scale(tmp_path, sensor):
    """Inputs driven far past full scale: the recorded crank is flat-topped at +-1."""
    sc = engine(
        speed=CrankingSpeed(rpm=250.0, ripple=0.2),
        crank_sensor=vr(1.0) if sensor == "vr" else HallSensor(),
        duration_s=1.5,
        crank_channel=Channel(name="crank", source="crank", gain=3.0, noise_v=0.002),
        cam_channel=Channel(name="cam", source="cam_intake", gain=0.6, noise_v=0.002),
        instrument=Instrument(kind="soundcard", sample_rate=48_000.0, bits=16, ac_corner_hz=10.0),
    )
    sim = simulate(sc)
    path = tmp_path / "capture.wav"
    sim.write(path)
    crank = sim.channel("crank")
    # from memory: 16-bit two's-complement codes run -32768..32767, which as fractions of full
    # scale (code / 32768) is -1 .. 1 - 2**-15
    at_rail = np.mean((crank <= -1.0) | (crank >= 1.0 - 2.0**-15))
    assert at_rail > 0.05
    r = decode_capture(str(path))
    check_crank(r, sim.truth, ref_tol=0.3)
    check_cams(r, sim.truth, tol=0.3)


# ---------------------------------------------------------------------------------------------
# scope


@pytest.mark.parametrize(
    "rate,duration,fmt",
    [(50_000.0, 0.5, "csv"), (250_000.0, 0.3, "h5"), (1e6, 0.1, "h5"), (5e6, 0.05, "h5")],
)
@pytest.mark.parametrize("sensor", ["vr", "hall"])
def test_scope_8_bit_50k_to_5M_samples_per_second(tmp_path, rate, duration, fmt, sensor):
    """An 8-bit scope at 2000 rpm, from 50 kS/s to 5 MS/s."""
    sc = engine(
        speed=ConstantSpeed(rpm=2000.0, ripple=0.01),
        wheel="36-1",
        crank_sensor=vr(0.3) if sensor == "vr" else HallSensor(tau_s=1e-6),
        duration_s=duration,
        instrument=Instrument(kind="scope", sample_rate=rate, bits=8, range_v=(-6.0, 6.0)),
    )
    sim = simulate(sc)
    # the condition is in the capture: samples sit on the 8-bit grid, step = range / 2**8
    # source: an N-bit converter over a full scale FS has steps of 1 LSB = FS / 2**N (W. Kester,
    # ed., Data Conversion Handbook, Analog Devices 2005, ch. 2)
    codes = (sim.samples + 6.0) / (12.0 / 256)
    assert np.allclose(codes, np.round(codes), atol=1e-6)
    path = tmp_path / f"capture.{fmt}"
    sim.write(path)
    r = decode_capture(str(path))
    check_crank(r, sim.truth, ref_tol=0.2)
    check_cams(r, sim.truth, tol=0.2)


@pytest.mark.parametrize(
    "sensor,offset_v,range_v",
    [
        ("hall", 2.5, (-10.0, 10.0)),
        ("hall", -4.0, (-10.0, 10.0)),
        ("vr", 0.8, (-1.0, 2.5)),
        ("vr", -1.5, (-3.0, 0.5)),
    ],
)
def test_scope_dc_offset(tmp_path, sensor, offset_v, range_v):
    """A DC offset on the crank probe, larger than a cranking VR signal's own swing (0.4 V peak
    at 200 rpm); the scope range is set around the offset signal."""
    sc = engine(
        speed=CrankingSpeed(rpm=200.0, ripple=0.2),
        wheel="36-1",
        crank_sensor=vr(0.4) if sensor == "vr" else HallSensor(),
        duration_s=1.5,
        crank_channel=Channel(name="crank", source="crank", offset_v=offset_v, noise_v=0.01),
        instrument=Instrument(kind="scope", sample_rate=100_000.0, bits=8, range_v=range_v),
    )
    r, truth = decode(tmp_path, sc)
    check_crank(r, truth, ref_tol=0.3)
    check_cams(r, truth, tol=0.3)


# ---------------------------------------------------------------------------------------------
# interference


@pytest.mark.parametrize(
    "sensor,speed,amplitude,tau_us,one_window,start_deg",
    [
        ("vr", "cranking", 2.0, 20.0, False, 30.0),
        ("vr", "cranking", 5.0, 20.0, False, 30.0),
        ("vr", "running", 5.0, 20.0, False, 30.0),
        ("hall", "cranking", 5.0, 20.0, False, 30.0),
        # every spike lands while the single cam window is away (cam output low)
        ("hall", "cranking", 5.0, 20.0, True, 40.0),
        ("hall", "cranking", 8.0, 40.0, False, 30.0),
    ],
    ids=[
        "vr-cranking-2V",
        "vr-cranking-5V",
        "vr-1500rpm-5V",
        "hall-cranking-5V",
        "hall-cranking-5V-one-cam-window",
        "hall-cranking-8V-40us",
    ],
)
def test_ignition_spikes(tmp_path, sensor, speed, amplitude, tau_us, one_window, start_deg):
    """One short large spike per firing, on every channel, 10 deg before each TDC."""
    cams = (Cam(name="cam_intake", pattern=((430.0, 465.0),), sensor=HallSensor()),)
    sc = engine(
        speed=CrankingSpeed(rpm=200.0, ripple=0.25)
        if speed == "cranking"
        else ConstantSpeed(rpm=1500.0, ripple=0.02),
        crank_sensor=vr() if sensor == "vr" else HallSensor(),
        duration_s=2.0 if speed == "cranking" else 0.6,
        spikes=IgnitionSpikes(angle_deg=-10.0, amplitude_v=amplitude, tau_s=tau_us * 1e-6),
        instrument=Instrument(kind="float", sample_rate=100_000.0),
        cams=cams if one_window else None,
        start_angle_deg=start_deg,
    )
    r, truth = decode(tmp_path, sc)
    assert len(truth["disturbances"]["spikes"]["times_s"]) >= 10
    check_crank(r, truth, ref_tol=1.0)
    check_cams(r, truth, tol=1.0)
    # a spike that got through as a crank edge is reported, not silently counted as a tooth
    if r.crank.extra_teeth:
        assert "extra-edge" in finding_codes(r)


def test_clamped_vr_whose_teeth_a_two_level_reading_misses(tmp_path):
    """A VR crank at 192 kHz, clamped (tanh) into near-square teeth whose flanks are sharp
    enough to pass for a Hall output's, with taller, longer lobes across the gap. A two-level
    reading follows only the gap's lobes; the signal swings through its middle at every tooth,
    so it is a VR sensor, and its 60-2 wheel decodes. Made with numpy: the simulator's clamped
    VR waveforms are told apart by their gap swing already."""
    fs, period, revs = 192_000.0, 33, 40
    ph = 2 * np.pi * np.arange(period) / period
    tooth = np.sin(ph + 0.9 * np.sin(ph))  # skewed: a steeper fall than rise
    # the two missing teeth's pitches (3 from the last tooth to tooth 1): a tall negative
    # lobe, then a tall positive one
    lobe = 3.0 * np.sin(np.pi * np.arange(period) / period)
    lobes = np.r_[-lobe, lobe]
    x = np.tile(np.r_[np.tile(tooth, 58), lobes], revs)
    x = 0.65 * np.tanh(4.0 * x) / np.tanh(4.0)
    x += np.random.default_rng(0).normal(0.0, 0.003, len(x))
    path = tmp_path / "clamped.flac"
    write_capture(path, x[:, None], fs, ["crank"], subtype="PCM_24")
    r = decode_capture(str(path))
    assert (r.crank.sensor, r.crank.wheel, r.crank.sync_losses) == ("vr", "60-2", 0)
    assert "clamped VR" in r.choices["crank_sensor"]
    # source: by construction, one revolution is 60 pitches of 33 samples
    refs = np.asarray(r.crank.reference_times_s)
    assert len(refs) >= revs - 1
    assert np.allclose(np.diff(refs), 60 * period / fs, rtol=1e-3)


def weak_tooth_36_1(flux: float) -> Scenario:
    """A 36-1 VR crank at 1500 rpm whose tooth 12 has ``flux`` of the flux swing, on a 48 kHz,
    24-bit sound card."""
    return engine(
        wheel="36-1",
        duration_s=1.5,
        damaged=(DamagedTooth(tooth=12, kind="weak", amplitude=flux),),
        crank_channel=Channel(name="crank", source="crank", gain=0.12, noise_v=0.003),
        instrument=Instrument(kind="soundcard", sample_rate=48_000.0, bits=24, ac_corner_hz=10.0),
    )


def test_one_sample_spikes_leave_a_weak_vr_tooth_armed(tmp_path):
    """Spikes one sample long, as tall as the VR swing or taller and of either sign, 100 a
    second (interference recorded with no anti-alias filter in its way). They are broadband:
    the noise floor, measured with them, would arm above a weak tooth. Tooth 12 at half the
    flux swing is seen in every revolution and the wheel is identified without hints."""
    sim = simulate(weak_tooth_36_1(0.5))
    x = sim.samples.copy()
    crank = x[:, sim.channels.index("crank")]
    swing = float(np.percentile(crank, 99) - np.percentile(crank, 1))
    rng = np.random.default_rng(5)
    at = rng.choice(len(x), int(100 * sim.duration_s), replace=False)
    crank[at] += rng.choice([-1.0, 1.0], len(at)) * rng.uniform(0.5, 1.5, len(at)) * swing
    np.clip(x, -1.0, 1.0 - 2.0**-23, out=x)
    path = tmp_path / "spiky.flac"
    write_capture(path, x, sim.sample_rate, sim.channels, subtype="PCM_24")
    r = decode_capture(str(path))
    check_crank(r, sim.truth, ref_tol=1.0)
    assert r.crank.missing_teeth == 0 and r.crank.sync_losses == 0


@pytest.mark.parametrize(
    "sensor,speed,noise_v",
    [
        ("vr", "cranking", 0.05),  # peak/rms about 10 at 200 rpm
        ("vr", "cranking", 0.1),  # about 5
        ("vr", "running", 0.5),  # about 7 at 1500 rpm
        ("hall", "cranking", 0.5),  # 5 V steps
        ("hall", "running", 0.8),
    ],
)
def test_broadband_noise(tmp_path, sensor, speed, noise_v):
    """White noise over the whole band (0..25 kHz at 50 kS/s) on the crank and the cam."""
    sc = engine(
        speed=CrankingSpeed(rpm=200.0, ripple=0.2)
        if speed == "cranking"
        else ConstantSpeed(rpm=1500.0, ripple=0.02),
        crank_sensor=vr() if sensor == "vr" else HallSensor(),
        duration_s=2.0 if speed == "cranking" else 0.6,
        crank_channel=Channel(name="crank", source="crank", noise_v=noise_v),
        cam_channel=Channel(name="cam", source="cam_intake", noise_v=0.3),
    )
    r, truth = decode(tmp_path, sc)
    check_crank(r, truth, ref_tol=1.0)
    check_cams(r, truth, tol=0.3, event_tol=1.0)


@pytest.mark.parametrize(
    "noise_v,seed,start_deg", [(0.2, 4, 40.0), (0.3, 7, 30.0)], ids=["0.2V", "0.3V"]
)
def test_hopeless_noise_is_a_decode_error_not_a_crash_or_a_guess(
    tmp_path, noise_v, seed, start_deg
):
    """Noise of 0.2-0.3 V rms over 0..50 kHz on a VR crank of about 0.4-0.6 V peak (cranking
    at 200 rpm): the decoder either finds the true wheel or stops with its own DecodeError (exit
    code 3); it never ends in a Python error, and never reports a wheel the engine does not
    have."""
    sc = engine(
        speed=CrankingSpeed(rpm=200.0, ripple=0.2),
        duration_s=2.0,
        seed=seed,
        start_angle_deg=start_deg,
        cams=(Cam(name="cam_intake", pattern=((430.0, 465.0),), sensor=HallSensor()),),
        crank_channel=Channel(name="crank", source="crank", noise_v=noise_v),
        instrument=Instrument(kind="float", sample_rate=100_000.0),
    )
    path, truth = make_capture(tmp_path, sc, "h5")
    try:
        r = decode_capture(str(path))
    except DecodeError as e:
        assert e.exit_code == 3
        return
    assert r.crank.wheel == truth["crank"]["wheel"], r.choices["wheel"]


@pytest.mark.parametrize("sensor", ["vr", "hall"])
@pytest.mark.parametrize("rpm,dropout_ms", [(1500.0, 4.0), (250.0, 8.0)])
def test_crank_dropout(tmp_path, sensor, rpm, dropout_ms):
    """The crank signal vanishes for a few milliseconds (a loose connector): 6 teeth at
    1500 rpm, 2 at 250 rpm."""
    sc = engine(
        speed=ConstantSpeed(rpm=rpm, ripple=0.02),
        crank_sensor=vr() if sensor == "vr" else HallSensor(),
        duration_s=0.6 if rpm > 1000 else 2.0,
        crank_channel=Channel(
            name="crank",
            source="crank",
            noise_v=0.003,
            dropouts=(Dropout(t_s=0.3 if rpm > 1000 else 1.0, duration_s=dropout_ms / 1000),),
        ),
    )
    r, truth = decode(tmp_path, sc)
    check_crank(r, truth, ref_tol=0.3)
    check_cams(r, truth, tol=0.3)
    codes = finding_codes(r)
    assert "missing-teeth" in codes or "sync-lost" in codes, codes
    t_drop = truth["disturbances"]["dropouts"][0]["t_start_s"]
    near = [
        f
        for f in r.crank.findings
        if f.code in ("missing-teeth", "sync-lost")
        and f.time_s is not None
        and abs(f.time_s - t_drop) < 0.05
    ]
    assert near, "the finding does not point at the dropout"


@pytest.mark.parametrize(
    "sensor,kind",
    [("vr", "weak"), ("vr", "missing"), ("hall", "missing")],
)
def test_damaged_tooth(tmp_path, sensor, kind):
    """Tooth 20 of the 60-2 wheel is damaged: weak (30 % of the flux swing) or broken off."""
    sc = engine(
        crank_sensor=vr() if sensor == "vr" else HallSensor(),
        duration_s=0.6,
        damaged=(DamagedTooth(tooth=20, kind=kind, amplitude=0.3),),
    )
    r, truth = decode(tmp_path, sc)
    check_crank(r, truth, ref_tol=0.2)
    check_cams(r, truth, tol=0.2)
    codes = finding_codes(r)
    if kind == "missing" or r.crank.missing_teeth:
        assert "missing-teeth" in codes, codes
        # one tooth per revolution, counted through, never a lost sync
        assert r.crank.missing_teeth == pytest.approx(r.crank.revolutions, abs=1)
        assert r.crank.sync_losses == 0


def test_weak_tooth_on_a_one_gap_wheel_is_seen_every_revolution(tmp_path):
    """Tooth 12 of a 36-1 wheel with 40 % of the flux swing: its own half-waves come out at
    about a quarter of its neighbours' (their flanks overlap it). Were it missed, every
    revolution would show two intervals of two pitches, the gap's and the missed tooth's, and
    no wheel could be told from them: it must arm, and the wheel is identified without hints."""
    r, truth = decode(tmp_path, weak_tooth_36_1(0.4), fmt="flac")
    check_crank(r, truth, ref_tol=0.3)
    assert r.crank.missing_teeth == 0 and r.crank.extra_teeth == 0 and r.crank.sync_losses == 0


@pytest.mark.parametrize(
    "sensor,runt,visible",
    [
        # VR, one pitch after the last tooth: it crosses zero there like a tooth would
        ("vr", Runt(amplitude=0.6), True),
        # VR, in the middle of the gap: a crossing of its own
        ("vr", Runt(offset_deg=9.0, amplitude=0.6), True),
        # Hall: a full-height narrow pulse at the first missing position, or half a pitch after
        # the last tooth
        ("hall", Runt(), True),
        ("hall", Runt(offset_deg=3.0, width_deg=1.5), True),
    ],
    ids=["vr-merged", "vr-mid-gap", "hall-first-missing-position", "hall-half-pitch-after"],
)
def test_runt_pulse_next_to_the_gap(tmp_path, sensor, runt, visible):
    """A narrow extra tooth next to the last tooth before the gap.

    A VR runt's zero crossing carries no width: one pitch after the last tooth it times exactly
    like the last tooth of a 60-1 wheel, and in the middle of the gap like the other crossing
    direction of a clean 60-2 wheel. From timing alone those cannot be told apart, so for VR the
    wheel is given, as a user who knows the engine would (without it toothcomb reports what the
    timing shows, or says it cannot decide)."""
    sc = engine(crank_sensor=vr() if sensor == "vr" else HallSensor(), duration_s=0.6, runt=runt)
    options = DecodeOptions(wheel="60-2") if sensor == "vr" else None
    r, truth = decode(tmp_path, sc, options=options)
    assert truth["disturbances"]["runt"]["leading_times_s"]
    check_crank(r, truth, ref_tol=0.2)
    check_cams(r, truth, tol=0.2)
    if visible:
        # the runt's edge is not a tooth: counted apart and reported
        assert "extra-edge" in finding_codes(r)
        assert r.crank.extra_teeth >= r.crank.revolutions
    else:
        assert r.crank.extra_teeth == 0


@pytest.mark.parametrize("sensor,extra_deg", [("hall", 4.0), ("hall", 2.0), ("vr", 2.0)])
def test_wide_tooth_before_the_gap(tmp_path, sensor, extra_deg):
    """The last tooth before the gap is wider than the others (its trailing flank reaches into
    the gap); the cam's last edge comes 4 deg CA after that tooth's nominal centre, where the
    crank angle is interpolated across the gap."""
    sc = engine(
        crank_sensor=vr() if sensor == "vr" else HallSensor(),
        duration_s=0.6,
        wide_tooth_deg=extra_deg,
    )
    r, truth = decode(tmp_path, sc)
    check_crank(r, truth, ref_tol=0.2)
    check_cams(r, truth, tol=0.3)
    assert "vr-reversed" not in finding_codes(r)
    assert r.crank.sync_losses == 0


@pytest.mark.parametrize("speed,runout", [("running", 0.4), ("cranking", 0.6)])
def test_runout_amplitude_modulation(tmp_path, speed, runout):
    """A VR crank on an eccentric wheel: the tooth amplitude swings +-40..60 % once a turn."""
    sc = engine(
        speed=CrankingSpeed(rpm=200.0, ripple=0.2)
        if speed == "cranking"
        else ConstantSpeed(rpm=1500.0, ripple=0.02),
        duration_s=2.0 if speed == "cranking" else 0.6,
        runout=runout,
    )
    r, truth = decode(tmp_path, sc)
    check_crank(r, truth, ref_tol=0.2)
    check_cams(r, truth, tol=0.2)
    assert r.crank.missing_teeth == 0 and r.crank.extra_teeth == 0


# ---------------------------------------------------------------------------------------------
# wiring


@pytest.mark.parametrize(
    "wheel,speed,instrument",
    [
        ("60-2", "running", "float"),
        ("36-1", "cranking", "soundcard"),
        ("60-2", "cranking", "scope"),
    ],
)
def test_vr_leads_reversed(tmp_path, wheel, speed, instrument):
    """VR leads swapped: detected from the gap, reported, and the angles are still right."""
    inst = {
        "float": Instrument(kind="float", sample_rate=50_000.0),
        "soundcard": Instrument(kind="soundcard", sample_rate=48_000.0, bits=16),
        "scope": Instrument(kind="scope", sample_rate=100_000.0, bits=8),
    }[instrument]
    sc = engine(
        speed=CrankingSpeed(rpm=200.0, ripple=0.25)
        if speed == "cranking"
        else ConstantSpeed(rpm=1500.0, ripple=0.02),
        wheel=wheel,
        duration_s=2.0 if speed == "cranking" else 0.6,
        crank_channel=Channel(
            name="crank",
            source="crank",
            noise_v=0.003,
            reversed=True,
            gain=0.5 if instrument == "soundcard" else 1.0,
        ),
        cam_channel=Channel(
            name="cam",
            source="cam_intake",
            noise_v=0.003,
            gain=0.15 if instrument == "soundcard" else 1.0,
        ),
        instrument=inst,
    )
    r, truth = decode(tmp_path, sc, fmt="wav" if instrument == "soundcard" else "h5")
    assert truth["crank"]["polarity"] == "reversed"
    check_crank(r, truth, ref_tol=0.3)
    check_cams(r, truth, tol=0.3)
    assert r.crank.event_direction == "rising"
    assert "vr-reversed" in [f.code for f in r.crank.findings]


def two_cams() -> tuple[Cam, ...]:
    """The intake cam and an exhaust cam with three equal teeth (output low on a tooth)."""
    return (
        Cam(name="cam_intake", pattern=TWO_WINDOWS, sensor=HallSensor()),
        Cam(
            name="cam_exhaust",
            pattern=equal_teeth(3, first_deg=100.0, width_deg=25.0),
            sensor=HallSensor(tooth_level="low"),
        ),
    )


@pytest.mark.parametrize(
    "order",
    [
        ("cam_intake", "crank"),  # crank and cam swapped
        ("cam_exhaust", "none", "cam_intake", "crank"),  # crank last, an open input between
    ],
)
def test_channels_in_unexpected_order(tmp_path, order):
    """Crank and cams on whatever inputs the user had free: found without hints."""
    cams = two_cams() if "cam_exhaust" in order else two_cams()[:1]
    chans = tuple(
        Channel(name=f"in{k}", source=s, noise_v=0.003 if s != "none" else 0.02)
        for k, s in enumerate(order)
    )
    sc = engine(cams=cams, channels=chans, duration_s=0.6)
    r, truth = decode(tmp_path, sc)
    check_crank(r, truth, ref_tol=0.1)
    check_cams(r, truth, tol=0.1)
    crank_input = f"in{order.index('crank')}"
    assert r.crank.channel == crank_input
    assert r.choices["crank"].startswith(crank_input) and "identified" in r.choices["crank"]
    assert sorted(c.channel for c in r.cams) == sorted(
        f"in{k}" for k, s in enumerate(order) if s.startswith("cam")
    )
    if "none" in order:
        idle = f"in{order.index('none')}"
        assert any(idle in f.message for f in r.all_findings), "the open input is not reported"


@pytest.mark.parametrize("dead", ["flat", "noise"])
@pytest.mark.parametrize("hinted", [False, True])
def test_dead_cam_channel(tmp_path, dead, hinted):
    """One of two cam channels carries nothing (flat) or only noise: reported, and the crank and
    the other cam still decode."""
    chans = (
        Channel(name="crank", source="crank", noise_v=0.003),
        Channel(name="intake", source="cam_intake", noise_v=0.003),
        Channel(name="exhaust", source="none", noise_v=0.0 if dead == "flat" else 0.05),
    )
    sc = engine(cams=two_cams()[:1], channels=chans, duration_s=0.6)
    options = DecodeOptions(crank="crank", cams=("intake", "exhaust")) if hinted else None
    r, truth = decode(tmp_path, sc, options=options)
    check_crank(r, truth, ref_tol=0.1)
    check_cams(r, truth, tol=0.1)
    about = [f for f in r.all_findings if "exhaust" in f.message]
    assert about, "the dead channel is not reported"
    assert {f.code for f in about} & {"cam-no-signal", "channel-unused"}
    assert dead in " ".join(f.message for f in about)


# ---------------------------------------------------------------------------------------------
# automatic identification


@pytest.mark.parametrize("sensor", ["hall", "vr"])
@pytest.mark.parametrize("wheel", ["4-1", "8-2", "12-1", "24-2", "36-1", "36-2", "60-2", "72-3"])
def test_identifies_the_wheel_without_hints(tmp_path, wheel, sensor):
    """N-M wheels from 4 to 72 positions with 1 to 3 missing, Hall and VR, crank on the second
    input: channel, sensor kind and wheel are all worked out, with the confidence shown."""
    n, m = (int(v) for v in wheel.split("-"))
    sc = engine(
        speed=ConstantSpeed(rpm=1200.0),
        wheel=wheel,
        crank_sensor=vr() if sensor == "vr" else HallSensor(),
        duration_s=0.4,
        channels=(
            Channel(name="cam", source="cam_intake", noise_v=0.003),
            Channel(name="crank", source="crank", noise_v=0.003),
        ),
        # a Hall step is timed to a fraction of a sample only through its rise, so a Hall
        # crank gets 200 kS/s (0.036 deg CA per sample at 1200 rpm)
        instrument=Instrument(
            kind="float", sample_rate=200_000.0 if sensor == "hall" else 50_000.0
        ),
    )
    r, truth = decode(tmp_path, sc)
    check_crank(r, truth, ref_tol=0.1)
    check_cams(r, truth, tol=0.1)
    assert (r.crank.positions, r.crank.missing) == (n, m)
    conf = re.search(r"confidence (\d\.\d+)", r.choices["wheel"])
    assert conf and float(conf.group(1)) >= 0.8, r.choices["wheel"]


# ---------------------------------------------------------------------------------------------
# no usable crank


def _figure(message: str) -> bool:
    return re.search(r"\d", message) is not None


@pytest.mark.parametrize("hinted", [False, True])
@pytest.mark.parametrize("what", ["flat", "noise", "few-samples"])
def test_no_usable_crank_is_exit_3_with_reason_and_figure(tmp_path, what, hinted):
    """A crank input that is flat, only noise, or sampled too coarsely for its teeth."""
    if what == "few-samples":
        # teeth per second = rpm / 60 * N: 6000 rpm on a 60-2 wheel is 6000 per second, so
        # 22.05 kHz gives 3.7 samples per tooth
        sc = engine(
            speed=ConstantSpeed(rpm=6000.0),
            duration_s=0.3,
            instrument=Instrument(kind="float", sample_rate=22_050.0),
        )
        expect = r"3\.7 samples per (crank )?tooth"
    else:
        sc = engine(
            duration_s=0.5,
            crank_channel=Channel(
                name="crank", source="none", noise_v=0.0 if what == "flat" else 0.05
            ),
        )
        expect = what
    path, _ = make_capture(tmp_path, sc, "h5")
    options = DecodeOptions(crank="crank") if hinted else None
    with pytest.raises(DecodeError) as e:
        decode_capture(str(path), options)
    msg = str(e.value)
    assert e.value.exit_code == 3
    assert re.search(expect, msg), msg
    assert "crank" in msg, msg
    assert _figure(msg.replace("crank", "")), f"no figure behind the reason: {msg}"
    assert "\n" not in msg and msg.count(". ") == 0, f"not one sentence: {msg}"


def test_local_rpm_helper_matches_the_speed_law():
    """The helper the checks above convert times to angles with: the simulator's per-tooth
    speed, here for a constant 1500 rpm (6 * rpm deg per second)."""
    sc = engine(duration_s=0.1)
    truth = simulate(sc).truth
    assert local_rpm(truth, np.array([0.05]))[0] == pytest.approx(1500.0, rel=0.021)


@pytest.mark.parametrize("reversed_leads", [False, True])
@pytest.mark.parametrize(
    "pattern",
    [((120.0, 150.0),), ((60.0, 80.0), (200.0, 220.0), (420.0, 440.0))],
    ids=["one-tooth", "three-teeth"],
)
def test_vr_cam(tmp_path, pattern, reversed_leads):
    """A VR cam sensor: events at tooth centres, found on the right crossing direction even with
    the leads reversed (reported)."""
    cams = (Cam(name="cam_intake", pattern=pattern, sensor=VrSensor(peak_v_at_200rpm=0.5)),)
    chans = (
        Channel(name="crank", source="crank", noise_v=0.003),
        Channel(name="cam", source="cam_intake", noise_v=0.003, reversed=reversed_leads),
    )
    r, truth = decode(tmp_path, engine(cams=cams, channels=chans, duration_s=1.0))
    check_crank(r, truth, ref_tol=0.1)
    # common practice, no source: a clean VR cam's tooth centre within a tenth of a degree
    check_cams(r, truth, tol=0.1)
    assert r.cams[0].sensor == "vr"
    assert {e.flank for e in r.cams[0].edges} == {"centre"}
    cam_codes = {f.code for f in r.cams[0].findings}
    assert ("vr-reversed" in cam_codes) == reversed_leads
