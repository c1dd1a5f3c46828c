"""The scope CSV/TXT reader: dialects, headers, time columns, rates and the errors it reports."""

from __future__ import annotations

import io
import re
from pathlib import Path

import numpy as np
import pytest
from toothcomb.decoders.errors import CaptureError
from toothcomb.decoders.readers import open_capture, scopecsv
from toothcomb.decoders.readers.base import RegularClock

RNG = np.random.default_rng(7)


def _read(path: Path, block_size: int = 1000, **kw: object) -> tuple[object, np.ndarray]:
    with open_capture(path, **kw) as src:
        data = np.concatenate([b.data for b in src.blocks(block_size)])
        return src.info, data


def _write(tmp_path: Path, name: str, text: str, newline: str = "\n") -> Path:
    path = tmp_path / name
    path.write_bytes(text.replace("\n", newline).encode("utf-8"))
    return path


def _table(n: int, rate: float, t0: float = 0.0, cols: int = 2, fmt: str = "{:.9f}") -> tuple:
    """Rows of text (time, values...) and the values as Python parses their text."""
    values = RNG.normal(0.0, 2.0, size=(n, cols))
    texts = [
        [fmt.format(t0 + i / rate)] + [f"{v:.6g}" for v in row] for i, row in enumerate(values)
    ]
    parsed = np.array([[float(v) for v in row[1:]] for row in texts])
    return texts, parsed


# ----------------------------------------------------------------------------- dialects


@pytest.mark.parametrize("newline", ["\n", "\r\n"])
def test_comma_point_with_header_units_and_negative_t0(tmp_path: Path, newline: str) -> None:
    rows, values = _table(500, 20000.0, t0=-0.005)
    text = "Time (s),CRK (V),CAM [mV]\n" + "\n".join(",".join(r) for r in rows) + "\n"
    info, data = _read(_write(tmp_path, "scope.csv", text, newline), block_size=77)
    assert info.sample_rate == 20000.0
    assert info.t0 == pytest.approx(-0.005, abs=1e-12)
    assert info.n_samples == 500
    assert info.channels == ("CRK", "CAM")
    assert info.units == ("V", "mV")
    assert info.format == "csv"
    assert np.array_equal(data, values)


def test_semicolon_decimal_comma_with_metadata_preamble(tmp_path: Path) -> None:
    rows, values = _table(300, 1000.0, t0=0.25, fmt="{:.6f}")
    body = "\n".join(";".join(c.replace(".", ",") for c in r) for r in rows)
    text = (
        "Instrument;bench logger\n"
        "Record length;300\n"
        "Sample rate;1000 Hz\n"
        "\n"
        "Time (s);Crank (V);Cam (V)\n" + body + "\n"
    )
    info, data = _read(_write(tmp_path, "export.csv", text))
    assert info.sample_rate == 1000.0
    assert info.t0 == 0.25
    assert info.channels == ("Crank", "Cam")
    assert info.units == ("V", "V")
    assert np.array_equal(data, values)
    assert any("semicolon" in n and "decimal comma" in n for n in info.notes)


def test_tab_delimited_decimal_comma(tmp_path: Path) -> None:
    text = "t\tA\tB\n0,000\t1,5\t-2,25\n0,001\t1,75\t-2,5\n0,002\t2\t-2,75\n"
    info, data = _read(_write(tmp_path, "tab.txt", text))
    assert info.sample_rate == 1000.0
    assert data.tolist() == [[1.5, -2.25], [1.75, -2.5], [2.0, -2.75]]


def test_space_aligned_columns_with_free_text_and_comments(tmp_path: Path) -> None:
    text = (
        "Capture of the crank and cam sensors\n"
        "taken with the probe on pin 3\n"
        "# comment with a hash\n"
        "% comment with a percent sign\n"
        "// comment with slashes\n"
        "; comment with a semicolon\n"
        "   0.0000    1.0e-3    4.75\n"
        "   0.0005   -2.5e-3    4.80\n"
        "   0.0010    3.0e-3    0.10\n"
        "   0.0015    0.0       0.12\n"
    )
    info, data = _read(_write(tmp_path, "aligned.txt", text))
    assert info.sample_rate == 2000.0  # the first column rises by 0.5 ms: a time column
    assert info.channels == ("ch0", "ch1")
    assert data.tolist() == [[1e-3, 4.75], [-2.5e-3, 4.8], [3e-3, 0.1], [0.0, 0.12]]
    assert any("line 7" in n for n in info.notes)


def test_comments_and_blank_lines_among_the_numbers(tmp_path: Path) -> None:
    text = "time,a\n0.00,1\n# trigger re-armed\n0.01,2\n\n0.02,3\n% end\n"
    info, data = _read(_write(tmp_path, "c.csv", text))
    assert info.n_samples == 3
    assert data[:, 0].tolist() == [1.0, 2.0, 3.0]
    assert info.sample_rate == 100.0


def test_quoted_fields_trailing_delimiter_bom_and_micro_sign(tmp_path: Path) -> None:
    text = '\ufeff"Time (µs)","Signal (V)",\n"0","0.5",\n"20","0.25",\n"40","0.125",\n'
    info, data = _read(_write(tmp_path, "q.csv", text))
    assert info.sample_rate == 50000.0  # 20 us steps
    assert info.channels == ("Signal",)
    assert info.units == ("V",)
    assert data[:, 0].tolist() == [0.5, 0.25, 0.125]


def test_unnamed_columns_and_duplicate_names(tmp_path: Path) -> None:
    text = "time_s,,crank,crank\n0,1,2,3\n0.5,4,5,6\n1.0,7,8,9\n"
    info, data = _read(_write(tmp_path, "u.csv", text))
    assert info.channels == ("ch0", "crank", "crank_2")
    assert data.tolist() == [[1, 2, 3], [4, 5, 6], [7, 8, 9]]


def test_units_row_below_the_names_and_units_line(tmp_path: Path) -> None:
    a = "Time,CH1,CH2\n(s),(V),(mV)\n0,1,2\n1,2,3\n2,3,4\n"
    info, _ = _read(_write(tmp_path, "a.csv", a))
    assert info.channels == ("CH1", "CH2") and info.units == ("V", "mV")
    b = "# units: V,A\ntime,a,b\n0,1,2\n1,2,3\n2,3,4\n"
    info, _ = _read(_write(tmp_path, "b.csv", b))
    assert info.channels == ("a", "b") and info.units == ("V", "A")


def test_sample_index_column_is_not_a_channel(tmp_path: Path) -> None:
    text = "0,1.5,2\n1,1.25,3\n2,1.5,4\n3,1.5,3\n"
    info, data = _read(_write(tmp_path, "i.csv", text), sample_rate=100)
    assert info.channels == ("ch0", "ch1")
    assert data.tolist() == [[1.5, 2], [1.25, 3], [1.5, 4], [1.5, 3]]
    assert any("counts samples" in n for n in info.notes)


# --------------------------------------------------------------------------------- rates


def test_time_column_in_milliseconds(tmp_path: Path) -> None:
    text = "Time (ms),ch\n-1.0,0\n-0.5,0\n0.0,1\n0.5,1\n"
    info, _ = _read(_write(tmp_path, "ms.csv", text))
    assert info.sample_rate == 2000.0
    assert info.t0 == -0.001


@pytest.mark.parametrize(
    "line,rate",
    [
        ("Sample rate: 48000 Hz", 48000.0),
        ("sampling rate = 48 kHz", 48000.0),
        ("# fs: 2.5 MS/s", 2.5e6),
        ("SampleRate,1000", 1000.0),
        ("% Sample interval: 20 us", 50000.0),
        ("dt = 2e-5 s", 50000.0),
        ("sample_period\t0.5 ms", 2000.0),
        ("Sample Rate (kHz),25", 25000.0),
        ("dt [us] = 40", 25000.0),
    ],
)
def test_metadata_line_gives_the_rate(tmp_path: Path, line: str, rate: float) -> None:
    text = f"{line}\ncrank,cam\n0.5,4.5\n0.6,4.4\n0.5,4.5\n"
    info, data = _read(_write(tmp_path, "m.csv", text))
    assert info.sample_rate == rate
    assert info.channels == ("crank", "cam")
    assert data.shape == (3, 2)


def test_rising_first_column_disagreeing_with_the_rate_line_is_a_channel(tmp_path: Path) -> None:
    text = "% fs = 48 kHz\n1.0,2.0\n3.0,4.0\n5.0,6.0\n"
    info, data = _read(_write(tmp_path, "ramp.csv", text))
    assert info.sample_rate == 48000.0
    assert info.channels == ("ch0", "ch1")
    assert data[:, 0].tolist() == [1.0, 3.0, 5.0]


def test_sample_rate_argument_overrides_the_time_column(tmp_path: Path) -> None:
    text = "time,a\n0.0,1\n0.1,2\n0.2,3\n"
    info, _ = _read(_write(tmp_path, "t.csv", text), sample_rate=500)
    assert info.sample_rate == 500.0
    assert any("time column 'time' ignored" in n for n in info.notes)
    assert info.channels == ("a",)


def test_no_rate_anywhere_asks_for_sample_rate(tmp_path: Path) -> None:
    path = _write(tmp_path, "n.csv", "crank,cam\n0.5,4.5\n0.7,4.5\n0.5,0.2\n")
    with pytest.raises(CaptureError, match="pass --sample-rate"):
        open_capture(path)
    info, _ = _read(path, sample_rate=25000)
    assert info.sample_rate == 25000.0 and info.t0 == 0.0


@pytest.mark.parametrize("decimals", [9, 7, 6])
def test_rounded_time_stamps_are_not_irregular(tmp_path: Path, decimals: int) -> None:
    rows, values = _table(3000, 48000.0, fmt=f"{{:.{decimals}f}}")
    text = "time,x,y\n" + "\n".join(",".join(r) for r in rows) + "\n"
    info, data = _read(_write(tmp_path, "r.csv", text))
    assert info.sample_rate == 48000.0
    assert np.array_equal(data, values)


def test_scientific_stamps_with_a_long_capture(tmp_path: Path) -> None:
    # %.6e keeps 7 significant digits: 5e-2 s is printed to 1e-8 s, far below 1/48000 s
    rows, _ = _table(2400, 48000.0, fmt="{:.6e}")
    text = "t,v,w\n" + "\n".join(",".join(r) for r in rows) + "\n"
    info, _ = _read(_write(tmp_path, "e.csv", text))
    assert info.sample_rate == 48000.0


# -------------------------------------------------------------------------------- errors


def _irregular(tmp_path: Path, times: np.ndarray) -> str:
    text = "time,a\n" + "".join(f"{t:.9f},{k % 7}\n" for k, t in enumerate(times))
    path = _write(tmp_path, "irr.csv", text)
    with pytest.raises(CaptureError) as err:
        open_capture(path)
    msg = str(err.value)
    assert "resample the capture to a fixed interval" in msg
    assert "--sample-rate to ignore the time column" in msg
    return msg


def test_a_gap_is_irregular(tmp_path: Path) -> None:
    t = np.delete(np.arange(200) / 48000, 120)  # row 120 missing: one step of 2/48000
    msg = _irregular(tmp_path, t)
    # data row 120 (0-based) follows the header on line 1: line 122
    assert "irregular at line 122" in msg
    # the steps between the stamps as printed with 9 decimals: 0.00004166x and 0.00002083x
    assert re.search(r"a step of 4\.166\d*e-05 s where the others are 2\.083\d*e-05 s", msg)


def test_a_repeated_stamp_is_irregular(tmp_path: Path) -> None:
    t = np.arange(100) / 10000
    t[60] = t[59]
    msg = _irregular(tmp_path, t)
    assert "irregular at line 62" in msg and "a step of 0 s" in msg


def test_a_jittery_clock_is_irregular(tmp_path: Path) -> None:
    steps = 1e-4 * (1 + RNG.uniform(-0.03, 0.03, size=300))
    msg = _irregular(tmp_path, np.concatenate([[0.0], np.cumsum(steps)]))
    m = re.search(r"irregular at line (\d+) .* a step of (\S+) s where the others are (\S+) s", msg)
    assert m is not None
    step, interval = float(m.group(2)), float(m.group(3))
    assert abs(step / interval - 1) > 0.01
    assert abs(interval / 1e-4 - 1) < 0.01  # the median step of a +-3 % jitter around 0.1 ms
    row = int(m.group(1)) - 2  # the step ending on that line, 0-based after the header line
    assert abs(steps[row - 1] / interval - 1) > 0.01
    assert all(abs(s / interval - 1) <= 0.01 + 1e-9 / interval for s in steps[: row - 1])


def test_time_going_backwards(tmp_path: Path) -> None:
    path = _write(tmp_path, "b.csv", "time,a\n0.3,1\n0.2,1\n0.1,1\n")
    with pytest.raises(CaptureError, match="does not increase"):
        open_capture(path)


def test_wrong_number_of_fields(tmp_path: Path) -> None:
    path = _write(tmp_path, "m.csv", "time,a,b\n0,1,2\n0.1,1,2\n0.2,1\n0.3,1,2\n")
    with pytest.raises(CaptureError) as err:
        open_capture(path)
    assert str(err.value) == (
        f"{path}: line 4 has 2 values where the rows above have 3 ('0.2,1'); "
        "fix or delete that line"
    )


def test_text_in_a_row(tmp_path: Path) -> None:
    path = _write(tmp_path, "t.csv", "time,a,b\n0,1,2\n0.1,1,overload\n0.2,1,2\n")
    with pytest.raises(CaptureError, match=r"line 3 holds 'overload', which is not a number"):
        open_capture(path)


@pytest.mark.parametrize("tail", ["0.3,1", "0.3,1,", "0.3,1,2e", "0.3,1,-"])
def test_last_line_cut_short(tmp_path: Path, tail: str) -> None:
    path = _write(tmp_path, "cut.csv", "time,a,b\n0,1,2\n0.1,1,2\n0.2,1,2\n" + tail)
    with pytest.raises(CaptureError, match=r"the file looks truncated at line 5"):
        open_capture(path)


@pytest.mark.parametrize(
    "text,fragment",
    [
        ("", "is empty"),
        ("   \n\n  \n", "found no rows of numbers"),
        ("time,a,b\n", "found no rows of numbers"),
        ("just some notes\nabout nothing\n", "found no rows of numbers"),
        ("time\n0\n1\n2\n", "only a time column"),
        ("time,a\n0.5,1\n", "single row"),
    ],
)
def test_files_without_usable_rows(tmp_path: Path, text: str, fragment: str) -> None:
    path = _write(tmp_path, "e.csv", text)
    with pytest.raises(CaptureError, match=fragment):
        open_capture(path, reader="csv")


def test_utf16_is_refused_with_advice(tmp_path: Path) -> None:
    path = tmp_path / "w.csv"
    path.write_bytes("time,a\n0,1\n1,2\n".encode("utf-16"))
    with pytest.raises(CaptureError, match="UTF-16"):
        open_capture(path, reader="csv")


# ------------------------------------------------------------------ chunking and streaming


def test_chunk_boundaries_do_not_change_values_or_line_numbers(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    rows, values = _table(2000, 10000.0)
    text = "time,a,b\n" + "\n".join(",".join(r) for r in rows) + "\n"
    path = _write(tmp_path, "long.csv", text)
    whole_info, whole = _read(path)
    monkeypatch.setattr(scopecsv, "CHUNK_BYTES", 997)  # many small chunks, cut mid-line
    info, data = _read(path, block_size=313)
    assert info == whole_info
    assert np.array_equal(data, whole) and np.array_equal(data, values)
    bad = text.splitlines()
    bad[1500] = "0.1499,1"  # line 1501
    _write(tmp_path, "long.csv", "\n".join(bad) + "\n")
    with pytest.raises(CaptureError, match="line 1501 has 2 values"):
        open_capture(path)
    t = np.delete(np.arange(2000) / 10000, 1700)
    gap = "time,a\n" + "".join(f"{x:.9f},1\n" for x in t)
    _write(tmp_path, "long.csv", gap)
    with pytest.raises(CaptureError, match="irregular at line 1702"):
        open_capture(path)


def test_regular_clock_directly() -> None:
    clock = RegularClock(resolution=1e-9)
    t = np.arange(10_000) / 48000 + 3.0
    for piece in np.array_split(t, 7):
        clock.feed(np.round(piece, 9))
    fit = clock.finish()
    assert fit.sample_rate == 48000.0 and fit.t0 == 3.0 and fit.n == 10_000


def test_units_line_for_time_and_all_channels(tmp_path: Path) -> None:
    """'units: s, V' over a time column and three channels: the time in s, every channel in V."""
    text = "# units: s, V\ntime_s,A,B,C\n" + "".join(
        f"{k * 1e-5:.9f},0.1,0.2,0.3\n" for k in range(50)
    )
    info, data = _read(_write(tmp_path, "u.csv", text))
    assert info.units == ("V", "V", "V")
    assert data.shape == (50, 3)


# ----------------------------------------------------------------------------- the spool


def _long_csv(tmp_path: Path, n: int = 40_000) -> tuple[Path, np.ndarray]:
    rows, values = _table(n, 50_000.0)
    text = "Time (s),CRK (V),CAM (V)\n" + "\n".join(",".join(r) for r in rows) + "\n"
    return _write(tmp_path, "long.csv", text), values


def test_the_checking_pass_reads_the_faster_way_and_the_same_numbers(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A long file has its first plain chunks, then one in RACE_EVERY, read both ways (the
    vectorised readers and numpy's parser) and timed, and the way that took less reads the
    others. The choice must follow the times, and either way the values must be the ones
    numpy's own text loader reads, to the last bit."""
    monkeypatch.setattr(scopecsv, "CHUNK_BYTES", 4 * 1024)  # about 240 chunks
    monkeypatch.setattr(scopecsv, "_arrow_modules", lambda: None)  # numpy's parser, not pyarrow
    path, _ = _long_csv(tmp_path)
    # source: numpy.loadtxt reads the same text (header line skipped, time column dropped)
    want = np.loadtxt(path, delimiter=",", skiprows=1, usecols=(1, 2))
    plain_reads, numpy_reads = [], []
    read_plain, parse_columns = scopecsv._read_plain, scopecsv._parse_columns
    monkeypatch.setattr(
        scopecsv, "_read_plain", lambda *a: plain_reads.append(1) or read_plain(*a)
    )
    monkeypatch.setattr(
        scopecsv, "_parse_columns", lambda *a, **k: numpy_reads.append(1) or parse_columns(*a, **k)
    )
    for numpy_faster in (False, True):
        made: list[scopecsv._ChunkScanner] = []
        # a timer by which each race takes 1 s the slower way and 0.5 s the faster
        calls = iter(range(10**6))
        slow, fast = (1.0, 0.5) if numpy_faster else (0.5, 1.0)

        def clock(calls=calls, slow=slow, fast=fast) -> float:
            k = next(calls)
            return (k // 3) * 10.0 + (0.0, slow, slow + fast)[k % 3]

        base = scopecsv._ChunkScanner

        class Timed(base):  # type: ignore[valid-type, misc]
            def __init__(self, layout, shown, race, clock=clock, made=made) -> None:
                super().__init__(layout, shown, race, clock)
                made.append(self)

        monkeypatch.setattr(scopecsv, "_ChunkScanner", Timed)
        plain_reads.clear()
        numpy_reads.clear()
        with open_capture(path) as src:
            got = np.concatenate([b.data for b in src.blocks(4096)])
        monkeypatch.setattr(scopecsv, "_ChunkScanner", base)
        scanner = made[0]
        chunks = -(-path.stat().st_size // (4 * 1024))
        assert scanner.vectorised is not numpy_faster
        # the first three chunks and about one in RACE_EVERY after them were raced
        every = scopecsv.RACE_EVERY
        assert scopecsv.RACE_CHUNKS + 2 <= scanner.raced <= scopecsv.RACE_CHUNKS + chunks // every
        other = numpy_reads if not numpy_faster else plain_reads
        assert len(other) == scanner.raced  # the slower way read only the raced chunks
        assert len(plain_reads) + len(numpy_reads) >= chunks + scanner.raced - 1
        np.testing.assert_array_equal(got, want)
        assert got.tobytes() == want.tobytes()


def _long_dialect(kind: str, n: int = 6000) -> tuple[str, np.ndarray]:
    """A long capture's text in one of several dialects, and its channel values as Python
    parses their text."""
    rows, values = _table(n, 50_000.0)
    if kind == "comma":
        return "Time (s),CRK (V),CAM (V)\n" + "".join(",".join(r) + "\n" for r in rows), values
    if kind == "crlf":
        return "time,a,b\r\n" + "".join(",".join(r) + "\r\n" for r in rows), values
    if kind == "semicolon, decimal comma":
        body = "".join(";".join(c.replace(".", ",") for c in r) + "\n" for r in rows)
        return "Sample rate;50000 Hz\n\nTime (s);Crank (V);Cam (V)\n" + body, values
    if kind == "quoted, trailing delimiter":
        body = "".join(",".join(f'"{c}"' for c in r) + ",\n" for r in rows)
        return '"Time (s)","A (V)","B (V)",\n' + body, values
    if kind == "tab, blank lines":
        ends = ["\n\n" if i % 500 == 7 else "\n" for i in range(n)]
        body = "".join("\t".join(r) + end for r, end in zip(rows, ends, strict=True))
        return "t\tA\tB\n" + body, values
    if kind == "sample index":
        body = "".join(f"{i}," + ",".join(r[1:]) + "\n" for i, r in enumerate(rows))
        return body, values
    raise ValueError(kind)


def _open_both_ways(
    path: Path, monkeypatch: pytest.MonkeyPatch, **kw: object
) -> tuple[tuple[object, np.ndarray] | str, tuple[object, np.ndarray] | str, int]:
    """What opening ``path`` gives (info and data, or the error's words) with pyarrow's reader
    and with numpy's parser alone, and how many times numpy's parser read it in the first."""
    numpy_rows = scopecsv._numpy_rows
    used: list[int] = []
    monkeypatch.setattr(
        scopecsv, "_numpy_rows", lambda *a: used.append(1) or numpy_rows(*a)
    )
    out = []
    for arrow in (True, False):
        if not arrow:
            monkeypatch.setattr(scopecsv, "_arrow_modules", lambda: None)
        try:
            out.append(_read(path, block_size=777, **kw))
        except CaptureError as exc:
            out.append(str(exc))
    monkeypatch.undo()
    return out[0], out[1], len(used) - 1  # the second open always used numpy's parser


@pytest.mark.parametrize(
    "kind",
    ["comma", "crlf", "semicolon, decimal comma", "quoted, trailing delimiter",
     "tab, blank lines", "sample index"],
)
def test_a_long_csv_read_by_pyarrow_is_what_numpy_reads(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, kind: str
) -> None:
    """A long file (over RACE_ABOVE chunks) is read by pyarrow's CSV reader when it is
    installed: the capture it describes must be the one numpy's parser reads, to the last bit,
    in every dialect the reader handles."""
    pytest.importorskip("pyarrow")
    monkeypatch.setattr(scopecsv, "CHUNK_BYTES", 4 * 1024)
    text, values = _long_dialect(kind)
    path = _write(tmp_path, "long.csv", text)
    kw = {"sample_rate": 50_000.0} if kind == "sample index" else {}
    by_arrow, by_numpy, numpy_reads = _open_both_ways(path, monkeypatch, **kw)
    assert numpy_reads == 0  # pyarrow's reader read it all
    assert not isinstance(by_arrow, str) and not isinstance(by_numpy, str)
    assert by_arrow[0] == by_numpy[0]
    assert by_arrow[1].tobytes() == by_numpy[1].tobytes()
    # source: Python's float() of each text (correctly rounded, as numpy's loader is)
    np.testing.assert_array_equal(by_arrow[1], values)
    assert by_arrow[0].sample_rate == 50_000.0 and by_arrow[0].n_samples == len(values)


@pytest.mark.parametrize(
    "kind,line",
    [
        ("a comment among the numbers", "# trigger re-armed"),
        ("text in a row", "{t},1.5,overload"),
        ("a field missing", "{t},1.5"),
        ("a field too many", "{t},1.5,2,3"),
        ("an empty field", "{t},,2"),
        ("not a number", "{t},nan,2"),
        ("spaces around a number", "{t}, 1.5 ,2"),
        ("a stamp out of step", "{late},1.5,2"),
    ],
)
def test_pyarrow_leaves_to_numpy_what_numpy_must_judge(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, kind: str, line: str
) -> None:
    """Whatever pyarrow's reader would read otherwise than numpy's parser, or not at all, is
    left to numpy's parser: the file must give exactly what it gives without pyarrow, the
    same capture or the same error naming the same line."""
    pytest.importorskip("pyarrow")
    monkeypatch.setattr(scopecsv, "CHUNK_BYTES", 4 * 1024)
    rows, _ = _table(6000, 50_000.0)
    lines = [",".join(r) for r in rows]
    k = 4321
    lines[k] = line.format(t=rows[k][0], late=f"{(k + 0.5) / 50_000.0:.9f}")
    path = _write(tmp_path, "odd.csv", "time,a,b\n" + "\n".join(lines) + "\n")
    by_arrow, by_numpy, numpy_reads = _open_both_ways(path, monkeypatch)
    if isinstance(by_numpy, str):
        assert by_arrow == by_numpy
        assert f"line {k + 2}" in by_numpy or "comment" in kind
    else:
        assert not isinstance(by_arrow, str)
        assert by_arrow[0] == by_numpy[0] and by_arrow[1].tobytes() == by_numpy[1].tobytes()
    if kind in ("a stamp out of step", "spaces around a number"):
        # read by pyarrow's reader to the end (the stamp's error is the time column's, the
        # spaces both readers pass over)
        assert numpy_reads == 0
    else:
        assert numpy_reads == 1  # pyarrow's reader declined the file; numpy's parser read it


def test_without_pyarrow_a_long_csv_is_read_by_numpy(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Without pyarrow (it is an optional extra) a long file is read by numpy's parser."""
    import builtins

    monkeypatch.setattr(scopecsv, "CHUNK_BYTES", 4 * 1024)
    real_import = builtins.__import__

    def no_pyarrow(name: str, *a: object, **k: object) -> object:
        if name.startswith("pyarrow"):
            raise ImportError(name)
        return real_import(name, *a, **k)

    monkeypatch.setattr(builtins, "__import__", no_pyarrow)
    assert scopecsv._arrow_modules() is None
    text, values = _long_dialect("comma")
    info, data = _read(_write(tmp_path, "long.csv", text))
    np.testing.assert_array_equal(data, values)
    assert info.n_samples == len(values)


def test_the_spool_gives_what_the_text_says(tmp_path: Path, monkeypatch) -> None:
    """The values parsed once at open are read back from the spool: blocks and windows anywhere
    must be the numbers numpy's own text loader reads, and dropping the spool (no room in the
    temporary folder, at once or halfway) must change nothing but the speed."""
    monkeypatch.setattr(scopecsv, "CHUNK_BYTES", 64 * 1024)  # many chunks
    monkeypatch.setattr(scopecsv, "SPOOL_READ_BYTES", 50_000)
    path, _ = _long_csv(tmp_path)
    # source: numpy.loadtxt reads the same text (header line skipped, time column dropped)
    want = np.loadtxt(path, delimiter=",", skiprows=1, usecols=(1, 2))
    starts = [0, 5, 12_345, 39_990, 40_000]
    with open_capture(path) as src:
        assert src._spool is not None
        got = np.concatenate([b.data for b in src.blocks(999)])
        windows = list(src.read_windows(starts, 64))
    assert np.array_equal(got, want)
    for s, w in zip(starts, windows, strict=True):
        assert np.array_equal(w, want[s : s + 64])
    assert [len(w) for w in windows] == [64, 64, 64, 10, 0]

    def no_room(self, values):  # the temporary folder fills up after the second chunk
        if self.rows > 2000:
            self.close()
            return False
        np.ascontiguousarray(values, dtype="<f8").tofile(self._file)
        self.rows += values.shape[0]
        return True

    def no_folder(prefix=""):
        raise OSError(28, "No space left on device")

    for fault in ("halfway", "at once"):
        with monkeypatch.context() as m:
            if fault == "halfway":
                m.setattr(scopecsv._Spool, "write", no_room)
            else:
                m.setattr(scopecsv.tempfile, "TemporaryFile", no_folder)
            with open_capture(path) as src:
                assert src._spool is None and not hasattr(src, "read_windows")
                again = np.concatenate([b.data for b in src.blocks(999)])
        assert np.array_equal(again, want), fault


def test_a_decode_parses_the_text_once_and_leaves_no_file(tmp_path: Path, monkeypatch) -> None:
    """The spool is an unnamed temporary file: the text is parsed by the opening check only,
    and nothing is left in the temporary folder, whether the decode ends or fails."""
    import tempfile

    from conftest import cam_errors, make_capture
    from toothcomb.decoders.options import DecodeOptions
    from toothcomb.decoders.pipeline import decode_capture
    from toothcomb.decoders.simulate import Instrument, preset

    sc = preset("idle-60-2-vr-soundcard", duration_s=1.0)
    sc = sc.replace(instrument=Instrument(kind="scope", sample_rate=100_000.0, bits=8,
                                          range_v=(-1.0, 1.0)))
    path, truth = make_capture(tmp_path, sc, "csv")
    scratch = tmp_path / "tmp"
    scratch.mkdir()
    monkeypatch.setenv("TMPDIR", str(scratch))
    monkeypatch.setattr(tempfile, "tempdir", None)  # TMPDIR is read again
    chunks = []
    parse = scopecsv._parse

    def counting(chunk, *a, **k):
        chunks.append(chunk.offset)
        return parse(chunk, *a, **k)

    monkeypatch.setattr(scopecsv, "_parse", counting)
    r = decode_capture(str(path), DecodeOptions())
    assert len(chunks) == len(set(chunks))  # every chunk of text parsed once
    assert r.crank.wheel == "60-2"
    # source: the simulator's own truth (edge angles it placed the cam at)
    assert max(cam_errors(r, truth).values()) < 0.5
    assert list(scratch.iterdir()) == []
    path.write_bytes(path.read_bytes()[:-5000] + b"1,2,x\n")  # a bad row near the end
    with pytest.raises(CaptureError):
        decode_capture(str(path), DecodeOptions())
    assert list(scratch.iterdir()) == []


def _time_column_both_ways(
    stamps: list[str], reader, rng: np.random.Generator
) -> tuple[np.ndarray | None, np.ndarray]:
    """A plain chunk of ``stamps`` and two channels: (its time column as ``reader`` reads it,
    as numpy.loadtxt reads it)."""
    text = "".join(f"{s},{rng.normal():.4g},{int(rng.integers(0, 5))}\n" for s in stamps)
    raw = text.encode()
    fields = scopecsv._fields(raw, scopecsv._Layout(",", ".", 3, False, 0, 1))
    assert fields is not None
    # source: numpy.loadtxt (numpy's C text parser, correctly rounded conversion)
    return reader(fields), np.loadtxt(io.BytesIO(raw), delimiter=",", usecols=0, ndmin=1)


def test_plain_time_stamps_are_read_as_numpy_reads_them() -> None:
    """A plain time column (fixed width, digits and a point) is read without the general
    parser; every value must be the one numpy's own text parser gives, to the last bit, and
    anything less plain must be left to that parser."""
    rng = np.random.default_rng(99)
    lay = scopecsv._Layout(",", ".", 3, False, 0, 1)
    for trial in range(300):
        decimals = int(rng.integers(0, 12))
        whole = int(rng.integers(1, 4))
        if whole + decimals > scopecsv.PLAIN_DIGITS:
            continue
        n = int(rng.integers(1, 400))
        ticks = np.sort(rng.integers(0, 10 ** (whole + decimals) - 1, n))
        sign = "-" if rng.random() < 0.2 else ""
        digits = [str(k).rjust(whole + decimals, "0") for k in ticks]
        stamps = [
            sign + (d[:whole] + ("." + d[whole:] if decimals else "")) for d in digits
        ]
        got, want = _time_column_both_ways(stamps, scopecsv._plain_first_column, rng)
        assert got is not None, trial
        assert got.tobytes() == want.tobytes(), trial  # bit for bit, the sign of zero too
    for text in [
        "1e-3,1,2\n2e-3,1,2\n",  # an exponent
        "0.1,1,2\n0.25,1,2\n",  # widths differ
        "0.10,1,2\n0.2 ,1,2\n",  # a space
        "0.10,1,2\n0.20,1\n",  # a line short of a field
        "0.10,1,2\n0.20,1,2",  # no newline at the end
        "nan,1,2\n0.20,1,2\n",
        "0.1.0,1,2\n",  # two points
        "1234567890.1234567,1,2\n",  # 17 digits: more than an exact integer holds
    ]:
        fields = scopecsv._fields(text.encode(), lay)
        assert fields is None or scopecsv._plain_first_column(fields) is None, text


def test_scientific_time_stamps_are_read_as_numpy_reads_them() -> None:
    """A time column in scientific notation at a fixed precision ("-2.500000e-03", as many
    scopes print it) is read without the general parser; every value must be the one numpy's
    own text parser gives, to the last bit (the sign of zero too), and anything else must be
    left to that parser."""
    rng = np.random.default_rng(2024)
    lay = scopecsv._Layout(",", ".", 3, False, 0, 1)
    forms = [
        lambda t: f"{t:.6e}", lambda t: f"{t:.9E}", lambda t: f"{t:+.4e}", lambda t: f"{t:.0e}",
        lambda t: f"{t:.14e}", lambda t: f"{t:.3e}".replace("e", "E"),
    ]
    read = 0
    for trial in range(300):
        form = forms[trial % len(forms)]
        n = int(rng.integers(1, 400))
        step = 10.0 ** int(rng.integers(-9, 2))
        t0 = -step * int(rng.integers(0, 2 * n + 1))  # from before the trigger, often through 0
        stamps = [form(t0 + k * step) for k in range(n)]
        got, want = _time_column_both_ways(stamps, scopecsv._scientific_column, rng)
        mantissa = stamps[0].lower().partition("e")[0]
        places = len(mantissa.partition(".")[2])
        if len({len(x.lstrip("+-")) for x in stamps}) > 1 or any(  # e+100 beside e+99, or
            abs(int(x.lower().partition("e")[2]) - places) > 22 for x in stamps  # 10**23 on
        ):
            assert got is None, trial
            continue
        assert got is not None, (trial, stamps[:2])
        assert got.tobytes() == want.tobytes(), trial
        read += 1
    assert read > 250
    for text in [
        "1e-3,1,2\n0.002,1,2\n",  # notations mixed
        "1.0e-3,1,2\n1.0e-10,1,2\n",  # exponents of different lengths
        "1.0e-30,1,2\n",  # 10**31: not exact as a double
        "1.234567890123456e-3,1,2\n",  # 16 digits: more than an exact integer holds
        "1.0e-3,1,2\n1.0x-3,1,2\n",  # not an exponent mark
        "1.0e-3,1,2\n1.0e*3,1,2\n",  # not an exponent sign
        "1.0e-3,1,2\n*1.0e-3,1,2\n",  # not a sign
        "1.0e-3,1,2\n1.0e-3a,1,2\n",  # a letter in the digits
        "e-3,1,2\n",  # no mantissa
        "0.001,1,2\n",  # no exponent: the plain reader's
    ]:
        fields = scopecsv._fields(text.encode(), lay)
        assert fields is None or scopecsv._scientific_column(fields) is None, text
    # channels printed so, with as many distinct values as rows: read as the time column is
    for trial in range(60):
        form = forms[trial % len(forms)]
        n = int(rng.integers(1, 600))
        values = rng.normal(0.0, 10.0 ** rng.integers(-6, 4), (n, 2))
        text = "".join(f"{k},{form(a)},{form(b)}\n" for k, (a, b) in enumerate(values))
        fields = scopecsv._fields(text.encode(), lay)
        assert fields is not None
        # source: numpy.loadtxt (numpy's C text parser, correctly rounded conversion)
        want = np.loadtxt(io.StringIO(text), delimiter=",", usecols=(1, 2), ndmin=2)
        got = scopecsv._channel_columns(fields, [1, 2])
        one = scopecsv._scientific_column(fields, 1)
        assert got is not None and one is not None, trial
        assert got.tobytes() == want.tobytes() and one.tobytes() == want[:, 0].tobytes(), trial


def test_opening_a_long_csv_reports_its_progress(tmp_path: Path, monkeypatch) -> None:
    """Opening a CSV parses all of it, which takes most of a long CSV's decode: it reports its
    progress in bytes (to the file's size), and readers that do not ask for it are not given
    the callback."""
    monkeypatch.setattr(scopecsv, "CHUNK_BYTES", 64 * 1024)
    monkeypatch.setattr(scopecsv, "ARROW_BLOCK_BYTES", 16 * 1024)  # when pyarrow reads it
    path, _ = _long_csv(tmp_path)
    calls: list[tuple[int, int]] = []
    with open_capture(path, progress=lambda d, t: calls.append((d, t))):
        pass
    size = path.stat().st_size
    assert len(calls) > 10 and calls[-1] == (size, size)
    assert [d for d, _ in calls] == sorted(d for d, _ in calls)
    from toothcomb.decoders.readers.write import write_capture

    wav = tmp_path / "x.wav"
    write_capture(str(wav), np.zeros((1000, 2)), 48000.0, ["a", "b"])
    with open_capture(wav, progress=lambda d, t: calls.append((d, t))):
        pass  # the audio reader takes no such option, and is not given one


def test_channel_values_with_fixed_decimals_are_read_as_numpy_reads_them() -> None:
    """A channel printed with a fixed number of decimals ("-1.40625", "0.02832", "12345") is read
    from the ends of its fields, however many distinct values it holds; every value must be the
    one numpy's own text parser gives, to the last bit (the sign of zero too), and any field
    laid out otherwise must leave the chunk to another reader."""
    rng = np.random.default_rng(1964)
    lay = scopecsv._Layout(",", ".", 3, False, 0, 1)
    for trial in range(300):
        places = int(rng.integers(0, 10))
        scale = 10.0 ** rng.integers(-3, 6)
        n = int(rng.integers(1, 600))
        values = rng.normal(0.0, scale, (n, 2))
        values[rng.random((n, 2)) < 0.05] = 0.0  # zeros, printed "-0.000" when negative
        values[rng.random((n, 2)) < 0.05] *= -1.0
        sign = "+" if trial % 7 == 0 else ""
        rows = [[f"{v:{sign}.{places}f}" for v in row] for row in values]
        if any(len(x.lstrip("+-").replace(".", "")) > scopecsv.PLAIN_DIGITS
               for row in rows for x in row):
            continue
        if trial % 5 == 0:  # no digit before the point, as some loggers print
            rows = [[x.replace("0.", ".", 1) if x.lstrip("+-").startswith("0.") else x
                     for x in row] for row in rows]
        text = "".join(f"{k / 1000:.3f},{a},{b}\n" for k, (a, b) in enumerate(rows))
        fields = scopecsv._fields(text.encode(), lay)
        assert fields is not None, trial
        # source: numpy.loadtxt (numpy's C text parser, correctly rounded conversion)
        want = np.loadtxt(io.StringIO(text), delimiter=",", usecols=(1, 2), ndmin=2)
        for j in (0, 1):
            got = scopecsv._decimal_column(fields, j + 1)
            assert got is not None, (trial, rows[0])
            assert got.tobytes() == want[:, j].tobytes(), (trial, rows[0])
        both = scopecsv._channel_columns(fields, [1, 2])
        assert both is not None and both.tobytes() == want.tobytes(), trial
    for column in [
        ["0.50", "0.25", "0.5"],  # decimals differ
        ["0.5", "12"],  # no point where the first field has it
        ["1.5", "-25"],
        ["1e-3", "2e-3"],  # an exponent
        ["0.10", " 0.20"],  # a space
        ["1-2", "3"],  # a sign inside
        ["--1", "2"],
        ["+", "2"],  # no digit
        ["-.", "2."],
        ["1.2.3", "4.5.6"],  # two points
        ["nan", "inf"],
        ["1234567890.1234567", "1.0000000000000000"],  # 17 digits
    ]:
        text = "".join(f"{k},{x},1\n" for k, x in enumerate(column))
        fields = scopecsv._fields(text.encode(), lay)
        assert fields is None or scopecsv._decimal_column(fields, 1) is None, column


def test_each_channel_is_read_the_way_that_read_it_last() -> None:
    """A column read by its distinct texts in one chunk is tried that way first in the next; a
    column that then holds too many distinct texts, or texts of another layout, is read the
    other way, and the values stay numpy's."""
    lay = scopecsv._Layout(",", ".", 3, False, 0, 1)
    table = scopecsv._KeyTable()

    def chunk(col1: list[str], col2: list[str]) -> tuple[scopecsv._Fields, np.ndarray]:
        text = "".join(f"{k},{a},{b}\n" for k, (a, b) in enumerate(zip(col1, col2, strict=True)))
        fields = scopecsv._fields(text.encode(), lay)
        assert fields is not None
        # source: numpy.loadtxt (numpy's C text parser, correctly rounded conversion)
        return fields, np.loadtxt(io.StringIO(text), delimiter=",", usecols=(1, 2), ndmin=2)

    n = scopecsv.MAX_DISTINCT + 10
    levels = [f"{v:g}" for v in np.arange(-8, 8) / 16]  # decimals differ: distinct texts only
    fixed = [f"{v:.5f}" for v in np.linspace(-3, 3, n)]  # all distinct, fixed decimals
    # chunk 1: column 1 by its texts, column 2 by its decimals
    fields, want = chunk(levels * (n // len(levels)) + levels[: n % len(levels)], fixed)
    got = scopecsv._channel_columns(fields, [1, 2], table)
    assert got is not None and got.tobytes() == want.tobytes()
    assert table.read_by == {1: 2, 2: 0}  # places in scopecsv._COLUMN_READERS
    # chunk 2: the columns swap kinds, and each is read the other way from now on
    fields, want = chunk(fixed, levels * (n // len(levels)) + levels[: n % len(levels)])
    got = scopecsv._channel_columns(fields, [1, 2], table)
    assert got is not None and got.tobytes() == want.tobytes()
    assert table.read_by == {1: 0, 2: 2}
    # a column neither way can read (many distinct texts, decimals differing) leaves the chunk
    # to numpy's parser
    odd = [f"{v:g}" for v in np.linspace(-3, 3, n)]
    fields, _ = chunk(odd, fixed)
    assert scopecsv._channel_columns(fields, [1, 2], table) is None


def test_channel_values_read_by_their_distinct_texts_are_numpy_s() -> None:
    """A plain chunk's channels with few distinct values are read by converting each distinct
    text once; every value must be what numpy's own text parser gives, to the last bit, in every
    way a number may be printed, and anything else must be left to that parser."""
    rng = np.random.default_rng(2718)
    lay = scopecsv._Layout(",", ".", 3, False, 0, 1)
    forms = [
        lambda v: f"{v:.6g}", lambda v: f"{v:.4f}", lambda v: f"{v:e}", lambda v: f"{v:+.3f}",
        lambda v: f"{v:.2E}", lambda v: repr(float(v)), lambda v: f"{v:.0f}.",
        lambda v: f"{v:.3f}".replace("0.", ".", 1),
    ]
    shared = scopecsv._KeyTable()
    for trial in range(200):
        levels = rng.normal(0.0, 10.0 ** rng.integers(-4, 3), int(rng.integers(1, 300)))
        levels = np.round(levels * 256) / 256  # a converter's steps
        form = forms[trial % len(forms)]
        n = int(rng.integers(1, 2000))
        a = [form(v) for v in rng.choice(levels, n)]
        c = [form(v) for v in rng.choice(levels, n)]
        pairs = enumerate(zip(a, c, strict=True))
        text = "".join(f"{k / 1000:.3f},{x},{y}\n" for k, (x, y) in pairs)
        fields = scopecsv._fields(text.encode(), lay)
        assert fields is not None, trial
        got = scopecsv._few_values(fields, [1, 2])
        # source: numpy.loadtxt (numpy's C text parser, correctly rounded conversion)
        want = np.loadtxt(io.StringIO(text), delimiter=",", usecols=(1, 2), ndmin=2)
        if any(len(x) > scopecsv.KEY_CHARS for x in a + c):
            assert got is None, trial
            continue
        assert got is not None, (trial, a[:3])
        assert got.tobytes() == want.tobytes(), trial
        # the same with the tables kept from chunk to chunk, as the checking pass keeps them:
        # values met in earlier trials are looked up, the rest found and kept
        kept = scopecsv._few_values(fields, [1, 2], shared)
        assert kept is not None and kept.tobytes() == want.tobytes(), trial
    for text in [
        "0.1,nan,1\n",  # not a plain number
        "0.1, 1,2\n",  # a space
        "0.1,1-2,3\n",  # digits and signs that make no number
        "0.1,e,3\n",
        "0.1,12345678901234567,1\n",  # 17 characters
    ]:
        fields = scopecsv._fields(text.encode(), lay)
        assert fields is None or scopecsv._few_values(fields, [1, 2]) is None, text
    many = "".join(f"{k},{k}.5,1\n" for k in range(scopecsv.MAX_DISTINCT + 1))
    assert scopecsv._few_values(scopecsv._fields(many.encode(), lay), [1, 2]) is None


def test_field_keys_are_equal_exactly_when_the_texts_are() -> None:
    """A field's 128-bit key (its bytes, zeros after them) must tell every two different texts
    of up to 16 characters apart, wherever in the chunk (and so at whatever alignment) the field
    starts, and give equal texts equal keys."""
    rng = np.random.default_rng(99)
    alphabet = list("0123456789.-+eE")
    texts = ["".join(rng.choice(alphabet, int(rng.integers(1, 17)))) for _ in range(3000)]
    texts += ["1", "10", "100", "1" * 16, "1" * 15, "0", "00"]  # prefixes of each other
    rows = rng.choice(texts, 20000).tolist()
    raw = "".join(f"{k},{t}\n" for k, t in enumerate(rows)).encode()
    f = scopecsv._fields(raw, scopecsv._Layout(",", ".", 2, False, 0, 1))
    assert f is not None
    k0, k1 = scopecsv._text_keys(f, 1)
    keys = list(zip(k0.tolist(), k1.tolist(), strict=True))
    by_key: dict[tuple[int, int], str] = {}
    for key, text in zip(keys, rows, strict=True):
        assert by_key.setdefault(key, text) == text  # one key, one text
    assert len(by_key) == len(set(rows))  # one text, one key
    # the text comes back from its key: its number, or None for text that is not one
    # source: Python's float() (a correctly rounded conversion of decimal text)
    for key, text in by_key.items():
        try:
            want: float | None = float(text)
        except ValueError:
            want = None
        assert scopecsv._key_value(*key) == want, text
    lay = scopecsv._Layout(",", ".", 2, False, 0, 1)
    wide = b"0,12345678901234567\n"  # 17 characters: wider than a key holds
    assert scopecsv._text_keys(scopecsv._fields(wide, lay), 1) is None
    assert scopecsv._text_keys(scopecsv._fields(b"0,\n", lay), 1) is None  # empty
    # a zero byte would make "5" and "5\0" one key: a chunk holding one is not plain, and
    # numpy's parser reads it (and names the line)
    assert scopecsv._fields(b"0,5\n1,5\x00\n", lay) is None


@pytest.mark.parametrize("bits", [4, 8, 16])
def test_hash_table_places_every_key_with_its_equals(monkeypatch, bits: int) -> None:
    """Each key's place must point at a copy of that key in the list of distinct keys, the list
    must hold each distinct key once (source: numpy.unique gives the reference set), and a table
    kept from call to call must give what a fresh one gives. A small table forces collisions
    and more rounds; when the rounds run out the answer is None, never a wrong one."""
    monkeypatch.setattr(scopecsv, "HASH_BITS", bits)
    rng = np.random.default_rng(bits)
    table = scopecsv._KeyTable()
    answered = 0
    for trial in range(30):
        distinct = int(rng.integers(1, 300))
        pool0 = rng.integers(0, 2**63, distinct, dtype=np.uint64)
        pool1 = rng.integers(0, 3, distinct, dtype=np.uint64)  # many keys alike in one word
        pick = rng.integers(0, distinct, int(rng.integers(1, 5000)))
        k0, k1 = pool0[pick], pool1[pick]
        kept = scopecsv._key_index(k0, k1, 4096, table)
        fresh = scopecsv._key_index(k0, k1, 4096)
        assert (kept is None) == (fresh is None), trial
        if kept is None:
            assert bits < 16, trial  # 16 bits and 300 keys: four rounds are plenty
            continue
        answered += 1
        for index, found in (kept, fresh):
            assert len(found) == len(set(found))
            pairs = np.unique(np.stack([k0, k1], axis=1), axis=0)
            assert sorted(found) == sorted(map(tuple, pairs.tolist()))
            got = np.array(found, dtype=np.uint64)[index]
            assert np.array_equal(got[:, 0], k0) and np.array_equal(got[:, 1], k1), trial
        assert kept[1] == fresh[1]
    assert answered >= (30 if bits == 16 else 5)
    few = np.arange(10, dtype=np.uint64)
    assert scopecsv._key_index(few, few, 9, table) is None  # more distinct keys than allowed
    assert scopecsv._key_index(few, few, 10, table) is not None


def test_values_kept_from_chunk_to_chunk_stay_right_when_buckets_are_shared(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """With a table of 64 buckets, texts from chunk after chunk share buckets: a text must get
    its own value whether it was kept, found again, or met in a bucket another text holds --
    also texts whose first eight characters are alike (they differ in the key's second word).
    source: numpy.loadtxt reads the same text."""
    monkeypatch.setattr(scopecsv, "HASH_BITS", 6)
    rng = np.random.default_rng(64)
    lay = scopecsv._Layout(",", ".", 3, False, 0, 1)
    table = scopecsv._KeyTable()
    read = 0
    for chunk in range(300):
        levels = rng.integers(-500, 500, int(rng.integers(1, 12))) / 64
        a = [f"{v:g}" for v in rng.choice(levels, 200)]
        c = [f"0.0{k:07d}" for k in rng.integers(10000, 10040, 200)]  # "0.000010" and more
        text = "".join(f"{k},{x},{y}\n" for k, (x, y) in enumerate(zip(a, c, strict=True)))
        got = scopecsv._few_values(scopecsv._fields(text.encode(), lay), [1, 2], table)
        if got is None:
            continue  # the rounds ran out of multipliers: numpy's parser would read the chunk
        read += 1
        want = np.loadtxt(io.StringIO(text), delimiter=",", usecols=(1, 2), ndmin=2)
        assert got.tobytes() == want.tobytes(), chunk
    assert read > 150
    assert np.count_nonzero(table.known0) > 32  # the table did keep values
