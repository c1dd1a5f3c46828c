"""The VCD (logic-analyzer) reader, tested on files written by pyvcd, a general-purpose VCD
library from PyPI, from simulated Hall crank and cam signals.

A logic analyzer records each edge at a time stamp in ``$timescale`` units. Here the edges are the
simulator's exact flank times rounded to the time stamp, so every check allows what that rounding
allows: half a time stamp per edge, and one sample of the rate the reader chose.
"""

from __future__ import annotations

import io
import json
import math
import tracemalloc
from pathlib import Path

import numpy as np
import pytest
import vcd as pyvcd
from toothcomb.cli.main import main
from toothcomb.decoders.analysis.identify import look_at_channel
from toothcomb.decoders.errors import CaptureError
from toothcomb.decoders.levels import measure_levels
from toothcomb.decoders.model import Edges
from toothcomb.decoders.plugins import FRONTENDS, plugin
from toothcomb.decoders.readers import open_capture
from toothcomb.decoders.readers.vcd import DEFAULT_MAX_RATE, VcdReader, choose_rate, read_header
from toothcomb.decoders.simulate import (
    Cam,
    ConstantSpeed,
    CrankWheel,
    HallSensor,
    IdleSpeed,
    Scenario,
    compute_truth,
    single_tooth,
)

try:
    from conftest import circ_diff, decodable_references, mean_angle
except ImportError:  # tests collected as a package
    from tests.conftest import circ_diff, decodable_references, mean_angle


# --------------------------------------------------------------------------- writing VCD files


def crank_60_2() -> Scenario:
    return Scenario(
        duration_s=0.5,
        speed=ConstantSpeed(rpm=1500.0),
        crank=CrankWheel(wheel="60-2", sensor=HallSensor()),
        cams=(Cam(name="cam", pattern=single_tooth(430.0, 35.0), sensor=HallSensor()),),
    )


def crank_36_1_idle() -> Scenario:
    """An open-collector crank sensor (low while a tooth passes) at a wandering idle."""
    return Scenario(
        duration_s=0.8,
        speed=IdleSpeed(rpm=800.0, walk_rpm=10.0),
        crank=CrankWheel(wheel="36-1", sensor=HallSensor(tooth_level="low")),
        cams=(Cam(name="cam", pattern=((100.0, 280.0), (400.0, 440.0)), sensor=HallSensor()),),
    )


def digital_edges(sc: Scenario, truth: dict) -> list[tuple[float, str, int]]:
    """(time, channel, new level) of every flank the simulated Hall sensors make, in time order.
    The crank teeth come from the truth's tooth table, the cam flanks from its event list."""
    te = truth["crank"]["tooth_events"]
    tooth = 1 if truth["crank"]["tooth_level"] == "high" else 0
    out = [(t, "crank", tooth) for t in te["leading_s"]]
    out += [(t, "crank", 1 - tooth) for t in te["trailing_s"]]
    out += [
        (e["time_s"], "cam", 1 if e["direction"] == "rising" else 0)
        for e in truth["cams"][0]["events"]
    ]
    return sorted(e for e in out if 0.0 < e[0] < sc.duration_s)


def write_vcd(
    path: Path, sc: Scenario, truth: dict, timescale: str, tick: float
) -> dict[str, np.ndarray]:
    """Write the scenario's Hall signals as a logic analyzer would: ``#time`` in ``tick``
    units. Returns the recorded change times (seconds) of each channel."""
    edges = digital_edges(sc, truth)
    first = {}
    for _t, ch, level in edges:
        first.setdefault(ch, level)
    recorded: dict[str, list[float]] = {"crank": [], "cam": []}
    with open(path, "w") as f, pyvcd.VCDWriter(f, timescale=timescale, date="today") as w:
        var = {
            ch: w.register_var("analyzer", ch, "wire", size=1, init=1 - first[ch])
            for ch in ("crank", "cam")
        }
        for t, ch, level in edges:
            stamp = round(t / tick)
            w.change(var[ch], stamp, level)
            recorded[ch].append(stamp * tick)
        w.flush(round(sc.duration_s / tick))
    return {ch: np.array(v) for ch, v in recorded.items()}


def decode_json(path: Path, capsys: pytest.CaptureFixture[str], *args: str) -> dict:
    assert main(["decode", str(path), "--json", "-", "--quiet", *args]) == 0
    return json.loads(capsys.readouterr().out)


# --------------------------------------------------------------------------- decoding


CASES = [
    # (scenario, timescale, one time stamp in s, the rate the reader should choose)
    pytest.param(crank_60_2, "1 us", 1e-6, 1e6, id="60-2-1us-native"),
    pytest.param(crank_36_1_idle, "10 ns", 1e-8, 1e6, id="36-1-10ns-capped"),
    pytest.param(crank_60_2, "5 us", 5e-6, 2e5, id="60-2-5us-native"),
]


@pytest.mark.parametrize(("make", "timescale", "tick", "rate"), CASES)
def test_decode_matches_the_simulator(
    make, timescale: str, tick: float, rate: float, tmp_path: Path, capsys
) -> None:
    sc = make()
    truth = compute_truth(sc, teeth=True)
    path = tmp_path / "analyzer.vcd"
    recorded = write_vcd(path, sc, truth, timescale, tick)
    out = decode_json(path, capsys)

    assert out["capture"]["sample_rate"] == pytest.approx(rate, rel=1e-9)
    assert out["capture"]["channels"] == ["crank", "cam"]
    crank = out["crank"]
    assert crank["channel"] == "crank" and crank["sensor"] == "hall"
    assert crank["wheel"] == truth["crank"]["wheel"]
    assert crank["sync_losses"] == 0

    # Reference events: each true one found, at its recorded change time within one sample
    # (the Hall front end puts a flank at the local midpoint between the samples around it)
    refs = np.array(crank["reference_times_s"])
    want = decodable_references(truth)
    assert len(want) >= 2
    rec = recorded["crank"]
    for t in want:
        i = int(np.argmin(np.abs(refs - t)))
        stamp = rec[int(np.argmin(np.abs(rec - t)))]
        assert abs(refs[i] - stamp) <= 1.0 / rate
        # and the recorded time is the true one within half a time stamp
        assert abs(stamp - t) <= tick / 2 + 1e-12

    # Cam edge angles against the truth: each edge time is off by at most half a time stamp
    # (rounding) plus one sample (the front end), at the highest engine speed
    rpm = truth["rpm"]["max"]
    tol = 6.0 * rpm * 2 * (tick / 2 + 1.0 / rate)
    cam = next(c for c in out["cams"] if c["channel"] == "cam")
    for edge in truth["cams"][0]["edges"]:
        pts = [
            e["angle_after_ref_deg"]
            for e in truth["cams"][0]["events"]
            if e["window"] == edge["window"] and e["flank"] == edge["flank"]
            and e["after_reference"]
        ]
        true_mean = mean_angle(pts)
        got = [
            e for e in cam["edges"]
            if e["direction"] == edge["direction"]
            and abs(circ_diff(e["angle_deg"]["mean"], true_mean)) < 5.0
        ]
        assert len(got) == 1, (edge, cam["edges"])
        assert abs(circ_diff(got[0]["angle_deg"]["mean"], true_mean)) <= tol


def _hall_edges(src, channel: int) -> Edges:
    """The Hall front end run over the whole channel, as a decode runs it."""
    levels = measure_levels(src)
    probe = np.concatenate([b.data[:, channel] for b in src.blocks()])
    look = look_at_channel(probe, src.info.sample_rate, levels[channel])
    assert look.kind == "hall"
    fe = plugin(FRONTENDS, "hall")(src.info.sample_rate, levels[channel], **look.frontend_options)
    parts = [fe.process(b.data[:, channel], b.start) for b in src.blocks(4096)]
    return Edges.concat([*parts, fe.finish()])


@pytest.mark.parametrize(
    ("timescale", "tick", "within"),
    [
        # on the analyzer's own grid the integrating sampler gives the change sample exactly
        # half-way, so the midpoint interpolation lands on the recorded time
        ("1 us", 1e-6, 1e-6),
        # off the grid (100 MHz time stamps sampled at 1 MHz) within one sample
        ("10 ns", 1e-8, 1.0),
    ],
)
def test_edges_come_out_at_the_recorded_change_times(
    timescale: str, tick: float, within: float, tmp_path: Path
) -> None:
    sc = crank_60_2()
    truth = compute_truth(sc, teeth=True)
    path = tmp_path / "analyzer.vcd"
    recorded = write_vcd(path, sc, truth, timescale, tick)
    with open_capture(path) as src:
        rate = src.info.sample_rate
        for k, name in enumerate(src.info.channels):
            edges = _hall_edges(src, k)
            rec = recorded[name]
            # each edge found is a recorded change (the front end may skip one right at the
            # start, before it has seen both levels), every change after the first one found
            near = np.searchsorted(rec, edges.times)
            near = np.where(
                (near > 0) & ((near == len(rec)) | (np.abs(rec[near - 1] - edges.times)
                              < np.abs(rec[np.minimum(near, len(rec) - 1)] - edges.times))),
                near - 1,
                np.minimum(near, len(rec) - 1),
            )
            assert len(np.unique(near)) == len(edges) >= len(rec) - 1
            assert near[-1] == len(rec) - 1 and near[0] <= 1
            err = np.abs(edges.times - rec[near]) * rate  # in samples
            assert float(np.max(err)) <= within


def test_blocks_do_not_depend_on_the_block_size(tmp_path: Path) -> None:
    sc = crank_36_1_idle()
    path = tmp_path / "a.vcd"
    write_vcd(path, sc, compute_truth(sc, teeth=True), "10 ns", 1e-8)
    with VcdReader.open(path) as src:
        whole = np.concatenate([b.data for b in src.blocks(1 << 20)])
        cut = np.concatenate([b.data for b in src.blocks(997)])
        assert [b.start for b in src.blocks(300_000)] == [0, 300_000, 600_000]
    assert whole.shape == (src.info.n_samples, 2)
    np.testing.assert_array_equal(whole, cut)
    # two levels, and a share of a sample only where a change falls inside it
    assert set(np.unique(whole[:, 0])) >= {0.0, 1.0}
    assert np.all((whole >= 0.0) & (whole <= 1.0))


# --------------------------------------------------------------------------- reading values


def test_vectors_reals_undefined_values_and_scopes(tmp_path: Path) -> None:
    path = tmp_path / "mixed.vcd"
    with open(path, "w") as f, pyvcd.VCDWriter(f, timescale="1 us") as w:
        d0 = w.register_var("la", "D0", "wire", size=1, init="x")
        d0b = w.register_var("la.sub", "D0", "wire", size=1, init=1)
        bus = w.register_var("la", "bus", "reg", size=4, init=0)
        volts = w.register_var("la", "volts", "real", init=1.5)
        w.change(d0, 10, 1)
        w.change(bus, 10, 0b1010)
        w.change(d0, 20, "x")  # undefined: keeps 1
        w.change(d0b, 20, 0)
        w.change(bus, 30, "1x10")  # undefined bit: keeps 10
        w.change(volts, 30, 2.5)
        w.change(d0, 40, "z")  # undefined: keeps 1
        w.change(d0, 50, 0)
        w.flush(60)
    with VcdReader.open(path) as src:
        info = src.info
        data = np.concatenate([b.data for b in src.blocks()])
    # pyvcd declares the variables scope by scope; the two D0 get their scope paths
    assert info.channels == ("la.D0", "bus", "volts", "la.sub.D0")
    assert info.sample_rate == 1e5  # time stamps 10 us apart
    assert info.n_samples == 7
    assert info.full_scale[0] == 1.0 and info.full_scale[1] == 15.0
    assert math.isnan(info.full_scale[2]) and info.full_scale[3] == 1.0
    assert any("la.D0 had no value at the start" in n for n in info.notes)
    assert any("3 undefined value(s)" in n for n in info.notes)
    # samples at 0, 10, ..., 60 us; a change on a sample gives it the half-way value
    np.testing.assert_array_equal(data[:, 0], [0, 0.5, 1, 1, 1, 0.5, 0])
    np.testing.assert_array_equal(data[:, 1], [0, 5, 10, 10, 10, 10, 10])
    np.testing.assert_array_equal(data[:, 2], [1.5, 1.5, 1.5, 2, 2.5, 2.5, 2.5])
    np.testing.assert_array_equal(data[:, 3], [1, 1, 0.5, 0, 0, 0, 0])


def test_header_forms_written_by_other_tools(tmp_path: Path) -> None:
    # $timescale over several lines, no space before the unit, a comment, a bit range, $dumpall
    text = (
        "$comment written by hand $end\n$version some tool 1.0 $end\n$timescale\n  1us\n$end\n"
        "$scope module top $end\n$var wire 1 ! D0 $end\n$var wire 8 \" data [7:0] $end\n"
        "$upscope $end\n$enddefinitions $end\n#0\n$dumpvars\n1!\nb0 \"\n$end\n"
        "#5 0! b11111111 \"\n#10\n$dumpall 0! b11111111 \" $end\n$comment a note $end\n#20\n"
    )
    path = tmp_path / "hand.vcd"
    path.write_text(text)
    h = read_header(path)
    assert h.tick_s == 1e-6 and h.timescale == "1 us"
    assert h.version == "some tool 1.0"
    assert [(v.path, v.size) for v in h.variables] == [("top.D0", 1), ("top.data[7:0]", 8)]
    with open_capture(path) as src:
        assert src.info.format == "vcd"
        assert src.info.sample_rate == 2e5  # time stamps 5 us apart
        data = np.concatenate([b.data for b in src.blocks()])
    np.testing.assert_array_equal(data[:, 0], [1, 0.5, 0, 0, 0])
    np.testing.assert_array_equal(data[:, 1], [0, 127.5, 255, 255, 255])


def test_rate_choice(tmp_path: Path) -> None:
    # the analyzer's own step: the greatest common divisor of the time stamps
    assert choose_rate(1e-6, 4)[:2] == (250_000.0, 4)
    # above the limit: a whole multiple of the step, at or below the limit
    rate, interval, how = choose_rate(1e-9, 1)
    assert (rate, interval) == (DEFAULT_MAX_RATE, 1000) and "1000 steps" in how
    rate, interval, _ = choose_rate(1e-9, 3, max_rate=2e6)
    assert interval == 501 and rate == pytest.approx(1e9 / 501)
    # a rate given overrides, with a note, and sets the sample count
    path = tmp_path / "r.vcd"
    path.write_text(
        "$timescale 1 us $end $var wire 1 ! a $end $enddefinitions $end\n#0 0!\n#3 1!\n#9 0!\n#12\n"
    )
    with VcdReader.open(path) as src:
        assert src.info.sample_rate == pytest.approx(1e6 / 3)
    with VcdReader.open(path, sample_rate=2e6) as src:
        assert src.info.n_samples == 25 and src.info.sample_rate == 2e6
        assert any("given" in n for n in src.info.notes)
        x = next(src.blocks()).data[:, 0]
    # samples every 0.5 us: high from 3 us (sample 6, half-way) to 9 us (sample 18, half-way)
    assert x[5] == 0 and x[6] == 0.5 and x[7] == 1 and x[17] == 1 and x[18] == 0.5 and x[19] == 0
    with VcdReader.open(path, max_rate=1e5) as src:  # 333 kHz native, limited to 100 kHz
        assert src.info.sample_rate == pytest.approx(1e6 / 12)


def test_found_by_content_whatever_the_suffix(tmp_path: Path) -> None:
    path = tmp_path / "export.txt"
    path.write_text("$date today $end\n$timescale 1 us $end\n$var wire 1 ! D0 $end\n"
                    "$enddefinitions $end\n#0\n0!\n#5\n1!\n#10\n")
    with open_capture(path) as src:
        assert src.info.format == "vcd"
    csv = tmp_path / "scope.csv"
    csv.write_text("time,crank\n0,0\n0.001,1\n0.002,0\n")
    assert not VcdReader.detect(csv)
    assert VcdReader.detect(path)


def test_memory_stays_bounded_on_a_long_file(tmp_path: Path) -> None:
    path = tmp_path / "long.vcd"
    with open(path, "w") as f, pyvcd.VCDWriter(f, timescale="1 us") as w:
        a = w.register_var("la", "a", "wire", size=1, init=0)
        b = w.register_var("la", "b", "wire", size=1, init=0)
        w.change(b, 1, 1)  # one change 1 us in: the analyzer's step is 1 us
        for k in range(1, 8001):  # 4 s of 1 kHz square waves: 4 million samples per channel
            w.change(a, k * 500, k % 2)
            if k % 4 == 0:
                w.change(b, k * 500, (k // 4) % 2)
    with VcdReader.open(path) as src:
        assert src.info.n_samples == 4_000_001
        tracemalloc.start()
        try:
            total = highs = 0.0
            for block in src.blocks():
                total += block.data.shape[0]
                highs += float(block.data[:, 0].sum())
            peak = tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()
    assert total == 4_000_001
    assert highs == pytest.approx(2_000_000, abs=1)  # high half the time
    # holding the samples would take 64 MB; a few stretches of 65536 samples take ~1 MB each
    assert peak < 16 * 2**20


# --------------------------------------------------------------------------- malformed files

HEAD = "$timescale 1 us $end\n$scope module la $end\n$var wire 1 ! D0 $end\n$upscope $end\n"
DEFS = HEAD + "$enddefinitions $end\n"

MALFORMED = [
    pytest.param(
        "$scope module la $end\n$var wire 1 ! D0 $end\n$upscope $end\n$enddefinitions $end\n"
        "#0\n0!\n#5\n1!\n",
        "has no $timescale",
        id="no-timescale",
    ),
    pytest.param(
        "$timescale 1 us $end\n$enddefinitions $end\n#0\n#5\n", "declares no signal", id="no-vars"
    ),
    pytest.param(DEFS + "#0\n0!\n#5\n1%\n", "names identifier '%', which no $var", id="unknown-id"),
    pytest.param(
        DEFS + "#0\n0!\n#50\n1!\n#40\n0!\n", "time #40 comes after #50", id="back-in-time"
    ),
    pytest.param(DEFS + "#0\n$dumpvars\n0!\n", "inside $dumpvars", id="truncated-dumpvars"),
    pytest.param(DEFS + "#0\n0!\n#5\nb101", "before its identifier", id="truncated-value"),
    pytest.param(HEAD + "$comment cut here", "ends inside $comment", id="truncated-header"),
    pytest.param(HEAD, "the header never ends", id="no-enddefinitions"),
    pytest.param(DEFS + "#0\n0!\n#5\n7!\n", "neither a time stamp", id="bad-value"),
    pytest.param("$timescale 3 furlongs $end\n" + DEFS, "not a number and a unit", id="bad-unit"),
    pytest.param(DEFS + "#0\n0!\n", "single time stamp", id="no-time-span"),
    pytest.param(DEFS, "holds no time stamp", id="no-values"),
]


@pytest.mark.parametrize(("text", "words"), MALFORMED)
def test_malformed_files_are_refused_in_one_sentence(
    text: str, words: str, tmp_path: Path, capsys
) -> None:
    path = tmp_path / "bad.vcd"
    path.write_text(text)
    with pytest.raises(CaptureError) as e:
        VcdReader.open(path)
    assert words in str(e.value) and str(path) in str(e.value)
    assert e.value.exit_code == 2
    assert main(["decode", str(path), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and words in err


def test_empty_and_missing_files(tmp_path: Path) -> None:
    with pytest.raises(CaptureError, match="does not exist"):
        VcdReader.open(tmp_path / "none.vcd")
    (tmp_path / "empty.vcd").write_text("")
    with pytest.raises(CaptureError, match="is empty"):
        VcdReader.open(tmp_path / "empty.vcd")
    assert not VcdReader.detect(tmp_path / "empty.vcd")
    assert not VcdReader.detect(tmp_path / "none.vcd")
    buf = io.StringIO()
    assert buf.getvalue() == ""
