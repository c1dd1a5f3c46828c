"""Oscilloscope and logger exports as delimited text (CSV, TXT).

What the reader works out from the file itself:

- the delimiter (comma, semicolon, tab or runs of spaces) and the decimal mark (point, or comma
  when the delimiter is a semicolon, a tab or spaces), from the rows of numbers;
- where the numbers start: comment lines (starting with ``#``, ``%``, ``//`` or ``;``), blank lines
  and free-text lines before them are skipped;
- channel names and units from a header row just before the numbers (``Time (s),CH1 (V),...``;
  ``[V]`` works too); unnamed columns become ``ch0``, ``ch1``, ...;
- the sample rate, in this order: the ``sample_rate`` argument (a time column is then ignored,
  with a note), a time column (a header such as ``time``, ``t``, ``time_s``, ``Time (ms)``,
  ``sec``, ``seconds``, or, without a header, a first column that rises by a fixed step), a
  metadata line ``<key> <separator> <value> [unit]`` in the lines before the numbers. Accepted
  keys (any case, ``_``/``-``/space alike): ``sample rate``, ``sampling rate``, ``samplerate``,
  ``sample frequency``, ``sampling frequency``, ``fs`` (Hz; kHz, MHz, S/s, kS/s, MS/s, Sa/s
  also understood) and ``sample interval``, ``sampling interval``, ``sample period``,
  ``sampling period``, ``time step``, ``dt`` (seconds; ms, us, ns also understood). A line
  ``units: V,V`` gives units when the header has none.

A time column must tick at a fixed interval: a step that differs from the fitted interval by more
than 1 % of it (allowing for the digits the stamps were printed with) is an error naming the line.

``open()`` parses the file once, chunk by chunk, to check every row and fit the clock: a file
over 16 MB by pyarrow's CSV reader when the ``fast-csv`` extra is installed, else by vectorised
readers where a chunk is plain (a time column printed at a fixed precision, with a point or in
scientific notation, read by integer arithmetic; channels with few distinct values read by
converting each distinct text once) and by numpy's C parser
where it is not or where that is faster (the same numbers every way); memory stays bounded
whatever the file size. The channels' values it parses are kept in an anonymous temporary file
(the *spool*, float64, removed by the system when it is closed or the process ends), so the
decode's passes read numbers instead of parsing text again, and can read windows anywhere in the
capture. Where the spool cannot be written (no room in the temporary folder), ``blocks()`` parses
the text again instead.
"""

from __future__ import annotations

import io
import math
import os
import re
import tempfile
import time
import warnings
from collections import Counter
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import CaptureError
from ..model import Block, CaptureInfo
from .base import (
    MAX_CHANNELS,
    ClockFit,
    IrregularClock,
    NotIncreasing,
    RegularClock,
    SourceBase,
    check_file,
    check_sample_rate,
    number_resolution,
    read_at,
    reject_options,
    tidy_rate,
)

EXTENSIONS: tuple[str, ...] = (".csv", ".txt", ".tsv", ".dat", ".asc")

#: line starts that mark a comment
COMMENT_PREFIXES: tuple[str, ...] = ("#", "%", "//", ";")

#: (delimiter, decimal mark) pairs tried, in order of preference on a tie; None = runs of spaces
DIALECTS: tuple[tuple[str | None, str], ...] = (
    (",", "."),  # the common CSV
    (";", "."),
    ("\t", "."),
    (None, "."),  # columns aligned with spaces
    (";", ","),  # decimal comma exports
    ("\t", ","),
    (None, ","),
)

#: bytes looked at to find the layout (more when the preamble is longer)
HEAD_BYTES = 64 * 1024
HEAD_BYTES_MAX = 1024 * 1024
#: bytes of text parsed at a time (the vectorised readers' passes over a chunk and the arrays
#: they make stay in the processor's cache: 2 MB chunks took 1.5-1.7 times as long)
CHUNK_BYTES = 512 * 1024
#: bytes of text pyarrow's CSV reader parses at a time (see :func:`_arrow_rows`)
ARROW_BLOCK_BYTES = 512 * 1024
#: bytes of the spool read at a time
SPOOL_READ_BYTES = 4 * 1024 * 1024
#: data rows looked at to sniff a time column and its print resolution
SNIFF_ROWS = 32
#: lines looked at to sniff the dialect
SNIFF_LINES = 200

_NUMBER = re.compile(r"[+-]?(?:(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?|inf(?:inity)?|nan)", re.I)
_PARTIAL = re.compile(r"[+-]?\d*\.?\d*(?:[eE][+-]?\d*)?")
_NAME_UNIT = re.compile(r"^(.*?)\s*[\(\[]\s*([^\)\]]*?)\s*[\)\]]\s*$")
_TIME_NAME = re.compile(
    r"(?:time|t|sec|secs|second|seconds|timestamp)(?:[ _\-]?(s|ms|us|µs|μs|ns))?", re.I
)
_INDEX_NAME = re.compile(r"(?:index|idx|sample|samples|sample no|n|no|nr|#)", re.I)
_TIME_SCALE = {"s": 1.0, "sec": 1.0, "ms": 1e-3, "us": 1e-6, "µs": 1e-6, "μs": 1e-6, "ns": 1e-9}
_RATE_KEYS = frozenset(
    {
        "sample rate",
        "sampling rate",
        "samplerate",
        "sample frequency",
        "sampling frequency",
        "fs",
    }
)
_INTERVAL_KEYS = frozenset(
    {"sample interval", "sampling interval", "sample period", "sampling period", "time step", "dt"}
)
_RATE_UNITS = {
    "": 1.0,
    "hz": 1.0,
    "khz": 1e3,
    "mhz": 1e6,
    "ghz": 1e9,
    "s/s": 1.0,
    "sa/s": 1.0,
    "sps": 1.0,
    "ks/s": 1e3,
    "ksa/s": 1e3,
    "ms/s": 1e6,
    "msa/s": 1e6,
    "gs/s": 1e9,
    "gsa/s": 1e9,
}
_INTERVAL_UNITS = {"": 1.0, "s": 1.0, "ms": 1e-3, "us": 1e-6, "µs": 1e-6, "μs": 1e-6, "ns": 1e-9}
_META = re.compile(
    r"""^\s*"?(?P<key>[A-Za-z][A-Za-z _\-]*?)
        (?:\s*[\(\[](?P<kunit>[A-Za-zµμ/]+)[\)\]])?"?\s*(?:[:=,;\t]\s*|\s+)"?
        (?P<value>[+-]?(?:\d+(?:[.,]\d*)?|[.,]\d+)(?:[eE][+-]?\d+)?)"?\s*
        (?P<unit>[A-Za-zµμ/]*)\s*$""",
    re.X,
)
_UNITS_LINE = re.compile(r"^\s*units?\s*[:=]\s*(?P<rest>.+)$", re.I)


@dataclass(frozen=True)
class _Line:
    """One line of the sniffed head of the file."""

    number: int  # 1-based line number
    offset: int  # byte offset of its first byte
    text: str  # without the line end


@dataclass
class _Layout:
    """Everything the sniff found out; the parse passes follow it."""

    delimiter: str | None
    decimal: str
    n_fields: int
    trailing: bool
    data_offset: int
    data_line: int
    names: list[str] = field(default_factory=list)
    units: list[str] = field(default_factory=list)
    time_col: int | None = None
    time_name: str = ""
    time_scale: float = 1.0
    index_col: int | None = None
    meta_rate: float | None = None
    meta_units: list[str] | None = None
    resolution: float = 0.0
    notes: list[str] = field(default_factory=list)

    @property
    def channel_cols(self) -> list[int]:
        drop = {self.time_col, self.index_col}
        return [i for i in range(self.n_fields) if i not in drop]

    @property
    def comments(self) -> list[str]:
        return [p for p in COMMENT_PREFIXES if p != self.delimiter]


def _is_comment(text: str) -> bool:
    return text.lstrip().startswith(COMMENT_PREFIXES)


def _strip_comment_prefix(text: str) -> str:
    s = text.lstrip()
    for p in COMMENT_PREFIXES:
        if s.startswith(p):
            return s[len(p) :].lstrip("#%/; \t")
    return s


def _split(text: str, delimiter: str | None) -> list[str]:
    parts = text.split() if delimiter is None else text.split(delimiter)
    return [p.strip().strip('"').strip() for p in parts]


def _is_number(field_text: str, decimal: str) -> bool:
    if decimal == ",":
        if "." in field_text:
            return False
        field_text = field_text.replace(",", ".")
    return _NUMBER.fullmatch(field_text) is not None


def _data_fields(text: str, dialect: tuple[str | None, str]) -> list[str] | None:
    """The fields of ``text`` if it is a row of numbers in ``dialect`` (trailing empty field
    kept as ''), else None."""
    delim, dec = dialect
    if delim == "," and dec == ",":
        return None
    fields = _split(text, delim)
    core = fields[:-1] if len(fields) > 1 and fields[-1] == "" else fields
    if not core or not all(_is_number(f, dec) for f in core):
        return None
    return fields


def _head_lines(buf: bytes, whole: bool, encoding: str) -> list[_Line]:
    out: list[_Line] = []
    pos = 0
    number = 1
    parts = buf.split(b"\n")
    if not whole:
        parts = parts[:-1]  # the last one may be cut
    elif parts and parts[-1] == b"":
        parts = parts[:-1]
    for raw in parts:
        text = raw.rstrip(b"\r").decode(encoding, errors="replace")
        out.append(_Line(number, pos, text))
        pos += len(raw) + 1
        number += 1
    return out


def _pick_dialect(body: list[_Line]) -> tuple[tuple[str | None, str], int, int, bool] | None:
    """Choose the dialect under which most sniffed lines are rows of numbers of one shape.

    Returns (dialect, index in ``body`` of the first such row, field count, trailing delimiter).
    Later lines of another shape are left for the parse pass to report.
    """
    body = body[:SNIFF_LINES]
    best: tuple[tuple[int, int, int, int], tuple[str | None, str], int, int, bool] | None = None
    for order, dialect in enumerate(DIALECTS):
        shapes: list[tuple[int, bool] | None] = []
        for ln in body:
            fields = _data_fields(ln.text, dialect)
            if fields is None:
                shapes.append(None)
                continue
            tr = len(fields) > 1 and fields[-1] == ""
            shapes.append((len(fields) - int(tr), tr))
        counts = Counter(sh for sh in shapes if sh is not None)
        if not counts:
            continue
        (count, trailing), freq = counts.most_common(1)[0]
        start = shapes.index((count, trailing))
        header_match = 0
        if start > 0:
            prev = _split(_strip_comment_prefix(body[start - 1].text), dialect[0])
            if trailing and len(prev) > 1 and prev[-1] == "":
                prev = prev[:-1]
            header_match = int(len(prev) == count)
        key = (freq, header_match, count, -order)
        if best is None or key > best[0]:
            best = (key, dialect, start, count, trailing)
    if best is None:
        return None
    return best[1], best[2], best[3], best[4]


def _stamp_resolution(values: Sequence[str]) -> float:
    """Typical print resolution of time stamps (median over the non-zero ones)."""
    res = []
    for v in values:
        t = v.replace(",", ".")
        if _NUMBER.fullmatch(t) and float(t) != 0.0:
            res.append(number_resolution(t))
    return float(np.median(res)) if res else 0.0


def _name_unit(text: str) -> tuple[str, str]:
    m = _NAME_UNIT.match(text)
    if m:
        return m.group(1).strip().strip('"'), m.group(2).strip()
    return text.strip().strip('"'), ""


def _looks_like_units(fields: Sequence[str]) -> bool:
    return all(re.fullmatch(r"[\(\[]?[A-Za-zµμ°%/]{0,6}[\)\]]?", f) for f in fields) and any(fields)


def _header_fields(text: str, delimiter: str | None, n: int, trailing: bool) -> list[str] | None:
    fields = _split(text, delimiter)
    if trailing and len(fields) > 1 and fields[-1] == "":
        fields = fields[:-1]
    if len(fields) != n and delimiter is None:
        fields = [f.strip().strip('"') for f in re.split(r"\s{2,}|\t", text.strip())]
    if len(fields) != n:
        return None
    return fields


def _parse_meta(lines: list[_Line], layout: _Layout, shown: str) -> None:
    """Sample rate / interval / units lines in the preamble."""
    for line in lines:
        text = _strip_comment_prefix(line.text)
        um = _UNITS_LINE.match(text)
        if um:
            parts = re.split(r"[,;\t]|\s+", um.group("rest").strip())
            layout.meta_units = [u for u in (p.strip().strip('"()[]') for p in parts) if u]
            continue
        m = _META.match(text)
        if not m:
            continue
        key = re.sub(r"[\s_\-]+", " ", m.group("key").strip().lower())
        value = float(m.group("value").replace(",", "."))
        unit = (m.group("unit") or m.group("kunit") or "").lower()
        if key in _RATE_KEYS and unit in _RATE_UNITS:
            rate = value * _RATE_UNITS[unit]
        elif key in _INTERVAL_KEYS and unit in _INTERVAL_UNITS:
            dt = value * _INTERVAL_UNITS[unit]
            if not dt > 0:
                raise CaptureError(
                    f"{shown}: line {line.number} gives a sample interval of {m.group('value')} "
                    "which is not positive; fix it or pass --sample-rate"
                )
            rate = 1.0 / dt
        else:
            continue
        if not (math.isfinite(rate) and rate > 0):
            raise CaptureError(
                f"{shown}: line {line.number} gives a sample rate of {m.group('value')} "
                "which is not positive; fix it or pass --sample-rate"
            )
        layout.meta_rate = tidy_rate(rate)


def _find_header(pre: list[_Line], layout: _Layout) -> None:
    """Channel names and units from the row(s) just before the numbers."""
    n = layout.n_fields
    cands = [
        ln
        for ln in pre
        if ln.text.strip()
        and not _META.match(_strip_comment_prefix(ln.text))
        and not _UNITS_LINE.match(_strip_comment_prefix(ln.text))
    ]
    if not cands or (n == 1 and _is_comment(cands[-1].text)):
        return
    last = cands[-1]
    text = _strip_comment_prefix(last.text) if _is_comment(last.text) else last.text
    fields = _header_fields(text, layout.delimiter, n, layout.trailing)
    unit_row: list[str] | None = None
    if fields is not None and _looks_like_units(fields) and len(cands) >= 2:
        above = cands[-2]
        t2 = _strip_comment_prefix(above.text) if _is_comment(above.text) else above.text
        f2 = _header_fields(t2, layout.delimiter, n, layout.trailing)
        if f2 is not None and not all(_is_number(f, layout.decimal) for f in f2 if f):
            unit_row = [f.strip("()[]") for f in fields]
            fields = f2
    if fields is None or all(_is_number(f, layout.decimal) for f in fields if f):
        return
    names, units = [], []
    for f in fields:
        name, unit = _name_unit(f)
        names.append(name)
        units.append(unit)
    if unit_row is not None:
        units = [u or r for u, r in zip(units, unit_row, strict=True)]
    layout.names, layout.units = names, units


#: a field that reads as a column name (not a number, not a sentence)
_NAME_FIELD = re.compile(r"[^\W\d]\S*(?: \S+){0,3}|#")


def _check_header_count(pre: list[_Line], layout: _Layout, shown: str) -> None:
    """Refuse a header row, right above the numbers, that names a different number of columns
    than the rows hold (so names and units would land on the wrong channels).

    Only for an explicit delimiter: with columns aligned by spaces a line of free text splits
    into words just like a header does.
    """
    if layout.names or layout.delimiter is None:
        return
    filled = [ln for ln in pre if ln.text.strip()]
    if not filled or filled[-1].number != layout.data_line - 1:
        return
    last = filled[-1]
    text = last.text
    if _is_comment(text) or _META.match(text) or _UNITS_LINE.match(text):
        return
    fields = _split(text, layout.delimiter)
    if layout.trailing and len(fields) > 1 and fields[-1] == "":
        fields = fields[:-1]
    n = layout.n_fields
    if len(fields) < 2 or len(fields) == n:
        return
    if not all(_NAME_FIELD.fullmatch(f) for f in fields):
        return
    hint = ""
    if layout.delimiter == "," and len(fields) < n <= 2 * len(fields):
        hint = " (decimal commas under a comma delimiter split each value in two: export with ';')"
    raise CaptureError(
        f"{shown}: the header on line {last.number} names {len(fields)} columns "
        f"({_quote(text)}) but the rows below hold {n} values{hint}; give every column one name"
    )


def _classify_columns(layout: _Layout, rows: list[list[str]]) -> None:
    """Find the time (and sample index) column by name, else by a fixed step in column 0."""
    for i, name in enumerate(layout.names):
        m = _TIME_NAME.fullmatch(name.strip())
        if m:
            unit = (m.group(1) or layout.units[i] or "s").lower()
            if unit not in _TIME_SCALE:
                layout.notes.append(f"time column {name!r} has unit {unit!r}; read as seconds")
                unit = "s"
            layout.time_col, layout.time_name, layout.time_scale = i, name, _TIME_SCALE[unit]
            break
    for i, name in enumerate(layout.names):
        if i != layout.time_col and _INDEX_NAME.fullmatch(name.strip()):
            layout.index_col = i
            layout.notes.append(f"column {name!r} holds sample numbers and is not a channel")
            break
    if layout.names or layout.n_fields < 2 or len(rows) < 3:
        return
    try:
        col = np.array([float(r[0].replace(",", ".")) for r in rows])
    except ValueError:
        return
    if not np.all(np.isfinite(col)):  # 'inf' or 'nan' in the first column: not a clock
        return
    steps = np.diff(col)
    mean = float(np.mean(steps))
    res = _stamp_resolution([r[0] for r in rows])
    if not (mean > 0 and np.all(np.abs(steps - mean) <= 0.01 * mean + res)):
        return
    if np.all(col == np.round(col)) and mean == 1.0:
        layout.index_col = 0
        layout.notes.append("column 1 counts samples and is not a channel")
        return
    scale = 1.0
    if layout.meta_rate is not None:
        # a rising first column is the time only if it agrees with the stated rate
        fits = [k for k in (1.0, 1e-3, 1e-6, 1e-9) if abs(mean * k * layout.meta_rate - 1) < 0.01]
        if not fits:
            return
        scale = fits[0]
    layout.time_col, layout.time_name, layout.time_scale = 0, "column 1", scale


def _channel_names(layout: _Layout) -> tuple[str, ...]:
    out: list[str] = []
    for k, col in enumerate(layout.channel_cols):
        name = layout.names[col] if layout.names else ""
        base = name or f"ch{k}"
        cand, j = base, 2
        while cand in out:
            cand, j = f"{base}_{j}", j + 1
        out.append(cand)
    return tuple(out)


def _encoding(head: bytes) -> str:
    try:
        head.decode("utf-8")
        return "utf-8"
    except UnicodeDecodeError as exc:
        # a multi-byte character cut by the end of the window is still UTF-8
        if exc.start >= len(head) - 3 and exc.reason == "unexpected end of data":
            return "utf-8"
        return "latin-1"


def _sniff(path: Path, shown: str, *, strict: bool) -> _Layout | None:
    """Work out the layout from the head of the file. With ``strict`` a file that does not fit
    raises :class:`CaptureError`; otherwise None is returned."""
    size = path.stat().st_size
    limit = HEAD_BYTES
    while True:
        with open(path, "rb") as f:
            head = f.read(limit)
        whole = len(head) >= size
        bom = 0
        if head.startswith((b"\xff\xfe", b"\xfe\xff")) or head[:64].count(b"\x00") > 8:
            if strict:
                raise CaptureError(
                    f"{shown}: looks like UTF-16 or binary data, not text; save the export as "
                    "plain text (UTF-8 or ASCII)"
                )
            return None
        if b"\x00" in head:
            if strict:
                raise CaptureError(f"{shown}: holds binary data, not delimited text")
            return None
        if head.startswith(b"\xef\xbb\xbf"):
            bom = 3
        encoding = _encoding(head[bom:])
        lines = _head_lines(head[bom:], whole, encoding)
        body = [ln for ln in lines if ln.text.strip() and not _is_comment(ln.text)]
        picked = _pick_dialect(body)
        if picked is not None or whole or limit >= HEAD_BYTES_MAX:
            break
        limit = HEAD_BYTES_MAX
    if picked is None:
        if strict and not whole and sum(len(ln.text) for ln in lines) < len(head) // 2:
            raise CaptureError(
                f"{shown}: line {len(lines) + 1} runs on for more than {len(head) / 2**20:g} MiB "
                "without a line end; a capture export has one short row of numbers per sample"
            )
        if strict:
            looked = f"the first {len(lines)} lines" if not whole else "any line"
            raise CaptureError(
                f"{shown}: found no rows of numbers in {looked}; a capture export needs one row "
                "of numbers per sample (e.g. '0.000021,1.25,0.03')"
            )
        return None
    (delim, dec), start, count, trailing = picked
    first = body[start]
    layout = _Layout(
        delimiter=delim,
        decimal=dec,
        n_fields=count,
        trailing=trailing,
        data_offset=first.offset + bom,
        data_line=first.number,
    )
    pre = [ln for ln in lines if ln.number < first.number]
    _parse_meta(pre, layout, shown)
    _find_header(pre, layout)
    if strict:
        _check_header_count(pre, layout, shown)
    if layout.n_fields > MAX_CHANNELS + 2:  # a time and an index column besides the channels
        raise CaptureError(
            f"{shown}: the rows from line {layout.data_line} on hold {layout.n_fields} values "
            f"each; toothcomb reads at most {MAX_CHANNELS} channels, so export only the crank "
            "and cam channels"
        )
    sample = [ln for ln in body[start : start + SNIFF_ROWS]]
    rows = [f for f in (_data_fields(ln.text, (delim, dec)) for ln in sample) if f is not None]
    _classify_columns(layout, rows)
    if layout.time_col is not None:
        head_res = _stamp_resolution([r[layout.time_col] for r in rows])
        tail_res = _stamp_resolution(_tail_stamps(path, size, layout))
        layout.resolution = max(head_res, tail_res) * layout.time_scale
    return layout


def _tail_stamps(path: Path, size: int, layout: _Layout) -> list[str]:
    """Time stamps of the last rows, as printed (larger numbers may carry fewer decimals)."""
    if layout.time_col is None or size <= HEAD_BYTES:
        return []
    with open(path, "rb") as f:
        f.seek(max(0, size - 8192))
        tail = f.read().decode("latin-1").splitlines()[1:]
    out = []
    for text in tail[-SNIFF_ROWS:]:
        fields = _data_fields(text, (layout.delimiter, layout.decimal))
        if fields is not None and len(fields) > layout.time_col:
            out.append(fields[layout.time_col])
    return out


@dataclass
class _Chunk:
    """A run of whole lines of the data part of the file."""

    offset: int
    #: the number of its first line; None when not counted (see :attr:`line`)
    first_line: int | None
    raw: bytes
    at_eof: bool
    #: the file and where its data part starts, to count the lines before the chunk on demand
    path: Path | None = None
    layout: _Layout | None = None

    @property
    def line(self) -> int:
        """The number of the chunk's first line (counted in the file when it was not, which
        only an error message needs)."""
        if self.first_line is None:
            assert self.path is not None and self.layout is not None
            count = 0
            with open(self.path, "rb") as f:
                f.seek(self.layout.data_offset)
                left = self.offset - self.layout.data_offset
                while left > 0 and (piece := f.read(min(left, CHUNK_BYTES))):
                    count += piece.count(b"\n")
                    left -= len(piece)
            self.first_line = self.layout.data_line + count
        return self.first_line


def _chunks(path: Path, layout: _Layout, count_lines: bool = True) -> Iterator[_Chunk]:
    """The data part of the file in chunks of whole lines; without ``count_lines`` their line
    numbers are counted only when asked for (:attr:`_Chunk.line`)."""
    with open(path, "rb") as f:
        size = os.fstat(f.fileno()).st_size
        f.seek(layout.data_offset)
        line = layout.data_line
        offset = layout.data_offset
        while True:
            raw = f.read(CHUNK_BYTES)
            if not raw:
                return
            if not raw.endswith(b"\n"):
                raw += f.readline()
            at_eof = f.tell() >= size
            if count_lines:
                yield _Chunk(offset, line, raw, at_eof)
                line += raw.count(b"\n")
            else:
                yield _Chunk(offset, None, raw, at_eof, path, layout)
            offset += len(raw)
            if at_eof:
                return


def _quote(text: str, limit: int = 40) -> str:
    text = text.strip()
    return repr(text if len(text) <= limit else text[:limit] + "...")


def _bad_line(chunk: _Chunk, layout: _Layout, shown: str, detail: str) -> CaptureError:
    """Find the first line of ``chunk`` the parser rejects and describe it."""
    text = chunk.raw.decode("latin-1")
    lines = text.split("\n")
    if lines and lines[-1] == "":
        lines.pop()
    last_data = len(lines) - 1
    while last_data >= 0 and not _clean(lines[last_data], layout):
        last_data -= 1
    expected = layout.n_fields
    for k, line in enumerate(lines):
        body = _clean(line, layout)
        if not body:
            continue
        number = chunk.line + k
        fields = _split(body, layout.delimiter)
        if layout.trailing and len(fields) > 1 and fields[-1] == "":
            fields = fields[:-1]
        numeric = [_is_number(f, layout.decimal) for f in fields]
        if len(fields) == expected and all(numeric):
            continue
        is_last = chunk.at_eof and k == last_data
        partial = all(numeric[:-1]) and (
            numeric[-1] or _PARTIAL.fullmatch(fields[-1].replace(",", ".")) is not None
        )
        if is_last and partial and (len(fields) < expected or not numeric[-1]):
            return CaptureError(
                f"{shown}: the file looks truncated at line {number} ({_quote(line)} has "
                f"{len(fields)} of {expected} values); export or copy it again"
            )
        if len(fields) != expected:
            return CaptureError(
                f"{shown}: line {number} has {len(fields)} value{'s' if len(fields) != 1 else ''} "
                f"where the rows above have "
                f"{expected} ({_quote(line)}); fix or delete that line"
            )
        bad = fields[numeric.index(False)]
        return CaptureError(
            f"{shown}: line {number} holds {bad!r}, which is not a number ({_quote(line)}); "
            "fix or delete that line"
        )
    return CaptureError(f"{shown}: cannot parse the lines from {chunk.line} on ({detail})")


def _clean(line: str, layout: _Layout) -> str:
    """A line without its comment part and line end; '' for blank and comment lines."""
    s = line.rstrip("\r")
    for p in layout.comments:
        k = s.find(p)
        if k >= 0:
            s = s[:k]
    return s.strip()


def _parse(
    chunk: _Chunk,
    layout: _Layout,
    shown: str,
    usecols: Sequence[int] | None = None,
    plain: bool = False,
) -> np.ndarray:
    """Parse one chunk into an (n, columns) float64 array, or raise naming the bad line. The
    text stays bytes (numpy's C parser reads them as Latin-1, faster than a decoded string);
    ``plain``: the chunk is known to hold no quote and no comment."""
    raw = chunk.raw
    if layout.decimal == ",":
        raw = raw.replace(b",", b".")
    if not plain and b'"' in raw:
        raw = raw.replace(b'"', b"")  # quoted numbers: a number never holds a delimiter
    if not plain and _has_comment(raw, layout):
        # rare: comments among the numbers; numpy's C parser takes no list of markers
        lines = raw.decode("latin-1").split("\n")
        raw = "\n".join(_clean(line, layout) for line in lines).encode("latin-1")
    cols = usecols
    if cols is None and layout.trailing:
        cols = range(layout.n_fields)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)
            data = np.loadtxt(
                io.BytesIO(raw),
                encoding="latin-1",
                dtype=np.float64,
                delimiter=layout.delimiter,
                comments=None,
                usecols=cols,
                ndmin=2,
            )
    except ValueError as exc:
        raise _bad_line(chunk, layout, shown, str(exc)) from None
    want = len(cols) if cols is not None else layout.n_fields
    if data.shape[0] and data.shape[1] != want:
        raise _bad_line(chunk, layout, shown, f"{data.shape[1]} columns")
    return data


def _has_comment(raw: bytes, layout: _Layout) -> bool:
    # a marker's first character is looked for first: a search for one byte is several
    # times faster than one for several, and numbers hold none of them
    return any(
        m[:1] in raw and m in raw for m in (c.encode("latin-1") for c in layout.comments)
    )


#: zero bytes at least after a plain chunk's own (see :class:`_Fields`): the words read at a
#: field's start stay inside the buffer
PAD = 16


@dataclass(frozen=True)
class _Fields:
    """Where the fields of a plain chunk lie: every line ends in a newline and holds exactly the
    layout's number of fields (no quote, comment, carriage return or zero byte)."""

    b: np.ndarray  # the chunk's bytes, then zero bytes (see :func:`_padded`)
    seps: np.ndarray  # the delimiter or newline that ends each field, line after line
    n: int  # fields per line

    def words_at(self, starts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The 16 bytes from each of ``starts`` as two little-endian 64-bit words, read from
        the buffer's aligned words (gathering those and shifting takes less time than a
        gather of words at any byte offset)."""
        aligned = self.b.view("<u8")
        q = starts >> 3
        right = (starts.view(np.uint64) & np.uint64(7)) << np.uint64(3)
        left = np.uint64(63) - right  # then one more: a shift by 64 is not defined
        one = np.uint64(1)
        a0, a1, a2 = aligned[q], aligned[q + 1], aligned[q + 2]
        w0 = (a0 >> right) | ((a1 << left) << one)
        w1 = (a1 >> right) | ((a2 << left) << one)
        return w0, w1

    def tails(self, ends: np.ndarray, width: int) -> np.ndarray:
        """The ``width`` bytes (16 or 32) before each of ``ends``, as the rows of a uint8
        matrix: a field that ends there has its last byte in the last column (zeros stand
        before the chunk's first byte)."""
        m = np.empty((len(ends), width // 8), np.uint64)
        for j in range(0, width // 8, 2):
            m[:, j], m[:, j + 1] = self.words_at(np.maximum(ends - (width - 8 * j), 0))
        out = m.view(np.uint8)
        for i in np.flatnonzero(ends < width).tolist():  # the chunk's first row or two
            e = int(ends[i])
            out[i] = np.frombuffer(bytes(width - e) + self.b[:e].tobytes(), np.uint8)
        return out

    @property
    def rows(self) -> int:
        return len(self.seps) // self.n

    def ends(self, col: int) -> np.ndarray:
        return self.seps[col :: self.n]

    def starts(self, col: int) -> np.ndarray:
        if col > 0:
            return self.seps[col - 1 :: self.n] + 1
        out = np.empty(self.rows, dtype=self.seps.dtype)
        out[0] = 0
        out[1:] = self.seps[self.n - 1 :: self.n][:-1] + 1
        return out


def _padded(raw: bytes) -> np.ndarray:
    """``raw`` as bytes then at least :data:`PAD` zero bytes, a multiple of 8 bytes long."""
    return np.frombuffer(raw + bytes(PAD + (-len(raw)) % 8), dtype=np.uint8)


def _fields(raw: bytes, layout: _Layout) -> _Fields | None:
    """The fields of a chunk when it is plain (see :class:`_Fields`), else None."""
    delim = layout.delimiter
    if delim is None or len(delim) != 1 or layout.decimal != "." or layout.trailing:
        return None
    if not raw.endswith(b"\n") or b"\r" in raw or b"\0" in raw:
        return None
    b = _padded(raw)
    is_nl = b == 10
    seps = np.flatnonzero(is_nl | (b == ord(delim)))
    n = layout.n_fields
    rows = len(seps) // n
    if rows == 0 or len(seps) != rows * n or not np.all(is_nl[seps[n - 1 :: n]]):
        return None  # a line with too many or too few fields
    return _Fields(b, seps, n)


#: most digits of a time stamp :func:`_plain_first_column` reads (their integer stays below
#: 2**53, so it is exact as a float)
PLAIN_DIGITS = 15


def _plain_first_column(f: _Fields) -> np.ndarray | None:
    """The first column of a plain chunk, read without a text parser when every first field
    has the same width and is made of digits with a decimal point at the same place (and the
    same sign), as a scope prints its time column. None otherwise.

    The values are those of a correctly rounded conversion, as numpy's own parser gives: with at
    most 15 digits the digits form an integer below 2**53 (exact as a float), the power of ten
    that places the point is exact up to 10**22, and one IEEE division of two exact values is
    correctly rounded (the fast path of W. D. Clinger, "How to Read Floating Point Numbers
    Accurately", PLDI 1990).

    >>> lay = _Layout(",", ".", 2, False, 0, 1)
    >>> _plain_first_column(_fields(b"0.0010,5\\n0.0015,6\\n", lay)).tolist()
    [0.001, 0.0015]
    >>> _plain_first_column(_fields(b"1e-3,5\\n", lay)) is None
    True
    """
    b = f.b
    starts = f.starts(0)
    w = int(f.seps[0])
    if not 1 <= w <= PLAIN_DIGITS + 2 or np.any(f.ends(0) - starts != w):
        return None
    head = bytes(b[:w])
    if not _is_decimal(head):
        return None  # at once: the checks below read every row
    sign = 1 if head[:1] == b"-" else 0
    dot = head.find(b".")
    if head.count(b".") > 1:
        return None
    end_whole = dot if dot >= 0 else w
    places = w - 1 - dot if dot >= 0 else 0
    if not 1 <= end_whole - sign + places <= PLAIN_DIGITS:
        return None
    for c in (0,) * sign + (dot,) * (dot >= 0):  # the sign and the point, where every row has
        if not np.all(b[starts + c] == head[c]):  # the first row's
            return None
    whole = _digit_run(b, starts, sign, end_whole - sign)
    after = _digit_run(b, starts, end_whole + 1, places)
    if whole is None or after is None:
        return None
    values = (whole * 10**places + after).astype(np.float64) / float(10**places)
    return -values if sign else values


def _is_decimal(text: bytes) -> bool:
    """Whether ``text`` is digits with a point or not and a sign or not ("-0.5", "+.5", "12.").

    >>> [_is_decimal(t) for t in (b"-0.5", b"+.5", b"12.", b"1e3", b"-", b".", b"1.2.3")]
    [True, True, True, False, False, False, False]
    """
    digits = text[1:] if text[:1] in (b"-", b"+") else text
    digits = digits.replace(b".", b"", 1)
    return digits.isdigit()  # bytes: ASCII digits only


def _digit_run(b: np.ndarray, first: np.ndarray, offset: int, count: int) -> np.ndarray | None:
    """The integer that the ``count`` bytes from ``offset`` after each of ``first`` make as
    decimal digits (int64), or None when one of them is not a digit.

    >>> _digit_run(np.frombuffer(b"x12y07", np.uint8), np.array([0, 3]), 1, 2).tolist()
    [12, 7]
    """
    out = np.zeros(len(first), dtype=np.int64)
    for c in range(offset, offset + count):
        col = b[first + c] - np.uint8(ord("0"))  # wraps below '0': anything not a digit is > 9
        if np.any(col > 9):
            return None
        out *= 10
        out += col
    return out


#: the powers of ten a double holds exactly: 10**22 is the last (5**22 < 2**53)
_EXACT_TENS = np.array([10.0**k for k in range(23)])
#: a number in scientific notation, as :func:`_scientific_column` takes it apart
_SCIENTIFIC = re.compile(r"[+-]?(\d*)(\.?)(\d*)[eE]([+-]?)(\d{1,3})")


def _scientific_column(f: _Fields, col: int = 0) -> np.ndarray | None:
    """Column ``col`` of a plain chunk printed in scientific notation at a fixed precision, as
    many scopes print their time column and some their channels ("-2.500000e-03",
    "1.2500E+00"): every field laid out as the first one counted from its end (the mantissa's
    digits and point, the exponent mark, the exponent's sign and digits), with or without a
    sign in front. None otherwise.

    The values are those of a correctly rounded conversion, as numpy's own parser gives: the
    mantissa's digits (at most 15) form an integer below 2**53, exact as a float; with k the
    exponent less the digits after the point, 10**|k| is exact for |k| <= 22, and one IEEE
    multiplication or division of two exact values is correctly rounded (the fast path of
    W. D. Clinger, "How to Read Floating Point Numbers Accurately", PLDI 1990); a chunk with a
    larger |k| is left to numpy's parser.

    >>> lay = _Layout(",", ".", 2, False, 0, 1)
    >>> _scientific_column(_fields(b"-2.5e-03,5\\n2.5e-03,6\\n1.0E+01,7\\n", lay)).tolist()
    [-0.0025, 0.0025, 10.0]
    >>> _scientific_column(_fields(b"0.001,5.0e-1\\n", lay)) is None
    True
    >>> _scientific_column(_fields(b"0.001,5.0e-01\\n0.002,-1.5E+00\\n", lay), 1).tolist()
    [0.5, -1.5]
    """
    b = f.b
    starts, ends = f.starts(col), f.ends(col)
    head = bytes(b[starts[0] : ends[0]]).decode("latin-1")
    m = _SCIENTIFIC.fullmatch(head)
    if m is None or not (m.group(1) or m.group(3)):
        return None
    whole, point, frac, exp_sign, exp = m.groups()
    if len(whole) + len(frac) > PLAIN_DIGITS:
        return None
    body = len(head) - (1 if head[0] in "+-" else 0)  # the part every field has, from its end
    width = ends - starts
    signed = width == body + 1
    if not np.all(signed | (width == body)):
        return None
    # the last bytes of every field, its last in the last column: the body's characters and
    # the sign before it sit in the same columns in every row
    t = f.tails(ends, 16 if body < 16 else 32)
    at = t.shape[1] - body  # the body's first column
    whole_cols = np.arange(at, at + len(whole))
    at += len(whole) + len(point)
    mantissa = _digit_columns(t, np.r_[whole_cols, at : at + len(frac)])
    if mantissa is None or (point and not np.all(t[:, at - 1] == ord("."))):
        return None
    at += len(frac)
    if not np.all(t[:, at] | np.uint8(0x20) == ord("e")):  # e or E
        return None
    at += 1
    exp_negative = np.zeros(len(ends), dtype=bool)
    if exp_sign:
        exp_negative = t[:, at] == ord("-")
        if not np.all(exp_negative | (t[:, at] == ord("+"))):
            return None
        at += 1
    power = _digit_columns(t, np.arange(at, at + len(exp)))
    if power is None:
        return None
    k = np.where(exp_negative, -power, power) - len(frac)
    if np.any(np.abs(k) > 22):
        return None
    tens = _EXACT_TENS[np.abs(k).astype(np.intp)]
    values = np.where(k >= 0, mantissa * tens, mantissa / tens)
    sign = t[:, t.shape[1] - body - 1]
    negative = signed & (sign == ord("-"))
    if not np.all(negative | ~signed | (sign == ord("+"))):
        return None
    return np.where(negative, -values, values)


def _digit_columns(t: np.ndarray, cols: np.ndarray) -> np.ndarray | None:
    """The integer (as float64, exact below 2**53) that columns ``cols`` of the byte matrix
    ``t`` make as decimal digits in each row, or None when one of them is not a digit.

    >>> _digit_columns(np.frombuffer(b"x12y07", np.uint8).reshape(2, 3), np.array([1, 2]))
    array([12.,  7.])
    """
    digits = t[:, cols] - np.uint8(ord("0"))  # wraps below '0': anything not a digit is > 9
    if len(cols) and digits.max() > 9:
        return None
    # every product and partial sum is an integer below 2**53: exact in any order
    return digits.astype(np.float64) @ 10.0 ** np.arange(len(cols) - 1, -1, -1)


def _decimal_column(f: _Fields, col: int) -> np.ndarray | None:
    """Column ``col`` of a plain chunk when every field is a decimal number with as many digits
    after the point as the first field (none, and no point, when it has none), any number of
    digits before it and a sign or not: what a scope or a logger prints with a fixed number of
    decimals ("0.02832", "-1.40625", "12345"). At most :data:`PLAIN_DIGITS` digits. None
    otherwise.

    The fields are read from their ends: the digits after the point and the point sit at the
    same distance from every field's end, and the digits before it are taken one place at a
    time, as far as the longest. The values are correctly rounded, as numpy's own parser gives
    them (the fast path of Clinger, 1990, as in :func:`_plain_first_column`).

    >>> lay = _Layout(",", ".", 3, False, 0, 1)
    >>> f = _fields(b"0.1,-0.50,7\\n0.2,12.25,-12\\n0.3,+.75,0\\n", lay)
    >>> _decimal_column(f, 1).tolist(), _decimal_column(f, 2).tolist()
    ([-0.5, 12.25, 0.75], [7.0, -12.0, 0.0])
    >>> _decimal_column(_fields(b"0.1,0.5\\n0.2,0.25\\n", _Layout(",", ".", 2, False, 0, 1)), 1)
    """
    b = f.b
    starts, ends = f.starts(col), f.ends(col)
    head = bytes(b[starts[0] : ends[0]])
    if not _is_decimal(head):
        return None  # at once: the checks below read every row
    dot = head.rfind(b".")
    places = len(head) - 1 - dot if dot >= 0 else 0
    point = 1 if dot >= 0 else 0
    if places > PLAIN_DIGITS:
        return None
    first = b[starts]
    signed = (first == ord("-")) | (first == ord("+"))
    # the digits before the point: the field less its sign, point and digits after it
    lead = ends - starts - signed - (places + point)
    if lead.min() < 0 or lead.max() + places > PLAIN_DIGITS or np.any(lead + places == 0):
        return None
    if point and not np.all(b[ends - (places + 1)] == ord(".")):
        return None
    frac = _digit_run(b, ends - places, 0, places)
    if frac is None:
        return None
    whole = np.zeros(len(ends), dtype=np.int64)
    at = ends - (places + point)  # just after each field's last digit before the point
    for k in range(int(lead.max())):
        at -= 1
        digit = b[at] - np.uint8(ord("0"))  # wraps below '0': anything not a digit is > 9
        here = lead > k
        if np.any(digit[here] > 9):
            return None
        whole += np.where(here, digit, 0).astype(np.int64) * 10**k
    values = (whole * 10**places + frac).astype(np.float64) / _EXACT_TENS[places]
    return np.where(first == ord("-"), -values, values)


#: widest field :func:`_few_values` reads (its characters make a 128-bit key)
KEY_CHARS = 16
#: most distinct values a column of a chunk may hold for :func:`_few_values` to read it
MAX_DISTINCT = 4096
#: what a field read by :func:`_few_values` may hold: the characters of a plain number
_PLAIN_NUMBER = re.compile(r"[0-9.+\-eE]+")
#: the buckets of :func:`_key_index`'s hash table (bits of the hash), and the odd multipliers
#: of its rounds (each round hashes the keys that collided in the rounds before)
HASH_BITS = 16
_HASH_ROUNDS = (
    (0x9E3779B97F4A7C15, 0xC2B2AE3D27D4EB4F),
    (0xD6E8FEB86659FD93, 0xFF51AFD7ED558CCD),
    (0xC4CEB9FE1A85EC53, 0x94D049BB133111EB),
    (0xBF58476D1CE4E5B9, 0x2545F4914F6CDD1D),
)
#: the bits of a field of width w (row w) in its first and in its second 8-byte word
_KEEP_FIRST = np.array([(1 << (8 * min(w, 8))) - 1 for w in range(17)], dtype=np.uint64)
_KEEP_SECOND = np.array([(1 << (8 * max(w - 8, 0))) - 1 for w in range(17)], dtype=np.uint64)


def _text_keys(f: _Fields, col: int) -> tuple[np.ndarray, np.ndarray] | None:
    """Column ``col`` of a plain chunk as 128-bit keys, two uint64 words a field: its bytes,
    zeros after them (equal texts, equal keys; different texts, different keys, as a plain
    chunk holds no zero byte); None when a field is empty or wider than :data:`KEY_CHARS`."""
    starts = f.starts(col)
    width = f.ends(col) - starts
    if width.min() < 1 or width.max() > KEY_CHARS:
        return None
    k0, k1 = f.words_at(starts)
    k0 &= _KEEP_FIRST[width]
    k1 &= _KEEP_SECOND[width]
    return k0, k1


class _KeyTable:
    """The hash tables of :func:`_few_values`, kept from chunk to chunk.

    The scratch table of :func:`_key_index`: a call writes its buckets before it reads them (and
    clears the marks it set), so the arrays need no clearing; fresh ones would cost a page fault
    every 4 kB at each call, more than the hashing itself.

    The values met so far (:meth:`look_up`, :meth:`remember`): a capture's levels recur all
    along it, so most chunks find every field's value here and convert nothing. Each bucket
    (hashed as in the first round of :func:`_key_index`) holds at most one key and its value,
    the first one stored there; an empty bucket holds the key 0, which no field has (a field is
    never empty).

    Which reader read each column last (``read_by``: its place in :data:`_COLUMN_READERS`), for
    :func:`_channel_columns` to try first."""

    def __init__(self) -> None:
        size = 1 << HASH_BITS
        self.rep0 = np.empty(size, np.uint64)  # the last key hashed to each bucket
        self.rep1 = np.empty(size, np.uint64)
        self.slot = np.empty(size, np.intp)  # the place of a bucket's key among those found
        self.used = np.zeros(size, dtype=bool)  # buckets written this round
        self.known0 = np.zeros(size, np.uint64)  # the values met: key, value
        self.known1 = np.zeros(size, np.uint64)
        self.value = np.zeros(size)
        self.read_by: dict[int, int] = {}

    def look_up(self, k0: np.ndarray, k1: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(each key's value where known, whether known)."""
        h = _hash(k0, k1, *_HASH_ROUNDS[0])
        hit = self.known0[h] == k0
        hit &= self.known1[h] == k1
        return self.value[h], hit

    def remember(self, k0: np.ndarray, k1: np.ndarray, values: np.ndarray) -> None:
        """Keep distinct keys' values, in the buckets still free."""
        h = _hash(k0, k1, *_HASH_ROUNDS[0])
        free = self.known0[h] == 0
        h, k0, k1, values = h[free], k0[free], k1[free], values[free]
        # keys sharing a free bucket: the same one (the last) wins in all three arrays
        self.known0[h] = k0
        self.known1[h] = k1
        self.value[h] = values


def _hash(k0: np.ndarray, k1: np.ndarray, m0: int, m1: int) -> np.ndarray:
    """Each 128-bit key's bucket: multiplicative hashing by the odd ``m0`` and ``m1``, the top
    :data:`HASH_BITS` bits of the product's sum."""
    h = ((k0 * np.uint64(m0)) ^ (k1 * np.uint64(m1))) >> np.uint64(64 - HASH_BITS)
    return h.astype(np.intp)


def _key_index(
    k0: np.ndarray, k1: np.ndarray, limit: int, table: _KeyTable | None = None
) -> tuple[np.ndarray, list[tuple[int, int]]] | None:
    """(for each key its place in the list of distinct keys, that list) for 128-bit keys (two
    words each), or None when there are more than ``limit`` distinct keys. A hash table of
    2**:data:`HASH_BITS` buckets: each bucket keeps the last key hashed to it, and the keys
    that find another key in their bucket (a collision) are hashed again in the next round,
    with other multipliers; None if any are left after the last round. Linear in the number
    of keys, where sorting them is not. ``table``: one kept for the calls to come.

    >>> idx, keys = _key_index(np.array([5, 7, 5], np.uint64), np.zeros(3, np.uint64), 10)
    >>> idx.tolist(), keys
    ([0, 1, 0], [(5, 0), (7, 0)])
    """
    t = table if table is not None else _KeyTable()
    rep0, rep1, slot, used = t.rep0, t.rep1, t.slot, t.used
    index = np.empty(len(k0), dtype=np.intp)
    found: list[tuple[int, int]] = []
    todo: np.ndarray | None = None  # rows still without a place (None: all)
    for m0, m1 in _HASH_ROUNDS:
        a, b = (k0, k1) if todo is None else (k0[todo], k1[todo])
        h = _hash(a, b, m0, m1)
        rep0[h] = a
        rep1[h] = b
        ok = (rep0[h] == a) & (rep1[h] == b)
        used[h] = True  # every bucket written holds a key that is ok there
        buckets = np.flatnonzero(used)
        used[buckets] = False
        if len(found) + len(buckets) > limit:
            return None
        slot[buckets] = np.arange(len(found), len(found) + len(buckets))
        found.extend(zip(rep0[buckets].tolist(), rep1[buckets].tolist(), strict=True))
        if todo is None:
            index[:] = slot[h]
            todo = np.flatnonzero(~ok)
        else:
            index[todo] = slot[h]
            todo = todo[~ok]
        if not len(todo):
            return index, found
        # the rows left keep a wrong place for now: the next round gives them theirs
    return None


def _key_value(k0: int, k1: int) -> float | None:
    """The number a field's key stands for (see :func:`_text_keys`), or None when its text is
    not a plain number.

    >>> _key_value(int.from_bytes(b"-0.25", "little"), 0), _key_value(ord("e"), 0)
    (-0.25, None)
    """
    raw = k0.to_bytes(8, "little") + k1.to_bytes(8, "little")
    text = raw.split(b"\0", 1)[0].decode("latin-1")
    if not _PLAIN_NUMBER.fullmatch(text):
        return None
    try:
        return float(text)
    except ValueError:
        return None  # not a number after all ("1-2", "e"): numpy's parser says where


def _few_values(
    f: _Fields, cols: Sequence[int], table: _KeyTable | None = None
) -> np.ndarray | None:
    """Columns ``cols`` of a plain chunk, read by their distinct texts, when each holds few
    distinct texts (:data:`MAX_DISTINCT`) of at most :data:`KEY_CHARS` characters of a plain
    number (digits, point, sign, exponent): a scope's converter gives a channel a few hundred
    levels at most. Each text becomes a 128-bit key (:func:`_text_keys`); keys whose value an
    earlier chunk found are looked up (:meth:`_KeyTable.look_up`); the others are told apart by
    a hash table (:func:`_key_index`), and each distinct text is converted once, by Python's
    ``float`` (correctly rounded, as numpy's own parser is). None otherwise. ``table``: the hash
    tables to use and to keep what is found in (see :class:`_KeyTable`).

    >>> lay = _Layout(",", ".", 3, False, 0, 1)
    >>> _few_values(_fields(b"0.1,-0.5,1\\n0.2,0.25,1E1\\n0.3,-0.5,0\\n", lay), [1, 2]).tolist()
    [[-0.5, 1.0], [0.25, 10.0], [-0.5, 0.0]]
    """
    t = table if table is not None else _KeyTable()
    out = np.empty((f.rows, len(cols)))
    for j, c in enumerate(cols):
        keys = _text_keys(f, c)
        if keys is None:
            return None
        k0, k1 = keys
        column, hit = t.look_up(k0, k1)
        if not hit.all():
            miss = np.flatnonzero(~hit)
            got = _key_index(k0[miss], k1[miss], MAX_DISTINCT, t)
            if got is None:
                return None
            index, found = got
            values = [_key_value(*key) for key in found]
            if None in values:
                return None
            new = np.array(values)
            column[miss] = new[index]
            t.remember(
                np.array([a for a, _ in found], np.uint64),
                np.array([b for _, b in found], np.uint64),
                new,
            )
        out[:, j] = column
    return out


def _no_quote_or_comment(chunk: _Chunk, layout: _Layout) -> bool:
    return b'"' not in chunk.raw and not _has_comment(chunk.raw, layout)


def _plain_fields(chunk: _Chunk, layout: _Layout) -> _Fields | None:
    """The fields of a plain chunk whose first column is the time (see :class:`_Fields`)."""
    if layout.time_col != 0 or not _no_quote_or_comment(chunk, layout):
        return None
    return _fields(chunk.raw, layout)


def _read_plain(
    chunk: _Chunk, f: _Fields, layout: _Layout, shown: str, table: _KeyTable | None = None
) -> tuple[np.ndarray, np.ndarray] | None:
    """(the time column, the channel columns) of a plain chunk, the time column read by
    :func:`_plain_first_column` or :func:`_scientific_column` and the channels by
    :func:`_channel_columns` (numpy's parser reads them when one cannot be read so); None when
    the time column is not plain."""
    t = _plain_first_column(f)
    if t is None:
        t = _scientific_column(f)
    if t is None:
        return None
    cols = layout.channel_cols
    values = _channel_columns(f, cols, table)
    if values is None:
        values = _parse(chunk, layout, shown, usecols=cols, plain=True)
    return (t, values) if len(values) == len(t) else None


def _channel_columns(
    f: _Fields, cols: Sequence[int], table: _KeyTable | None = None
) -> np.ndarray | None:
    """Columns ``cols`` of a plain chunk, each read by :func:`_decimal_column` (fixed decimals),
    :func:`_scientific_column` (scientific notation at a fixed precision) or
    :func:`_few_values` (few distinct texts); None when one column can be read by none of them.

    >>> lay = _Layout(",", ".", 3, False, 0, 1)
    >>> f = _fields(b"0.1,-0.51,0.5\\n0.2,0.25,1E1\\n0.3,-0.50,0\\n", lay)
    >>> _channel_columns(f, [1, 2]).tolist()
    [[-0.51, 0.5], [0.25, 10.0], [-0.5, 0.0]]
    """
    t = table if table is not None else _KeyTable()
    out = np.empty((f.rows, len(cols)))
    for j, c in enumerate(cols):
        # the reader that read this column last is tried first: a column keeps its kind
        # along a capture, and a reader that fails costs a share of a read
        last = t.read_by.get(c, 0)
        for k in (last, *(k for k in range(len(_COLUMN_READERS)) if k != last)):
            column = _COLUMN_READERS[k](f, c, t)
            if column is not None:
                t.read_by[c] = k
                out[:, j] = column
                break
        else:
            return None
    return out


def _few_column(f: _Fields, col: int, table: _KeyTable) -> np.ndarray | None:
    few = _few_values(f, [col], table)
    return None if few is None else few[:, 0]


#: the readers of a channel column, in the order tried on a column met for the first time
_COLUMN_READERS: tuple[Callable[[_Fields, int, _KeyTable], np.ndarray | None], ...] = (
    lambda f, col, _: _decimal_column(f, col),
    lambda f, col, _: _scientific_column(f, col),
    _few_column,
)


def _parse_columns(
    chunk: _Chunk, layout: _Layout, shown: str, plain: bool = False
) -> tuple[np.ndarray | None, np.ndarray]:
    """(the time column or None, the channel columns) of a chunk, by numpy's parser."""
    data = _parse(chunk, layout, shown, plain=plain)
    t = data[:, layout.time_col] if layout.time_col is not None else None
    return t, data[:, layout.channel_cols]


def _scan_chunk(
    chunk: _Chunk, layout: _Layout, shown: str, vectorised: bool = True,
    table: _KeyTable | None = None,
) -> tuple[np.ndarray | None, np.ndarray]:
    """(the time column or None, the channel columns) of one chunk, for the checking pass: a
    plain chunk by :func:`_read_plain` (unless not ``vectorised``), any other by numpy's
    parser."""
    if vectorised and (f := _plain_fields(chunk, layout)) is not None:
        if (got := _read_plain(chunk, f, layout, shown, table)) is not None:
            return got
    return _parse_columns(chunk, layout, shown, _no_quote_or_comment(chunk, layout))


#: a file of more than this many chunks (16 MB) has plain chunks read both ways (see
#: :class:`_ChunkScanner`), and is read by pyarrow's CSV reader when that is installed
RACE_ABOVE = 32
#: plain chunks read both ways before a way is chosen
RACE_CHUNKS = 3
#: after that, one chunk in this many is read both ways again (the values of a capture, and so
#: the faster way, can change along it)
RACE_EVERY = 64


class _ChunkScanner:
    """Reads the chunks of the checking pass the faster of two ways: plain chunks by the
    vectorised readers (:func:`_read_plain`) or every chunk by numpy's parser. Which is faster
    depends on the numpy release (its text loader became several times faster in recent
    releases), on the machine and on the values, so in a long file (``race``) the first
    :data:`RACE_CHUNKS` plain chunks and then one in :data:`RACE_EVERY` are read both ways and
    timed, and the way that took less time over all of those reads the others; a short file
    is read the vectorised way. Both give the same numbers to the last bit (correctly rounded
    conversions of the same texts), so the choice changes only the time. ``clock`` is the
    timer (seconds)."""

    def __init__(
        self, layout: _Layout, shown: str, race: bool,
        clock: Callable[[], float] = time.perf_counter,
    ) -> None:
        self._layout, self._shown, self._clock = layout, shown, clock
        self._race = race
        #: True while plain chunks go to the vectorised readers, False for numpy's parser
        self.vectorised = True
        #: seconds each way took on the chunks raced: (vectorised, numpy's parser)
        self.spent = [0.0, 0.0]
        self.raced = 0
        self._seen = 0
        self._table = _KeyTable()

    def scan(self, chunk: _Chunk) -> tuple[np.ndarray | None, np.ndarray]:
        self._seen += 1
        due = self._race and (
            self.raced < RACE_CHUNKS or self._seen % RACE_EVERY == 0
        )
        if not due:
            return _scan_chunk(chunk, self._layout, self._shown, self.vectorised, self._table)
        t0 = self._clock()
        f = _plain_fields(chunk, self._layout)
        got = (
            _read_plain(chunk, f, self._layout, self._shown, self._table)
            if f is not None else None
        )
        if got is None:  # not plain: numpy's parser either way
            return _scan_chunk(chunk, self._layout, self._shown, False)
        t1 = self._clock()
        _parse_columns(chunk, self._layout, self._shown, plain=True)
        t2 = self._clock()
        self.spent[0] += t1 - t0
        self.spent[1] += t2 - t1
        self.raced += 1
        if self.raced >= RACE_CHUNKS:
            self.vectorised = self.spent[0] <= self.spent[1]
        return got


def _line_of_row(path: Path, layout: _Layout, row: int) -> int:
    """The line number of data row ``row`` (0-based), walking the file (error path only)."""
    seen = 0
    for chunk in _chunks(path, layout):
        for k, line in enumerate(chunk.raw.decode("latin-1").split("\n")):
            if _clean(line, layout):
                if seen == row:
                    return chunk.line + k
                seen += 1
    return layout.data_line + row


class _Spool:
    """The channels' values, parsed once, in an anonymous temporary file (float64, rows of
    channels). Unnamed, it is gone when closed or when the process ends, however it ends."""

    def __init__(self, n_channels: int) -> None:
        self.n_channels = n_channels
        self.rows = 0
        self._file: Any = tempfile.TemporaryFile(prefix="toothcomb-csv-")

    def write(self, values: np.ndarray) -> bool:
        """Append rows; False (and the spool dropped) when the temporary folder is full."""
        if self._file is None:
            return False
        try:
            np.ascontiguousarray(values, dtype="<f8").tofile(self._file)
        except OSError:
            self.close()
            return False
        self.rows += values.shape[0]
        return True

    def read(self, row: int, count: int) -> np.ndarray:
        """Rows ``row`` to ``row + count`` (fewer at the end), float64 (rows, channels)."""
        count = max(0, min(count, self.rows - row))
        width = 8 * self.n_channels
        raw = read_at(self._file.fileno(), count * width, row * width) if count else b""
        return np.frombuffer(raw, dtype="<f8").reshape(-1, self.n_channels)

    def reset(self) -> None:
        """Forget every row written (the checking pass starts again)."""
        if self._file is not None:
            self._file.seek(0)
            self._file.truncate()
        self.rows = 0

    @property
    def ok(self) -> bool:
        return self._file is not None

    def close(self) -> None:
        if self._file is not None:
            self._file.close()
            self._file = None


def _new_spool(n_channels: int) -> _Spool | None:
    try:
        return _Spool(n_channels)
    except OSError:
        return None  # no temporary folder to write to: the text is parsed again instead


class _ArrowDeclined(Exception):
    """The file holds something pyarrow's reader would not read as numpy's parser does (or
    cannot read at all); numpy's parser reads it instead, and names any bad line."""


def _arrow_modules() -> tuple[Any, Any] | None:
    """pyarrow and its CSV module when installed (the ``fast-csv`` extra), else None."""
    try:
        import pyarrow
        import pyarrow.csv
    except ImportError:
        return None
    return pyarrow, pyarrow.csv


def _arrow_rows(
    path: Path, layout: _Layout, modules: tuple[Any, Any]
) -> Iterator[tuple[np.ndarray | None, np.ndarray, int]]:
    """(time column or None, channel columns, bytes read) of the data part, block by block, by
    pyarrow's CSV reader: several times faster than numpy's parser, and the same numbers (both
    convert decimal text correctly rounded). Raises :class:`_ArrowDeclined` at anything that
    reader would read differently or not at all: fields separated by runs of spaces, a row of
    another length, a comment or any other text that is not a number, an empty field, a value
    that is not finite (numpy's parser then decides what such text means, and names the line)."""
    pa, pcsv = modules
    delim = layout.delimiter
    if delim is None or len(delim) != 1 or delim == '"':
        raise _ArrowDeclined
    n = layout.n_fields
    names = [f"f{i}" for i in range(n + (1 if layout.trailing else 0))]
    # the reader keeps a few dozen blocks in flight (about 20 MB of its memory pool at 512 kB,
    # 160 MB at 4 MB), and parses as fast as with larger ones
    read = pcsv.ReadOptions(column_names=names, block_size=ARROW_BLOCK_BYTES)
    parse = pcsv.ParseOptions(delimiter=delim, quote_char='"', ignore_empty_lines=True)
    convert = pcsv.ConvertOptions(
        # every field a number, as numpy's parser requires (the trailing empty one aside)
        column_types={name: pa.float64() for name in names[:n]},
        include_columns=names[:n],
        null_values=[],
        strings_can_be_null=False,
        quoted_strings_can_be_null=False,
        decimal_point=layout.decimal,
    )
    f = pa.OSFile(os.fspath(path))
    try:
        f.seek(layout.data_offset)
        reader = pcsv.open_csv(
            f, read_options=read, parse_options=parse, convert_options=convert
        )
        chans = layout.channel_cols
        # the reader reads ahead, so the bytes parsed are counted in blocks (each about one
        # block of text; the end of the file is reported once all is read)
        done, last = layout.data_offset, f.size() - 1
        for batch in reader:
            done += read.block_size
            cols = [batch.column(i).to_numpy(zero_copy_only=False) for i in range(n)]
            if not all(np.isfinite(c).all() for c in cols):
                raise _ArrowDeclined
            values = np.empty((batch.num_rows, len(chans)))
            for j, c in enumerate(chans):
                values[:, j] = cols[c]
            t = cols[layout.time_col] if layout.time_col is not None else None
            yield t, values, min(done, last)
    except pa.ArrowException:
        raise _ArrowDeclined from None
    finally:
        f.close()


def _numpy_rows(
    path: Path, layout: _Layout, shown: str, race: bool
) -> Iterator[tuple[np.ndarray | None, np.ndarray, int]]:
    """(time column or None, channel columns, bytes read) of the data part, chunk by chunk, by
    numpy's parser or the vectorised readers (:class:`_ChunkScanner`)."""
    scanner = _ChunkScanner(layout, shown, race=race)
    for chunk in _chunks(path, layout, count_lines=False):
        stamps, values = scanner.scan(chunk)
        yield stamps, values, chunk.offset + len(chunk.raw)


def _scan(
    path: Path,
    layout: _Layout,
    shown: str,
    use_clock: bool,
    spool: _Spool | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> tuple[int, ClockFit | None]:
    """The checking pass: parse every row, count them, fit the time column; the channels'
    values go to ``spool``; ``progress(bytes done, bytes in all)`` as it goes. A long file is
    read by pyarrow's CSV reader when it is installed (:func:`_arrow_rows`), else, or where that
    reader declines the file, by numpy's parser."""
    size = path.stat().st_size
    long = size > RACE_ABOVE * CHUNK_BYTES
    modules = _arrow_modules() if long else None
    if modules is not None:
        try:
            return _check_rows(
                _arrow_rows(path, layout, modules), path, layout, shown, use_clock, spool,
                progress, size,
            )
        except _ArrowDeclined:
            if spool is not None:
                spool.reset()
    return _check_rows(
        _numpy_rows(path, layout, shown, long), path, layout, shown, use_clock, spool,
        progress, size,
    )


def _check_rows(
    rows: Iterator[tuple[np.ndarray | None, np.ndarray, int]],
    path: Path,
    layout: _Layout,
    shown: str,
    use_clock: bool,
    spool: _Spool | None,
    progress: Callable[[int, int], None] | None,
    size: int,
) -> tuple[int, ClockFit | None]:
    """Count the ``rows``, fit the time column and spool the channels (see :func:`_scan`)."""
    clock = RegularClock(resolution=layout.resolution) if use_clock else None
    n = 0
    t_first = math.nan
    done = 0
    try:
        for stamps, values, done in rows:
            if progress is not None:
                progress(done, size)
            if spool is not None and spool.ok and values.shape[0]:
                spool.write(values)
            if stamps is not None and values.shape[0]:
                t = stamps * layout.time_scale
                if n == 0:
                    t_first = float(t[0])
                n += values.shape[0]
                if clock is not None:
                    clock.feed(t)
            else:
                n += values.shape[0]
        if progress is not None and done < size:
            progress(size, size)
        if n == 0:
            raise CaptureError(f"{shown}: has a header but no rows of numbers")
        if clock is None:
            fit = ClockFit(math.nan, t_first, n, 0.0) if layout.time_col is not None else None
            return n, fit
        return n, clock.finish()
    except IrregularClock as exc:
        raise _clock_error(path, layout, shown, exc) from None
    except NotIncreasing:
        if n < 2:
            raise CaptureError(
                f"{shown}: has a single row, so its time column gives no sample interval; "
                "pass --sample-rate"
            ) from None
        raise CaptureError(
            f"{shown}: the time column {layout.time_name!r} does not increase; resample the "
            "capture to a fixed interval or pass --sample-rate to ignore the time column"
        ) from None


def _clock_error(path: Path, layout: _Layout, shown: str, exc: IrregularClock) -> CaptureError:
    st = exc.step
    line = _line_of_row(path, layout, st.index)
    if math.isnan(st.step):
        return CaptureError(
            f"{shown}: the time stamp on line {line} is not a number ({st.time!r}); fix that "
            "line or pass --sample-rate to ignore the time column"
        )
    return CaptureError(
        f"{shown}: the time column is irregular at line {line} (t = {st.time:.9g} s): a step of "
        f"{st.step:.6g} s where the others are {st.interval:.6g} s; resample the capture to a "
        "fixed interval or pass --sample-rate to ignore the time column"
    )


class CsvSource(SourceBase):
    """An open text capture (see :func:`toothcomb.decoders.readers.open_capture`)."""

    def __init__(
        self, path: Path, info: CaptureInfo, layout: _Layout, spool: _Spool | None = None
    ) -> None:
        super().__init__(info)
        self._path = path
        self._layout = layout
        self._spool = spool if spool is not None and spool.ok else None
        if self._spool is not None:
            self.read_windows = self._read_windows
            self.blocks_from = self._blocks_from

    def _read_windows(self, starts: Iterable[int], length: int) -> Iterator[np.ndarray]:
        """``length`` samples from each of ``starts`` (fewer at the end), float64 (samples,
        channels), from the spool: samples from anywhere without parsing the text again."""
        self._check_open()
        assert self._spool is not None
        for s in starts:
            yield self._spool.read(int(s), int(length))

    def _blocks_from(self, block_size: int, start: int = 0) -> Iterator[Block]:
        """The samples as :meth:`blocks` gives them, from ``start`` on (a multiple of
        ``block_size``, or the end), read from the spool (by position: a worker process can
        read it beside this one)."""
        assert self._spool is not None
        starts = self._block_starts(block_size, start)
        for at in starts:
            yield Block(at, self._spool.read(at, starts.step))

    def _pieces(self, block_size: int) -> Iterator[np.ndarray]:
        spool = self._spool
        if spool is not None:
            rows = max(block_size, SPOOL_READ_BYTES // (8 * spool.n_channels))
            for at in range(0, spool.rows, rows):
                yield spool.read(at, rows)
            return
        cols = self._layout.channel_cols
        for chunk in _chunks(self._path, self._layout):
            data = _parse(chunk, self._layout, self.info.path, usecols=cols)
            if data.shape[0]:
                yield data

    def _close(self) -> None:
        if self._spool is not None:
            self._spool.close()


class ScopeCsvReader:
    """Reader plugin for delimited text exports (entry point ``csv``).

    >>> import os, tempfile
    >>> path = os.path.join(tempfile.mkdtemp(), "scope.csv")
    >>> with open(path, "w") as f:
    ...     _ = f.write("Time (s),CRK (V),CAM (V)\\n0.0,0.1,4.9\\n0.001,0.2,4.8\\n0.002,0.1,4.9\\n")
    >>> with ScopeCsvReader.open(path) as src:
    ...     print(src.info.sample_rate, src.info.channels, src.info.units)
    ...     print(next(src.blocks()).data.tolist())
    1000.0 ('CRK', 'CAM') ('V', 'V')
    [[0.1, 4.9], [0.2, 4.8], [0.1, 4.9]]
    """

    name = "csv"
    handles = "scope exports as delimited text (comma, semicolon, tab or spaces)"
    extensions = EXTENSIONS
    #: :func:`~toothcomb.decoders.readers.open_capture` passes its ``progress`` on: opening
    #: parses every row
    takes_progress = True

    @staticmethod
    def detect(path: str | os.PathLike[str]) -> bool:
        """True when the file is text with at least two rows of numbers in one dialect."""
        try:
            p = Path(path)
            if not p.is_file() or p.stat().st_size == 0:
                return False
            layout = _sniff(p, os.fspath(path), strict=False)
        except (OSError, CaptureError, ValueError):
            return False
        if layout is None:
            return False
        with open(p, "rb") as f:
            f.seek(layout.data_offset)
            rows = [ln for ln in f.read(4096).split(b"\n") if ln.strip()]
        return len(rows) >= 2

    @staticmethod
    def open(
        path: str | os.PathLike[str],
        *,
        sample_rate: float | None = None,
        progress: Callable[[int, int], None] | None = None,
        **options: Any,
    ) -> CsvSource:
        """Open a text capture; ``sample_rate`` (Hz) is needed when the file gives no rate.
        Every row is parsed here; ``progress(bytes done, bytes in all)`` follows it."""
        reject_options("csv", options)
        rate_given = check_sample_rate(sample_rate)
        shown = os.fspath(path)
        p = check_file(path)
        try:
            layout = _sniff(p, shown, strict=True)
        except OSError as exc:
            raise CaptureError(f"{shown}: cannot be read ({exc.strerror})") from None
        assert layout is not None
        if not layout.channel_cols:
            raise CaptureError(f"{shown}: holds only a time column, no channel to decode")
        if rate_given is None and layout.time_col is None and layout.meta_rate is None:
            raise CaptureError(
                f"{shown}: has no time column and no sample rate line; pass --sample-rate "
                "with the rate the capture was taken at"
            )
        notes = list(layout.notes)
        use_clock = rate_given is None and layout.time_col is not None
        spool = _new_spool(len(layout.channel_cols))
        try:
            n, fit = _scan(p, layout, shown, use_clock, spool, progress)
        except OSError as exc:
            if spool is not None:
                spool.close()
            raise CaptureError(f"{shown}: cannot be read ({exc.strerror})") from None
        except BaseException:
            if spool is not None:
                spool.close()
            raise
        t0 = fit.t0 if fit is not None else 0.0
        if rate_given is not None:
            rate = rate_given
            if layout.time_col is not None:
                notes.append(
                    f"time column {layout.time_name!r} ignored: sample rate {rate:g} Hz given"
                )
        elif fit is not None:
            rate = fit.sample_rate
            meta = layout.meta_rate
            if meta is not None and abs(meta - rate) <= max(fit.uncertainty, 1e-9 * rate):
                rate = meta  # the stated rate agrees with the stamps and is more precise
            dt = 1.0 / rate
            if fit.resolution > 0.5 * dt:
                notes.append(
                    f"time stamps are printed to {fit.resolution:g} s, coarser than the sample "
                    f"interval {dt:.6g} s, so their regularity could not be checked"
                )
            if layout.meta_rate is not None and abs(layout.meta_rate - rate) > 1e-3 * rate:
                notes.append(
                    f"the time column gives {rate:g} Hz, the header line says "
                    f"{layout.meta_rate:g} Hz; using the time column"
                )
        else:
            assert layout.meta_rate is not None
            rate = layout.meta_rate
        cols = layout.channel_cols
        units = [layout.units[c] if layout.units else "" for c in cols]
        if not any(units) and layout.meta_units is not None:
            mu = layout.meta_units
            if len(mu) == len(cols):
                units = list(mu)
            elif len(mu) == layout.n_fields:
                units = [mu[c] for c in cols]
            elif len(mu) == 2 and layout.n_fields > len(cols):
                units = [mu[1]] * len(cols)  # "units: s, V": the time, then every channel
        dialect = {None: "spaces", ",": "comma", ";": "semicolon", "\t": "tab"}[layout.delimiter]
        mark = "decimal comma" if layout.decimal == "," else "decimal point"
        notes.insert(0, f"{dialect}-delimited, {mark}, data from line {layout.data_line}")
        info = CaptureInfo(
            path=shown,
            sample_rate=float(rate),
            n_samples=n,
            channels=_channel_names(layout),
            format="csv",
            subtype="text",
            t0=t0,
            units=tuple(units),
            full_scale=(math.nan,) * len(cols),
            notes=tuple(notes),
        )
        return CsvSource(p, info, layout, spool)
