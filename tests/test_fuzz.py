"""Fuzzing the readers and the decode: generated and mutated captures in every format.

Each test starts from small valid captures (written by ``readers.write`` from simulated
samples, or generated field by field) and breaks them: cuts, flipped and inserted bytes, lying
header fields, text and odd delimiters in rows, odd HDF5 shapes, types and attributes. For every
input, ``decode_capture`` must either decode or raise the project's own ``ToothcombError``
(one line), within a bounded time (hypothesis ``deadline``) and bounded memory (``tracemalloc``).

Budget: the ``ci`` profile (the default) tries 15 inputs per test, about 120 in all.
A long run: ``TOOTHCOMB_FUZZ=long pytest tests/test_fuzz.py -s`` (thousands of inputs; add
``TOOTHCOMB_FUZZ_EXAMPLES=N`` for N per test). With ``-s`` each test prints how many inputs it
tried and how they ended.
"""

from __future__ import annotations

import os
import struct
import tempfile
import tracemalloc
from collections import Counter
from datetime import timedelta
from functools import cache
from pathlib import Path

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from toothcomb.decoders.errors import ToothcombError
from toothcomb.decoders.options import DecodeOptions
from toothcomb.decoders.pipeline import decode_capture
from toothcomb.decoders.readers.write import write_capture
from toothcomb.decoders.simulate import Instrument, Scenario, simulate

LONG = os.environ.get("TOOTHCOMB_FUZZ", "ci") == "long"
#: inputs tried per test
EXAMPLES = int(os.environ.get("TOOTHCOMB_FUZZ_EXAMPLES", "1500" if LONG else "15"))
#: the most one input may take; a shared 2-core machine is slow, so the bound is loose
# common practice, no source
DEADLINE = timedelta(seconds=20 if LONG else 8)
#: the most memory (traced by tracemalloc) one decode of these small inputs may allocate
# common practice, no source: a few blocks of 65536 samples x a few channels x 8 bytes
PEAK_BYTES = 96 << 20

FUZZ = settings(
    max_examples=EXAMPLES,
    deadline=DEADLINE,
    derandomize=not LONG,  # CI runs the same inputs every time; a long run explores
    database=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)

#: how each input ended, per test: "decoded" or the error class name
OUTCOMES: dict[str, Counter[str]] = {}


@cache
def _folder() -> Path:
    return Path(tempfile.mkdtemp(prefix="toothcomb-fuzz-"))


@cache
def _samples() -> tuple[np.ndarray, float]:
    """0.25 s of a 60-2 crank and a cam at 1500 rpm through a sound card: about 6 revolutions,
    enough to decode, small enough to decode fast."""
    from toothcomb.decoders.simulate import ConstantSpeed

    sc = Scenario(
        duration_s=0.25,
        speed=ConstantSpeed(rpm=1500.0),
        instrument=Instrument(kind="soundcard", sample_rate=24_000.0),
    )
    sim = simulate(sc)
    return sim.samples.copy(), sim.sample_rate


@cache
def valid_bytes(fmt: str) -> bytes:
    """A valid capture of the simulated samples as ``fmt`` (wav, flac, csv, txt, h5)."""
    x, rate = _samples()
    path = _folder() / f"base.{fmt}"
    write_capture(path, x, rate, ["crank", "cam"])
    return path.read_bytes()


def attempt(name: str, data: bytes, suffix: str, **options: object) -> str:
    """Decode ``data`` saved with ``suffix``; it must decode or raise a ToothcombError of one
    line, allocating at most PEAK_BYTES. Returns how it ended."""
    path = _folder() / f"{name}{suffix}"
    path.write_bytes(data)
    tracemalloc.start()
    try:
        decode_capture(str(path), DecodeOptions(**options))  # type: ignore[arg-type]
        outcome = "decoded"
    except ToothcombError as exc:
        message = str(exc)
        assert message and "\n" not in message, repr(message)
        assert "Traceback" not in message
        outcome = type(exc).__name__
    finally:
        _now, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        path.unlink(missing_ok=True)
    assert peak < PEAK_BYTES, f"{peak / 2**20:.0f} MiB"
    OUTCOMES.setdefault(name, Counter())[outcome] += 1
    return outcome


def report(name: str) -> None:
    got = OUTCOMES.get(name, Counter())
    print(f"\nfuzz {name}: {sum(got.values())} inputs, {dict(sorted(got.items()))}")
    # the run really tried inputs (a budget of 0 would pass vacuously)
    assert sum(got.values()) >= min(EXAMPLES, 10)


# --------------------------------------------------------------------------- byte mutations


@st.composite
def mutated(draw: st.DrawFn, base: bytes) -> bytes:
    """``base`` after one to four mutations: cut, overwrite, insert, delete, repeat a span."""
    data = bytearray(base)
    for _ in range(draw(st.integers(1, 4))):
        kind = draw(st.sampled_from(["cut", "overwrite", "insert", "delete", "repeat", "zero"]))
        n = len(data)
        if n == 0:
            break
        at = draw(st.integers(0, n - 1))
        # most mutations aim at the header, where one byte changes the meaning of the rest
        if draw(st.booleans()):
            at = min(at, draw(st.integers(0, min(n - 1, 600))))
        if kind == "cut":
            del data[at:]
        elif kind == "overwrite":
            chunk = draw(st.binary(min_size=1, max_size=8))
            data[at : at + len(chunk)] = chunk
        elif kind == "insert":
            data[at:at] = draw(st.binary(min_size=1, max_size=64))
        elif kind == "delete":
            del data[at : at + draw(st.integers(1, 256))]
        elif kind == "repeat":
            span = bytes(data[at : at + draw(st.integers(1, 512))])
            data[at:at] = span * draw(st.integers(1, 3))
        else:
            data[at : at + draw(st.integers(1, 64))] = b""  # a hole closes up
    return bytes(data)


SUFFIXES = {"wav": ".wav", "flac": ".flac", "csv": ".csv", "txt": ".txt", "h5": ".h5"}


@pytest.mark.parametrize("fmt", list(SUFFIXES))
def test_mutated_bytes_decode_or_fail_cleanly(fmt: str) -> None:
    name = f"bytes-{fmt}"

    @FUZZ
    @given(data=st.data())
    def run(data: st.DataObject) -> None:
        blob = data.draw(mutated(valid_bytes(fmt)))
        # now and then under another reader's suffix: the content decides
        suffix = data.draw(st.sampled_from([SUFFIXES[fmt]] * 4 + list(SUFFIXES.values())))
        attempt(name, blob, suffix)

    run()
    report(name)


# --------------------------------------------------------------------------- lying WAV headers

#: (offset, struct format) of every field of a canonical 44-byte PCM WAV header
# source: RIFF WAVE (Microsoft/IBM Multimedia Programming Interface and Data Specifications 1.0,
# 1991): RIFF size @4, format tag @20, channels @22, rate @24, byte rate @28, block align @32,
# bits per sample @34, data size @40
WAV_FIELDS = [(4, "<I"), (20, "<H"), (22, "<H"), (24, "<I"), (28, "<I"), (32, "<H"), (34, "<H"),
              (40, "<I")]


@cache
def canonical_wav() -> bytes:
    """The simulated samples as a bare 44-byte-header 16-bit PCM WAV (no extra chunks)."""
    x, rate = _samples()
    pcm = np.clip(np.round(x * 32767), -32768, 32767).astype("<i2").tobytes()
    r = int(rate)
    fmt = struct.pack("<HHIIHH", 1, 2, r, r * 4, 4, 16)
    body = b"WAVE" + b"fmt " + struct.pack("<I", 16) + fmt + b"data" + struct.pack("<I", len(pcm))
    return b"RIFF" + struct.pack("<I", len(body) + len(pcm)) + body + pcm


def test_wav_header_fields_that_lie() -> None:
    name = "wav-header"
    base = canonical_wav()

    @FUZZ
    @given(
        fields=st.lists(
            st.tuples(
                st.sampled_from(WAV_FIELDS),
                st.one_of(
                    st.integers(0, 8),
                    st.sampled_from([0xFFFF, 0xFFFFFFFF, 0x7FFFFFFF, 65, 1024, 1 << 20]),
                    st.integers(0, 0xFFFFFFFF),
                ),
            ),
            min_size=1,
            max_size=3,
        )
    )
    def run(fields: list[tuple[tuple[int, str], int]]) -> None:
        data = bytearray(base)
        for (offset, fmt), value in fields:
            value &= 0xFFFF if fmt == "<H" else 0xFFFFFFFF
            data[offset : offset + struct.calcsize(fmt)] = struct.pack(fmt, value)
        attempt(name, bytes(data), ".wav")

    run()
    report(name)


# --------------------------------------------------------------------------- generated text


TOKENS = ["nan", "NaN", "inf", "-inf", "abc", "1e999", "-", "", " ", "1,5", "1.2.3", "0x1F",
          '"', "#", ";", "\t", "12V", "\u00b5s", "1e-320"]


@st.composite
def text_capture(draw: st.DrawFn) -> tuple[bytes, dict[str, object]]:
    """A delimited-text capture: the simulated samples (or noise) under a random dialect and
    header, with rows broken by injected tokens, lost or doubled lines and mixed delimiters."""
    x, rate = _samples()
    n = draw(st.integers(0, min(len(x), 3000)))
    cols = draw(st.integers(1, 3))
    rows = x[:n, :cols] if draw(st.booleans()) else np.round(
        np.random.default_rng(draw(st.integers(0, 99))).normal(size=(n, cols)), 3
    )
    delim = draw(st.sampled_from([",", ";", "\t", " ", "  "]))
    decimal = draw(st.sampled_from([".", ","]))
    with_time = draw(st.booleans())
    step = draw(st.sampled_from([1 / rate, 1e-3, 0.0, -1 / rate, 1 / (rate * 1.5)]))
    lines: list[str] = []
    for _ in range(draw(st.integers(0, 3))):
        lines.append(draw(st.sampled_from(
            ["# scope export", "Sample rate: 24000 Hz", "sample interval, 0", "units: s, V",
             "fs = -5", "dt = 1e-300", "%%", "// note"])))
    names = ["time"] * with_time + [f"ch{i} (V)" for i in range(cols)]
    names += draw(st.lists(st.sampled_from(["extra", "cam_ex"]), max_size=1))
    if draw(st.booleans()):
        lines.append(delim.join(names))

    def num(v: float) -> str:
        s = f"{v:.6g}"
        return s.replace(".", ",") if decimal == "," else s

    for i, r in enumerate(rows):
        fields = ([num(i * step)] if with_time else []) + [num(v) for v in r]
        lines.append(delim.join(fields))
    for _ in range(draw(st.integers(0, 4))):
        if not lines:
            break
        k = draw(st.integers(0, len(lines) - 1))
        action = draw(st.sampled_from(["token", "drop", "double", "delim", "cut"]))
        if action == "token":
            parts = lines[k].split(delim)
            parts[draw(st.integers(0, len(parts) - 1))] = draw(st.sampled_from(TOKENS))
            lines[k] = delim.join(parts)
        elif action == "drop":
            del lines[k]
        elif action == "double":
            lines.insert(k, lines[k])
        elif action == "delim":
            lines[k] = lines[k].replace(delim, draw(st.sampled_from([",", ";", "\t", " "])))
        else:
            lines[k] = lines[k][: draw(st.integers(0, len(lines[k])))]
    end = draw(st.sampled_from(["\n", "\r\n", ""]))
    text = "\n".join(lines) + end
    options: dict[str, object] = {}
    if draw(st.booleans()):
        options["sample_rate"] = draw(st.sampled_from([rate, 1.0, 1e9]))
    return text.encode(draw(st.sampled_from(["utf-8", "latin-1"])), errors="replace"), options


def test_generated_text_captures() -> None:
    name = "text"

    @FUZZ
    @given(case=text_capture(), suffix=st.sampled_from([".csv", ".txt", ".dat"]))
    def run(case: tuple[bytes, dict[str, object]], suffix: str) -> None:
        data, options = case
        attempt(name, data, suffix, **options)

    run()
    report(name)


# --------------------------------------------------------------------------- generated HDF5

DTYPES = ["f8", "f4", "i2", "u1", "i8", "c16", "S4", "bool", "f2"]
RATE_VALUES = [24_000.0, 0.0, -1.0, float("nan"), float("inf"), 1e-300, 1e300, "fast", b"24000",
               np.array([1.0, 2.0])]


@st.composite
def hdf5_capture(draw: st.DrawFn) -> tuple[bytes, str]:
    """An HDF5 file of random datasets (rank 0-3, any size up to a few thousand, odd types),
    rate attributes, channel name lists and the own-layout markers; and the path to read
    (the file, or ``file:/dataset``)."""
    x, _rate = _samples()
    path = _folder() / "gen.h5"
    inner = ""
    with h5py.File(path, "w") as f:
        if draw(st.booleans()):
            f.attrs["format"] = "toothcomb-capture"
            f.attrs["format_version"] = draw(st.sampled_from([1, 2, "1", 0]))
        for _ in range(draw(st.integers(0, 2))):
            key = draw(st.sampled_from(["sample_rate", "fs", "dt", "channel_names", "t0"]))
            f.attrs[key] = draw(st.sampled_from([*RATE_VALUES, ["crank", "cam"], ["x"]]))
        for i in range(draw(st.integers(0, 3))):
            rank = draw(st.integers(0, 3))
            shape = tuple(draw(st.integers(0, 3000 if rank == 1 else 40)) for _ in range(rank))
            dtype = draw(st.sampled_from(DTYPES))
            name = draw(st.sampled_from(["crank", "cam", "time", "x", f"d{i}"]))
            if name in f:
                continue
            size = int(np.prod(shape)) if shape else 1
            src = np.resize(x[:, i % 2], size).reshape(shape) * 100
            if dtype == "S4":
                value = np.resize(np.array([b"ab", b"1.5"]), shape)
                f.create_dataset(name, data=value)
            else:
                with np.errstate(all="ignore"):
                    f.create_dataset(name, data=src.astype(dtype))
            if draw(st.booleans()):
                f[name].attrs[draw(st.sampled_from(["fs", "units", "dt"]))] = draw(
                    st.sampled_from(RATE_VALUES)
                )
            if draw(st.integers(0, 3)) == 0:
                inner = f":/{name}"
        if draw(st.integers(0, 4)) == 0:
            # a dataset declaring far more samples than the file stores
            f.create_dataset(
                "huge", shape=(1 << draw(st.integers(20, 44)),), chunks=(4096,), dtype="f8"
            )
    return path.read_bytes(), inner


def test_generated_hdf5_files() -> None:
    name = "hdf5"

    @FUZZ
    @given(case=hdf5_capture(), given_rate=st.sampled_from([None, 24_000.0]))
    def run(case: tuple[bytes, str], given_rate: float | None) -> None:
        data, inner = case
        path = _folder() / f"{name}.h5"
        path.write_bytes(data)
        tracemalloc.start()
        try:
            decode_capture(str(path) + inner, DecodeOptions(sample_rate=given_rate))
            outcome = "decoded"
        except ToothcombError as exc:
            assert str(exc) and "\n" not in str(exc), repr(str(exc))
            outcome = type(exc).__name__
        finally:
            _now, peak = tracemalloc.get_traced_memory()
            tracemalloc.stop()
        assert peak < PEAK_BYTES, f"{peak / 2**20:.0f} MiB"
        OUTCOMES.setdefault(name, Counter())[outcome] += 1

    run()
    report(name)


def test_the_valid_bases_decode() -> None:
    """The inputs the mutations start from are good captures: what the fuzzing breaks is the
    file, not a capture that never decoded."""
    bases = {f"base{suffix}": valid_bytes(fmt) for fmt, suffix in SUFFIXES.items()}
    bases["canonical.wav"] = canonical_wav()
    for name, data in bases.items():
        path = _folder() / name
        path.write_bytes(data)
        result = decode_capture(str(path))
        assert result.crank.wheel == "60-2", name
        # source: the simulated speed: 1500 rpm
        assert result.crank.rpm.mean == pytest.approx(1500.0, rel=0.01), name
