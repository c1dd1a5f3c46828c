"""Malformed captures, reader by reader, through the command line: one sentence, exit 2.

Every case below is a file built here (from a simulated capture, or byte by byte) that is broken
in one of the ways the issue lists: truncated or empty files, a wrong suffix, a header that lies
about the length or the channel count, text in number columns, mixed delimiters and decimal
commas, NaN/Inf samples, a single sample, constant channels, enormous declared sizes, HDF5
datasets of the wrong rank or type, a file that cannot be read, a folder. ``toothcomb decode`` and
``toothcomb describe`` are run in-process on each; the test asserts the exit code, that stderr is
exactly one line ``toothcomb: <sentence>`` naming the problem, and that no traceback is printed.

``CASES`` is also what the summary table of malformed-input classes is generated from
(``python tests/test_bad_input.py`` prints it).
"""

from __future__ import annotations

import contextlib
import io
import os
import re
import struct
import sys
import tracemalloc
from collections.abc import Callable
from dataclasses import dataclass
from functools import cache
from pathlib import Path

import h5py
import numpy as np
import pytest
import soundfile as sf
from toothcomb.cli.main import main
from toothcomb.decoders.errors import ToothcombError
from toothcomb.decoders.readers import open_capture
from toothcomb.decoders.readers.write import write_capture
from toothcomb.decoders.simulate import Instrument, Scenario, simulate

#: sample rate of the small captures built here
RATE = 48000

# --------------------------------------------------------------------------- building blocks


@cache
def _samples() -> np.ndarray:
    """0.3 s of a simulated 60-2 crank and a cam through a sound card: decodable, small."""
    sc = Scenario(duration_s=0.3, instrument=Instrument(kind="soundcard", sample_rate=RATE))
    return simulate(sc).samples.copy()


def _valid(tmp: Path, fmt: str, name: str = "run") -> Path:
    """A valid capture of the simulated samples as ``fmt`` (wav, flac, csv, txt, h5)."""
    path = tmp / f"{name}.{fmt}"
    write_capture(path, _samples(), float(RATE), ["crank", "cam"])
    return path


def _wav_bytes(
    data: np.ndarray,
    rate: int = RATE,
    *,
    channels_field: int | None = None,
    block_align: int | None = None,
    data_size: int | None = None,
    riff_size: int | None = None,
) -> bytes:
    """A canonical 16-bit PCM RIFF WAVE file, with any header field overridden (a lying header).

    source: the RIFF WAVE layout (Microsoft/IBM Multimedia Programming Interface and Data
    Specifications 1.0, 1991): 'RIFF' size 'WAVE', 'fmt ' chunk of 16 bytes (format tag 1 = PCM,
    channels, sample rate, byte rate, block align, bits per sample), 'data' size samples.
    """
    pcm = np.clip(np.round(np.atleast_2d(data.T).T * 32767), -32768, 32767).astype("<i2")
    n_ch = pcm.shape[1]
    payload = pcm.tobytes()
    ch = n_ch if channels_field is None else channels_field
    align = 2 * ch if block_align is None else block_align
    fmt = struct.pack("<HHIIHH", 1, ch, rate, (rate * align) & 0xFFFFFFFF, align & 0xFFFF, 16)
    size = len(payload) if data_size is None else data_size
    body = b"WAVE" + b"fmt " + struct.pack("<I", 16) + fmt + b"data" + struct.pack("<I", size)
    total = len(body) + len(payload) if riff_size is None else riff_size
    return b"RIFF" + struct.pack("<I", total) + body + payload


def _flac_streaminfo(raw: bytes, *, channels: int | None = None, total: int | None = None) -> bytes:
    """``raw`` FLAC with the STREAMINFO channel count or total-samples field replaced.

    source: FLAC format specification (RFC 9639, section 8.2): after 'fLaC' and the 4-byte block
    header, STREAMINFO holds 2+2+3+3 bytes of block/frame sizes, then 20 bits sample rate, 3 bits
    channels - 1, 5 bits bits-per-sample - 1 and 36 bits total samples.
    """
    assert raw[:4] == b"fLaC" and raw[4] & 0x7F == 0  # STREAMINFO comes first
    word = int.from_bytes(raw[18:26], "big")
    if channels is not None:
        word = (word & ~(0x7 << 41)) | ((channels - 1) << 41)
    if total is not None:
        word = (word & ~((1 << 36) - 1)) | total
    return raw[:18] + word.to_bytes(8, "big") + raw[26:]


def _csv_text(rows: np.ndarray, header: str = "time_s,crank,cam", rate: float = RATE) -> str:
    t = np.arange(rows.shape[0]) / rate
    lines = [header] + [
        ",".join([f"{ti:.9f}"] + [f"{v:.6g}" for v in r]) for ti, r in zip(t, rows, strict=True)
    ]
    return "\n".join(lines) + "\n"


def _h5(tmp: Path, name: str, build: Callable[[h5py.File], None]) -> Path:
    path = tmp / name
    with h5py.File(path, "w") as f:
        build(f)
    return path


def _own_layout(f: h5py.File, channels: dict[str, np.ndarray], names: list[str] | None = None):
    """toothcomb's own HDF5 layout (see decoders/readers/hdf5.py) with the given datasets."""
    f.attrs["format"] = "toothcomb-capture"
    f.attrs["format_version"] = 1
    f.attrs["sample_rate"] = float(RATE)
    f.attrs["channel_names"] = np.array(names or list(channels), dtype=h5py.string_dtype())
    for k, v in channels.items():
        f[k] = v


def _cut(path: Path, keep: float | int) -> Path:
    raw = path.read_bytes()
    n = int(len(raw) * keep) if isinstance(keep, float) else keep
    path.write_bytes(raw[:n])
    return path


# --------------------------------------------------------------------------- the cases


@dataclass(frozen=True)
class Case:
    """One malformed capture: how to build it and what the command line must answer."""

    #: the malformed-input class (a row of the summary table)
    kind: str
    #: the reader it is aimed at: wav, flac, csv, txt, h5
    fmt: str
    #: short name of the variant
    name: str
    #: builds the file in a folder; returns (capture argument, extra options)
    build: Callable[[Path], tuple[str, list[str]]]
    #: a regular expression the one-line message must contain
    message: str
    #: the exit code of ``decode``: 2 bad input (DESIGN.md), 0 when the file is in fact fine
    code: int = 2
    #: the exit code of ``describe``: the same for a file that cannot be read; 0 for samples
    #: that cannot be decoded but can be described (NaN counts, a flat channel)
    describe_code: int | None = None

    @property
    def id(self) -> str:
        return f"{self.kind}/{self.fmt}/{self.name}"

    @property
    def describe(self) -> int:
        return self.code if self.describe_code is None else self.describe_code


def _p(path: Path, *extra: str) -> tuple[str, list[str]]:
    return str(path), list(extra)


def _truncated() -> list[Case]:
    out = []
    for fmt in ("wav", "flac", "csv", "txt", "h5"):
        for keep in (0.5, 0.1, 40):
            def build(tmp: Path, fmt: str = fmt, keep: float | int = keep):
                return _p(_cut(_valid(tmp, fmt), keep))

            msg = {
                "wav": r"truncated|cannot be read as audio|holds no samples",
                "flac": r"truncated|corrupt",
                "csv": r"truncated|no rows of numbers|single row",
                "txt": r"truncated|no rows of numbers|single row",
                "h5": r"truncated|damaged|cannot be opened as HDF5|cannot be read",
            }[fmt]
            out.append(Case("truncated file", fmt, f"keep {keep}", build, msg))
    return out


def _zero_length() -> list[Case]:
    def build(tmp: Path, fmt: str) -> tuple[str, list[str]]:
        path = tmp / f"empty.{fmt}"
        path.write_bytes(b"")
        return _p(path)

    return [
        Case("zero-length file", fmt, "0 bytes", lambda t, f=fmt: build(t, f),
             r"is empty \(0 bytes\)")
        for fmt in ("wav", "flac", "csv", "txt", "h5")
    ]


def _wrong_extension() -> list[Case]:
    out = []
    # the content is a good capture under another reader's suffix: the content decides
    for src, dst in (("wav", "csv"), ("flac", "h5"), ("csv", "wav"), ("h5", "flac"), ("txt", "h5")):
        def build(tmp: Path, src: str = src, dst: str = dst) -> tuple[str, list[str]]:
            path = _valid(tmp, src)
            return _p(path.rename(path.with_suffix(f".{dst}")))

        out.append(Case("wrong extension", dst, f"{src} content", build, "", code=0))
    # not a capture at all, under each capture suffix and under an unknown one
    text = "Meeting notes\nbring the scope probes\n"
    for fmt in ("wav", "flac", "csv", "txt", "h5"):
        def build2(tmp: Path, fmt: str = fmt) -> tuple[str, list[str]]:
            path = tmp / f"notes.{fmt}"
            path.write_text(text)
            return _p(path)

        msg = {
            "wav": "does not start like a sound file",
            "flac": "does not start like a sound file",
            "csv": "found no rows of numbers",
            "txt": "found no rows of numbers",
            "h5": r"cannot be opened as HDF5|not HDF5",
        }[fmt]
        out.append(Case("wrong extension", fmt, "text notes", build2, msg))

    def png(tmp: Path) -> tuple[str, list[str]]:
        path = tmp / "scope.png"
        path.write_bytes(b"\x89PNG\r\n\x1a\n" + bytes(range(256)) * 8)
        return _p(path)

    out.append(Case("wrong extension", "png", "an image", png, "not a capture format"))
    return out


def _header_lies_length() -> list[Case]:
    x = _samples()

    def wav_longer(tmp: Path) -> tuple[str, list[str]]:
        path = tmp / "long.wav"
        path.write_bytes(_wav_bytes(x[:4800], data_size=10 * 4800 * 2 * 2))
        return _p(path)

    def wav_riff(tmp: Path) -> tuple[str, list[str]]:
        path = tmp / "riff.wav"
        path.write_bytes(_wav_bytes(x, riff_size=0x7FFFFFF0))
        return _p(path)

    def wav_shorter(tmp: Path) -> tuple[str, list[str]]:
        # the data chunk claims 3 bytes: not one whole frame of 2 channels x 16 bits
        path = tmp / "short.wav"
        path.write_bytes(_wav_bytes(x, data_size=3))
        return _p(path)

    def flac_longer(tmp: Path) -> tuple[str, list[str]]:
        path = _valid(tmp, "flac")
        path.write_bytes(_flac_streaminfo(path.read_bytes(), total=10 * x.shape[0]))
        return _p(path)

    def h5_unequal(tmp: Path) -> tuple[str, list[str]]:
        return _p(_h5(tmp, "u.h5", lambda f: _own_layout(f, {"crank": x[:, 0], "cam": x[:99, 1]})))

    def csv_meta(tmp: Path) -> tuple[str, list[str]]:
        # a preamble line gives a sample interval a thousand times the time column's
        path = tmp / "meta.csv"
        path.write_text("# sample interval: 20.8333 ms\n" + _csv_text(x))
        return _p(path)

    return [
        Case("header lies about length", "wav", "data chunk 10x", wav_longer,
             "announces 48000 frames but the file holds only 4800"),
        Case("header lies about length", "wav", "riff size 2 GiB", wav_riff, "", code=0),
        Case("header lies about length", "wav", "data 3 bytes", wav_shorter,
             "3 bytes, not a whole number of 4-byte frames"),
        Case("header lies about length", "flac", "total 10x", flac_longer,
             r"of 144000 \(.*\); the file looks truncated"),
        Case("header lies about length", "h5", "unequal datasets", h5_unequal,
             r"differ in length \(/crank: 14400, /cam: 99\)"),
        Case("header lies about length", "csv", "interval line", csv_meta, "", code=0),
    ]


def _header_lies_channels() -> list[Case]:
    x = _samples()[:4800]

    def wav_more(tmp: Path) -> tuple[str, list[str]]:
        path = tmp / "ch7.wav"
        path.write_bytes(_wav_bytes(x, channels_field=7))
        return _p(path)

    def wav_align(tmp: Path) -> tuple[str, list[str]]:
        path = tmp / "align.wav"
        path.write_bytes(_wav_bytes(x, channels_field=3, block_align=4))
        return _p(path)

    def wav_zero(tmp: Path) -> tuple[str, list[str]]:
        path = tmp / "ch0.wav"
        path.write_bytes(_wav_bytes(x, channels_field=0, block_align=4))
        return _p(path)

    def flac_more(tmp: Path) -> tuple[str, list[str]]:
        path = _valid(tmp, "flac")
        path.write_bytes(_flac_streaminfo(path.read_bytes(), channels=6))
        return _p(path)

    def csv_names(tmp: Path, fmt: str) -> tuple[str, list[str]]:
        path = tmp / f"names.{fmt}"
        path.write_text(_csv_text(x[:2000], header="time_s,crank,cam,cam_ex"))
        return _p(path)

    def h5_names(tmp: Path) -> tuple[str, list[str]]:
        return _p(
            _h5(
                tmp,
                "n.h5",
                lambda f: _own_layout(
                    f, {"crank": x[:, 0], "cam": x[:, 1]}, ["crank", "cam", "cam_ex"]
                ),
            )
        )

    return [
        Case("header lies about channels", "wav", "7 channels", wav_more,
             "not a whole number of 14-byte frames"),
        Case("header lies about channels", "wav", "3 ch, align 4", wav_align,
             r"3 channels of 16 bits \(6 bytes per frame\) but a block align of 4"),
        Case("header lies about channels", "wav", "0 channels", wav_zero, "announces 0 channels"),
        Case("header lies about channels", "flac", "6 channels", flac_more,
             "channel changed mid stream"),
        Case("header lies about channels", "csv", "4 names", lambda t: csv_names(t, "csv"),
             "names 4 columns .* but the rows below hold 3 values"),
        Case("header lies about channels", "txt", "4 names", lambda t: csv_names(t, "txt"),
             "names 4 columns .* but the rows below hold 3 values"),
        Case("header lies about channels", "h5", "names 3", h5_names, "cam_ex"),
    ]


def _text_in_numbers() -> list[Case]:
    x = _samples()[:3000]
    out = []
    for fmt in ("csv", "txt"):
        for bad in ("overload", "1.2.3", "0x1F", "--", "12V"):
            def build(tmp: Path, fmt: str = fmt, bad: str = bad) -> tuple[str, list[str]]:
                lines = _csv_text(x).splitlines()
                lines[1500] = lines[1500].rsplit(",", 1)[0] + "," + bad
                path = tmp / f"text.{fmt}"
                path.write_text("\n".join(lines) + "\n")
                return _p(path)

            out.append(
                Case("text in numeric columns", fmt, bad, build,
                     rf"line 1501 holds '{re.escape(bad)}', which is not a number")
            )

    def h5_strings(tmp: Path) -> tuple[str, list[str]]:
        names = np.array(["0.1", "x"] * 1000, dtype=h5py.string_dtype())
        return _p(_h5(tmp, "s.h5", lambda f: _own_layout(f, {"crank": x[:2000, 0], "cam": names})))

    out.append(
        Case("text in numeric columns", "h5", "string dataset", h5_strings,
             r"not 1-D numbers \(/cam: 1-D object\)")
    )
    return out


def _mixed_delimiters() -> list[Case]:
    x = _samples()[:3000]
    body = _csv_text(x).splitlines()

    def build(tmp: Path, fmt: str, lines: list[str]) -> tuple[str, list[str]]:
        path = tmp / f"mixed.{fmt}"
        path.write_text("\n".join(lines) + "\n")
        return _p(path)

    def semicolon_half(lines: list[str]) -> list[str]:
        return lines[:1500] + [ln.replace(",", ";") for ln in lines[1500:]]

    def comma_decimal_comma(lines: list[str]) -> list[str]:
        # decimal commas under a comma delimiter: every value splits in two
        return [lines[0]] + [ln.replace(",", ";").replace(".", ",").replace(";", ",")
                             for ln in lines[1:]]

    def decimal_comma_half(lines: list[str]) -> list[str]:
        semi = [ln.replace(",", ";") for ln in lines]
        return semi[:1500] + [ln.replace(".", ",") for ln in semi[1500:]]

    def tab_in_one(lines: list[str]) -> list[str]:
        return [*lines[:700], lines[700].replace(",", "\t"), *lines[701:]]

    out = []
    for fmt in ("csv", "txt"):
        out += [
            Case("mixed delimiters / decimal commas", fmt, "';' from line 1501",
                 lambda t, f=fmt: build(t, f, semicolon_half(body)),
                 r"line 1501 has 1 value where the rows above have 3"),
            Case("mixed delimiters / decimal commas", fmt, "decimal comma, ',' delimiter",
                 lambda t, f=fmt: build(t, f, comma_decimal_comma(body)),
                 "decimal commas under a comma delimiter"),
            Case("mixed delimiters / decimal commas", fmt, "',' mark from line 1501",
                 lambda t, f=fmt: build(t, f, decimal_comma_half(body)),
                 r"line 1501 holds '0,031229167', which is not a number"),
            Case("mixed delimiters / decimal commas", fmt, "one tab line",
                 lambda t, f=fmt: build(t, f, tab_in_one(body)),
                 r"line 701 has 1 value where the rows above have 3"),
        ]
    return out


def _non_finite() -> list[Case]:
    x = _samples()[:4800].copy()
    out = []
    for value, label in ((np.nan, "NaN"), (np.inf, "Inf"), (-np.inf, "-Inf")):
        y = x.copy()
        y[1234, 1] = value

        def wav(tmp: Path, y: np.ndarray = y) -> tuple[str, list[str]]:
            path = tmp / "nan.wav"
            sf.write(path, y, RATE, subtype="FLOAT")
            return _p(path)

        def text(tmp: Path, fmt: str, y: np.ndarray = y) -> tuple[str, list[str]]:
            path = tmp / f"nan.{fmt}"
            path.write_text(_csv_text(y).replace("inf", "Inf"))
            return _p(path)

        def h5(tmp: Path, y: np.ndarray = y) -> tuple[str, list[str]]:
            path = tmp / "nan.h5"
            write_capture(path, y, float(RATE), ["crank", "cam"])
            return _p(path)

        msg = r"channel '(ch1|cam)' has 1 NaN or infinite samples \(first at sample 1234"
        out += [
            Case("NaN/Inf samples", "wav", label, wav, msg, describe_code=0),
            Case("NaN/Inf samples", "csv", label, lambda t, text=text: text(t, "csv"), msg,
                 describe_code=0),
            Case("NaN/Inf samples", "txt", label, lambda t, text=text: text(t, "txt"), msg,
                 describe_code=0),
            Case("NaN/Inf samples", "h5", label, h5, msg, describe_code=0),
        ]

    def time_nan(tmp: Path) -> tuple[str, list[str]]:
        lines = _csv_text(x[:2000]).splitlines()
        lines[900] = "nan," + lines[900].split(",", 1)[1]
        path = tmp / "tnan.csv"
        path.write_text("\n".join(lines) + "\n")
        return _p(path)

    out.append(Case("NaN/Inf samples", "csv", "NaN time stamp", time_nan,
                    r"time stamp on line 901 is not a number"))
    return out


def _single_sample() -> list[Case]:
    one = _samples()[:1]
    out = []
    for fmt in ("wav", "flac", "h5"):
        def build(tmp: Path, fmt: str = fmt) -> tuple[str, list[str]]:
            path = tmp / f"one.{fmt}"
            write_capture(path, one, float(RATE), ["crank", "cam"])
            return _p(path)

        out.append(Case("single sample", fmt, "1 frame", build, r"holds a single sample",
                        describe_code=0))
    for fmt in ("csv", "txt"):
        def text(tmp: Path, fmt: str = fmt) -> tuple[str, list[str]]:
            path = tmp / f"one.{fmt}"
            path.write_text(_csv_text(one))
            return _p(path)

        def text_rate(tmp: Path, fmt: str = fmt) -> tuple[str, list[str]]:
            path = tmp / f"one.{fmt}"
            path.write_text("crank,cam\n0.5,0.25\n")
            return _p(path, "--sample-rate", "48000")

        out.append(Case("single sample", fmt, "1 row", text, r"single row"))
        out.append(Case("single sample", fmt, "1 row, rate given", text_rate,
                        r"holds a single sample", describe_code=0))
    return out


def _constant() -> list[Case]:
    flat = np.full((4800, 2), 0.25)
    out = []
    for fmt in ("wav", "flac", "csv", "txt", "h5"):
        def build(tmp: Path, fmt: str = fmt) -> tuple[str, list[str]]:
            path = tmp / f"flat.{fmt}"
            write_capture(path, flat, float(RATE), ["crank", "cam"])
            return _p(path)

        out.append(Case("all-constant channels", fmt, "0.25 everywhere", build,
                        r"every channel of .* holds one value throughout \((crank|ch0) = 0.25",
                        describe_code=0))
    return out


#: bytes the enormous-size cases may make the reader allocate at most
ENORMOUS_PEAK = 32 << 20


def _enormous() -> list[Case]:
    x = _samples()[:480]

    def wav_data(tmp: Path) -> tuple[str, list[str]]:
        path = tmp / "huge.wav"
        path.write_bytes(_wav_bytes(x, data_size=0xFFFFFFF0 - 8))
        return _p(path)

    def wav_channels(tmp: Path) -> tuple[str, list[str]]:
        path = tmp / "wide.wav"
        path.write_bytes(_wav_bytes(x, channels_field=65535, block_align=65535 * 2))
        return _p(path)

    def flac_total(tmp: Path) -> tuple[str, list[str]]:
        path = _valid(tmp, "flac")
        path.write_bytes(_flac_streaminfo(path.read_bytes(), total=(1 << 36) - 1))
        return _p(path)

    def h5_chunked(tmp: Path) -> tuple[str, list[str]]:
        def build(f: h5py.File) -> None:
            _own_layout(f, {})
            f.attrs["channel_names"] = np.array(["crank", "cam"], dtype=h5py.string_dtype())
            for name in ("crank", "cam"):
                f.create_dataset(name, shape=(1 << 40,), chunks=(1 << 16,), dtype="f8")

        return _p(_h5(tmp, "huge.h5", build))

    def h5_contiguous(tmp: Path) -> tuple[str, list[str]]:
        def build(f: h5py.File) -> None:
            f.attrs["fs"] = float(RATE)
            f.create_dataset("x", shape=(1 << 34,), dtype="f8")

        return _p(_h5(tmp, "huge2.h5", build))

    def csv_line(tmp: Path, fmt: str) -> tuple[str, list[str]]:
        # one "row" of 64 MiB of digits without a line end
        path = tmp / f"line.{fmt}"
        with open(path, "wb") as fh:
            fh.write(b"time_s,crank\n0.0,")
            fh.write(b"7" * (64 << 20))
        return _p(path)

    def csv_columns(tmp: Path, fmt: str, n: int) -> tuple[str, list[str]]:
        # a header announcing n channels over rows of as many values
        path = tmp / f"wide.{fmt}"
        row = ",".join(["0"] * n)
        path.write_text(",".join(f"c{i}" for i in range(n)) + "\n" + (row + "\n") * 3)
        return _p(path, "--sample-rate", "48000")

    out = [
        Case("enormous declared sizes", "wav", "data 4 GiB", wav_data,
             "announces 1073741818 frames but the file holds only 480"),
        Case("enormous declared sizes", "wav", "65535 channels", wav_channels,
             "announces 65535 channels; toothcomb reads at most 256"),
        Case("enormous declared sizes", "flac", "2^36 samples", flac_total,
             r"of 68719476735 \(.*\); the file looks truncated"),
        Case("enormous declared sizes", "h5", "2^40 unstored", h5_chunked,
             "declares 1099511627776 samples but only 0 of its 16777216 storage chunks"),
        Case("enormous declared sizes", "h5", "2^34 contiguous", h5_contiguous,
             "declares 17179869184 samples but only 0 of its 137438953472 bytes"),
    ]
    def csv_rate(tmp: Path) -> tuple[str, list[str]]:
        # found by tests/test_fuzz.py: a 1e300 Hz rate overflowed the front ends (exit 4)
        path = tmp / "rate.csv"
        path.write_text("dt = 1e-300\n-0.0380554\n-1\n-1\n-1\n")
        return _p(path)

    def h5_rate(tmp: Path) -> tuple[str, list[str]]:
        def build(f: h5py.File) -> None:
            f.attrs["fs"] = 1e300
            f["x"] = x[:, 0]

        return _p(_h5(tmp, "rate.h5", build))

    out += [
        Case("enormous declared sizes", "csv", "1e300 Hz", csv_rate,
             r"gives a sample rate of 1e\+300 Hz, outside 0.001 to 1e\+11 Hz"),
        Case("enormous declared sizes", "h5", "1e300 Hz", h5_rate,
             r"gives a sample rate of 1e\+300 Hz, outside 0.001 to 1e\+11 Hz"),
    ]
    for fmt in ("csv", "txt"):
        out += [
            Case("enormous declared sizes", fmt, "64 MiB line", lambda t, f=fmt: csv_line(t, f),
                 r"line 2 runs on for more than 1 MiB without a line end"),
            Case("enormous declared sizes", fmt, "200000 columns",
                 lambda t, f=fmt: csv_columns(t, f, 200_000),
                 r"line 1 runs on for more than 1 MiB without a line end"),
            Case("enormous declared sizes", fmt, "5000 columns",
                 lambda t, f=fmt: csv_columns(t, f, 5000),
                 r"hold 5000 values each; toothcomb reads at most 256 channels"),
        ]
    return out


def _hdf5_rank_dtype() -> list[Case]:
    x = _samples()[:2000]

    def own(tmp: Path, channels: dict[str, np.ndarray]) -> tuple[str, list[str]]:
        return _p(_h5(tmp, "own.h5", lambda f: _own_layout(f, channels)))

    def generic(tmp: Path, value: object, **kw: object) -> tuple[str, list[str]]:
        def build(f: h5py.File) -> None:
            f.attrs["fs"] = float(RATE)
            f.create_dataset("data", data=value, **kw)

        path = _h5(tmp, "g.h5", build)
        return _p(Path(f"{path}:/data"))

    compound = np.zeros(2000, dtype=[("t", "f8"), ("v", "f8")])
    k = "HDF5 dataset rank / dtype"
    return [
        Case(k, "h5", "2-D channel", lambda t: own(t, {"crank": x, "cam": x}),
             r"not 1-D numbers \(/crank: 2-D float64, /cam: 2-D float64\)"),
        Case(k, "h5", "scalar channel", lambda t: own(t, {"crank": x[:, 0], "cam": np.float64(1)}),
             r"not 1-D numbers \(/cam: 0-D float64\)"),
        Case(k, "h5", "3-D dataset", lambda t: generic(t, np.zeros((10, 20, 30))), "3 dimensions"),
        Case(k, "h5", "scalar dataset", lambda t: generic(t, 3.0), r"has 0 dimensions \(\)"),
        Case(k, "h5", "compound", lambda t: generic(t, compound), "not numbers"),
        Case(k, "h5", "complex", lambda t: generic(t, x[:, 0] + 1j), "not numbers"),
        Case(k, "h5", "strings", lambda t: generic(t, np.array(["a"] * 50, dtype="S1")),
             "not numbers"),
        Case(k, "h5", "bool", lambda t: generic(t, x[:, 0] > 0), "not numbers"),
        Case(k, "h5", "empty 1-D", lambda t: generic(t, np.zeros(0)), r"hold no samples"),
        Case(k, "h5", "0 x 2", lambda t: generic(t, np.zeros((0, 2))),
             r"of shape \(0, 2\) holds no samples"),
    ]


def _unreadable() -> list[Case]:
    out = []
    for fmt in ("wav", "flac", "csv", "txt", "h5"):
        out += [
            Case("unreadable permissions", fmt, "mode 000", lambda t, f=fmt: _p(_valid(t, f)),
                 r"capture file '.*' is not readable; check its permissions"),
            Case("unreadable permissions", fmt, "open refused",
                 lambda t, f=fmt: _p(_valid(t, f)), r"cannot be read \(Permission denied\)"),
        ]
    return out


def _directory() -> list[Case]:
    def build(tmp: Path, fmt: str) -> tuple[str, list[str]]:
        path = tmp / f"folder.{fmt}"
        path.mkdir()
        return _p(path)

    return [
        Case("directory instead of a file", fmt, "folder", lambda t, f=fmt: build(t, f),
             "is a folder")
        for fmt in ("wav", "flac", "csv", "txt", "h5")
    ]


CASES: list[Case] = [
    *_truncated(),
    *_zero_length(),
    *_wrong_extension(),
    *_header_lies_length(),
    *_header_lies_channels(),
    *_text_in_numbers(),
    *_mixed_delimiters(),
    *_non_finite(),
    *_single_sample(),
    *_constant(),
    *_enormous(),
    *_hdf5_rank_dtype(),
    *_unreadable(),
    *_directory(),
]


# --------------------------------------------------------------------------- running


def run_cli(argv: list[str]) -> tuple[int, str, str]:
    """``toothcomb ARGV`` in-process: (exit code, stdout, stderr)."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    return code, out.getvalue(), err.getvalue()


@contextlib.contextmanager
def _unreadable(path: Path, how: str):
    """Make ``path`` unreadable. ``mode 000``: the file gets mode 000 (as root, whom modes do
    not stop, ``os.access`` and every open are refused the way the kernel refuses another user);
    ``open refused``: ``os.access`` says yes but opening fails with EACCES (an ACL, or the
    permissions changing between the check and the open)."""
    import builtins

    real = os.path.realpath(path)
    os.chmod(path, 0o000 if how == "mode 000" else 0o644)
    if how == "mode 000" and os.geteuid() != 0:
        try:
            yield
        finally:
            os.chmod(path, 0o644)
        return
    real_open, real_access = builtins.open, os.access
    real_sf, real_h5 = sf.SoundFile.__init__, h5py.File.__init__

    def denied(file: object) -> bool:
        return isinstance(file, (str, os.PathLike)) and os.path.realpath(file) == real

    def refuse(file: object) -> None:
        raise PermissionError(13, "Permission denied", os.fspath(file))  # type: ignore[arg-type]

    def open_(file, *a, **kw):  # type: ignore[no-untyped-def]
        if denied(file):
            refuse(file)
        return real_open(file, *a, **kw)

    def access(file, mode, *a, **kw):  # type: ignore[no-untyped-def]
        if how == "mode 000" and denied(file) and mode & os.R_OK:
            return False
        return real_access(file, mode, *a, **kw)

    def sf_init(self, file, *a, **kw):  # type: ignore[no-untyped-def]
        if denied(file):
            refuse(file)
        return real_sf(self, file, *a, **kw)

    def h5_init(self, name, *a, **kw):  # type: ignore[no-untyped-def]
        if denied(name):
            refuse(name)
        return real_h5(self, name, *a, **kw)

    try:
        with pytest.MonkeyPatch.context() as mp:
            mp.setattr(builtins, "open", open_)
            mp.setattr(os, "access", access)
            mp.setattr(sf.SoundFile, "__init__", sf_init)
            mp.setattr(h5py.File, "__init__", h5_init)
            yield
    finally:
        os.chmod(path, 0o644)


def run_case(case: Case, tmp: Path, command: str = "decode") -> tuple[str, int, str, str]:
    """Build ``case`` in ``tmp`` and run ``toothcomb COMMAND`` on it: (capture, exit code,
    stdout, stderr)."""
    arg, extra = case.build(tmp)
    argv = [command, arg, *extra, "--quiet"]
    if case.kind == "unreadable permissions":
        with _unreadable(Path(arg), case.name):
            code, out, err = run_cli(argv)
    else:
        code, out, err = run_cli(argv)
    return arg, code, out, err


def _expect_one_line(err: str, case: Case) -> str:
    assert "Traceback" not in err, err
    lines = err.splitlines()
    assert len(lines) == 1, err
    line = lines[0]
    assert line.startswith("toothcomb: "), line
    assert "internal error" not in line, line
    assert re.search(case.message, line), (case.message, line)
    return line


def check_case(case: Case, tmp: Path, command: str = "decode") -> None:
    """Run ``case`` through ``toothcomb COMMAND`` and check the answer."""
    arg, code, out, err = run_case(case, tmp, command)
    want = case.code if command == "decode" else case.describe
    assert code == want, (case.id, command, code, err)
    assert "Traceback" not in err, err
    if want == 0:
        assert "toothcomb:" not in err, err
        return
    assert out == ""
    line = _expect_one_line(err, case)
    # the sentence names the file, or the channel of it, that it is about
    assert Path(arg.split(":/")[0]).name in line or "channel" in line, line


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_decode_answers_malformed_input_in_one_sentence(case: Case, tmp_path: Path) -> None:
    check_case(case, tmp_path, "decode")


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_describe_answers_malformed_input_in_one_sentence(case: Case, tmp_path: Path) -> None:
    check_case(case, tmp_path, "describe")


# --------------------------------------------------------------------------- enormous sizes


@pytest.mark.parametrize(
    "case",
    [c for c in CASES if c.kind == "enormous declared sizes"],
    ids=[c.id for c in CASES if c.kind == "enormous declared sizes"],
)
def test_enormous_declared_sizes_are_refused_before_allocating(case: Case, tmp_path: Path) -> None:
    arg, extra = case.build(tmp_path)
    rate = float(extra[1]) if extra[:1] == ["--sample-rate"] else None
    tracemalloc.start()
    try:
        with pytest.raises(ToothcombError) as err:
            with open_capture(arg, sample_rate=rate) as src:
                for _ in src.blocks(1 << 16):
                    pass
        _now, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert "\n" not in str(err.value)
    # common practice, no source: a refusal needs no more than a few blocks' worth of memory
    assert peak < ENORMOUS_PEAK, f"{peak / 2**20:.1f} MiB allocated"


# --------------------------------------------------------------------------- the summary table


def summary_table(tmp_root: Path) -> str:
    """Run every case through ``decode`` and tabulate the classes (for the closing note)."""
    rows: dict[str, list[tuple[int, str]]] = {}
    for i, case in enumerate(CASES):
        tmp = tmp_root / f"c{i}"
        tmp.mkdir()
        _arg, code, _out, err = run_case(case, tmp)
        rows.setdefault(case.kind, []).append((code, err.strip().replace(str(tmp) + "/", "")))
    lines = ["| class | cases | exit codes | tracebacks | example message |", "|---" * 5 + "|"]
    for kind, got in rows.items():
        seen = sorted({c for c, _ in got})
        codes = ", ".join(f"{c} x{sum(1 for k, _ in got if k == c)}" for c in seen)
        tb = sum("Traceback" in e for _, e in got)
        example = next((e for c, e in got if c == 2), "") or "(decoded)"
        lines.append(f"| {kind} | {len(got)} | {codes} | {tb} | {example} |")
    return "\n".join(lines)


def test_case_ids_are_unique_and_every_class_has_cases() -> None:
    ids = [c.id for c in CASES]
    assert len(ids) == len(set(ids))
    kinds = {c.kind for c in CASES}
    assert len(kinds) == 14
    # every reader the issue names meets at least eight kinds of malformed input
    for fmt in ("wav", "flac", "csv", "txt", "h5"):
        assert len({c.kind for c in CASES if c.fmt == fmt}) >= 8, fmt


# --------------------------------------------------------------------------- guard rails


def _decode(tmp: Path, sc: Scenario, name: str, **options: object):
    from toothcomb.decoders.options import DecodeOptions
    from toothcomb.decoders.pipeline import decode_capture

    path = tmp / name
    simulate(sc).write(path)
    return decode_capture(str(path), DecodeOptions(**options))  # type: ignore[arg-type]


@pytest.mark.parametrize(("rpm", "rate"), [(900.0, 1000.0), (6000.0, 7000.0)])
def test_a_sample_rate_that_aliases_the_teeth_is_named_with_its_figures(
    tmp_path: Path, rpm: float, rate: float
) -> None:
    from toothcomb.decoders.errors import DecodeError
    from toothcomb.decoders.simulate import ConstantSpeed

    sc = Scenario(
        duration_s=1.0,
        speed=ConstantSpeed(rpm=rpm),
        instrument=Instrument(kind="float", sample_rate=rate),
    )
    with pytest.raises(DecodeError) as err:
        _decode(tmp_path, sc, "alias.h5", wheel="60-2")
    msg = str(err.value)
    # a 60-2 wheel passes 60 tooth positions per revolution: rpm / 60 * 60 teeth per second
    teeth = rpm / 60.0 * 60.0
    # source: Nyquist-Shannon sampling theorem: a frequency above half the sample rate aliases
    assert teeth > rate / 2
    m = re.search(r"passes (\d+) teeth per second, above half the (\d+) Hz sample rate", msg)
    assert m is not None, msg
    assert float(m.group(1)) == pytest.approx(teeth, rel=0.01)
    assert float(m.group(2)) == rate
    assert "aliased" in msg
    # the rate it asks for gives the 8 samples per tooth the pipeline needs
    need = float(re.search(r"record at (\d+) Hz", msg).group(1))  # type: ignore[union-attr]
    assert need >= 8 * teeth


def test_clipping_on_most_teeth_is_reported_with_the_share(tmp_path: Path) -> None:
    from toothcomb.decoders.simulate import Channel, ConstantSpeed

    def scenario(gain: float) -> Scenario:
        return Scenario(
            duration_s=1.0,
            speed=ConstantSpeed(rpm=800.0),
            channels=(
                Channel(name="crank", source="crank", gain=gain, noise_v=0.002),
                Channel(name="cam", source="cam_intake", gain=0.6, noise_v=0.002),
            ),
            instrument=Instrument(kind="soundcard", sample_rate=48_000.0, bits=16),
        )

    hot = _decode(tmp_path, scenario(3.0), "hot.wav")
    found = [f for f in hot.all_findings if f.code == "clipping"]
    assert len(found) == 1, [f.code for f in hot.all_findings]
    m = re.search(r"clipped on (\d+) of (\d+) teeth \((\d+)%\)", found[0].message)
    assert m is not None, found[0].message
    assert int(m.group(1)) > 0.5 * int(m.group(2))
    # from memory: 16-bit PCM full scale is 32767/32768 = 0.99997 of 1.0
    assert "+0.999969" in found[0].message
    cool = _decode(tmp_path, scenario(0.2), "cool.wav")
    assert "clipping" not in {f.code for f in cool.all_findings}


def test_a_capture_shorter_than_two_engine_cycles_is_reported(tmp_path: Path) -> None:
    from toothcomb.decoders.simulate import ConstantSpeed

    def scenario(duration: float) -> Scenario:
        return Scenario(
            duration_s=duration,
            speed=ConstantSpeed(rpm=3000.0),
            instrument=Instrument(kind="float", sample_rate=100_000.0),
        )

    # one four-stroke cycle is two revolutions: 120 / 3000 rpm = 0.04 s
    short = _decode(tmp_path, scenario(0.07), "short.h5")
    found = [f for f in short.all_findings if f.code == "short-capture"]
    assert len(found) == 1
    assert "1.75 engine cycles at the mean 3000 rpm" in found[0].message
    assert "record for 0.08 s or longer" in found[0].message
    whole = _decode(tmp_path, scenario(0.1), "whole.h5")
    assert "short-capture" not in {f.code for f in whole.all_findings}


def test_too_few_samples_per_tooth_is_still_refused_with_its_figure(tmp_path: Path) -> None:
    from toothcomb.decoders.errors import DecodeError
    from toothcomb.decoders.simulate import ConstantSpeed

    # 6000 rpm on a 60-2 wheel is 6000 teeth per second: 30 kHz gives 5 per tooth
    sc = Scenario(
        duration_s=0.3,
        speed=ConstantSpeed(rpm=6000.0),
        instrument=Instrument(kind="float", sample_rate=30_000.0),
    )
    result = _decode(tmp_path, sc, "few.h5")
    few = [f for f in result.all_findings if f.code == "few-samples"]
    assert len(few) == 1 and "30000 Hz gives only 5.0 samples per tooth" in few[0].message
    assert DecodeError.exit_code == 3


if __name__ == "__main__":  # a helper for the closing note: python tests/test_bad_input.py
    import tempfile

    with tempfile.TemporaryDirectory() as d:
        print(summary_table(Path(d)))
    sys.exit(0)
