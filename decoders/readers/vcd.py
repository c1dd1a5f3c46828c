"""Logic-analyzer captures: Value Change Dump files (IEEE Std 1364-2005, clause 18).

Cheap logic analyzers (and the software that drives them) save what they saw as a VCD file: a
header that declares the time unit (``$timescale 1 us $end``) and every signal (``$var wire 1 !
D0 $end``, nested in ``$scope`` / ``$upscope``), then the value changes: a time stamp ``#1200``
in those units followed by the signals that changed at that time -- ``1!`` / ``0!`` / ``x!`` /
``z!`` for one bit, ``b1010 #`` for a vector, ``r1.5 $`` for a real -- with the initial values
in ``$dumpvars ... $end``.

Such a file holds edges, not samples. This reader turns it into toothcomb's sampled
:class:`~toothcomb.decoders.model.CaptureSource`:

- **Rate.** By default the analyzer's own: one sample per greatest common divisor of all time
  stamps (after the first), so every recorded change falls on a sample. When that is above
  ``max_rate`` (1 MHz unless given; a file written in nanoseconds of an exact simulation would
  otherwise ask for 1 GHz), the smallest whole multiple of that step that stays at or below it.
  ``sample_rate`` sets any rate instead.
- **Values.** A bit reads as 0.0 or 1.0, a vector as its unsigned integer, a real as itself.
  ``x`` and ``z`` keep the value the signal had before (a variable undefined from the start reads
  0 until its first change); ``info.notes`` says how many there were.
- **Samples.** Sample ``n`` lies at the first time stamp plus ``n`` sample intervals and holds
  the signal's value averaged over the interval centred on it (an integrating sampler). Away
  from changes that is exactly the level; the one sample a change falls in holds the share of
  its interval spent at the new level. A change on the analyzer's own grid therefore gives one
  sample half-way, and the Hall front end's interpolation at the local midpoint puts the edge
  back at its recorded time; a change between samples (a capped or chosen rate) comes back
  within a small fraction of a sample, not just to the nearest sample.
- **Streaming.** Opening reads the file once (checks, first and last time stamp, the rate);
  each ``blocks()`` reads it again from the top, turning the changes into samples a stretch at a
  time. Memory holds one stretch of samples and the changes inside it, whatever the length.

Every channel is one ``$var`` (its reference name; the scope path is put in front only where
two would have the same name). Malformed files are refused with a
:class:`~toothcomb.decoders.errors.CaptureError` (exit code 2) naming the line: no
``$timescale``, no ``$var``, an identifier no ``$var`` declares, a time stamp earlier than the one
before it, a file that ends inside a command or between a value and its identifier.

>>> import os, tempfile
>>> path = os.path.join(tempfile.mkdtemp(), "la.vcd")
>>> with open(path, "w") as f:
...     _ = f.write("$timescale 1 us $end\\n$scope module la $end\\n$var wire 1 ! D0 $end\\n"
...                 "$upscope $end\\n$enddefinitions $end\\n#0\\n$dumpvars 0! $end\\n"
...                 "#2\\n1!\\n#6\\n0!\\n#8\\n")
>>> with VcdReader.open(path) as src:
...     print(src.info.sample_rate, src.info.channels, src.info.n_samples)
...     print(next(src.blocks()).data[:, 0].tolist())
500000.0 ('D0',) 5
[0.0, 0.5, 1.0, 0.5, 0.0]
"""

from __future__ import annotations

import math
import os
import re
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any

import numpy as np

from ..errors import CaptureError, UsageError
from ..model import CaptureInfo
from .base import SourceBase, check_file, check_sample_rate, reject_options, tidy_rate

EXTENSIONS: tuple[str, ...] = (".vcd",)

#: the highest rate chosen without being asked, Hz; 1 MHz gives 167 samples per tooth of a 60-2
#: wheel at 6000 rpm, and the integrating sampler keeps edges to a fraction of a sample anyway
# common practice, no source
DEFAULT_MAX_RATE = 1e6

#: samples turned out at a time at least (one stretch of the stream)
READ_SPAN = 1 << 16

#: time units of ``$timescale`` in seconds (IEEE Std 1364-2005, 18.2.3.7)
UNITS: dict[str, float] = {
    "s": 1.0,
    "ms": 1e-3,
    "us": 1e-6,
    "ns": 1e-9,
    "ps": 1e-12,
    "fs": 1e-15,
}

#: commands of the header (18.2.3) a file may start with
HEADER_COMMANDS = frozenset(
    {
        "$comment",
        "$date",
        "$enddefinitions",
        "$scope",
        "$timescale",
        "$upscope",
        "$var",
        "$version",
    }
)

#: commands of the value-change section that hold value changes until their ``$end`` (18.2.3)
DUMP_COMMANDS = frozenset({"$dumpvars", "$dumpall", "$dumpon", "$dumpoff"})

#: variable types whose values are text, not levels (a common extension); not read as channels
TEXT_TYPES = frozenset({"string"})

_TIMESCALE = re.compile(r"^(\d+(?:\.\d*)?|\.\d+)\s*(s|ms|us|ns|ps|fs)$", re.IGNORECASE)

_SCALAR = {"0": 0.0, "1": 1.0, "x": None, "X": None, "z": None, "Z": None}


@dataclass(frozen=True)
class VcdVar:
    """One ``$var`` of the header."""

    #: variable type (``wire``, ``reg``, ``real``, ...)
    type: str
    #: width in bits
    size: int
    #: identifier code the value changes use
    id: str
    #: reference name, with its bit range when the file gives one (``data[7:0]``)
    reference: str
    #: names of the enclosing scopes, outermost first
    scope: tuple[str, ...]
    #: line of the file that declares it
    line: int

    @property
    def path(self) -> str:
        """Scope path and name, dot-separated (``top.la.D0``)."""
        return ".".join((*self.scope, self.reference))

    @property
    def full_scale(self) -> float:
        """The largest value it can take: 1 for a bit, 2**size - 1 for a vector, nan for a real."""
        if self.type in ("real", "realtime"):
            return math.nan
        return float(2**self.size - 1)


@dataclass(frozen=True)
class VcdHeader:
    """What the header of a VCD file declares."""

    #: one time-stamp unit, seconds
    tick_s: float
    #: the ``$timescale`` text as written (``10 ns``)
    timescale: str
    variables: tuple[VcdVar, ...]
    date: str = ""
    version: str = ""
    #: byte offset of the line holding ``$enddefinitions ... $end``, its number, and how many
    #: tokens of it belong to the header
    body_offset: int = 0
    body_line: int = 1
    body_skip: int = 0


def _line_tokens(
    f: IO[bytes], offset: int = 0, line: int = 1
) -> Iterator[tuple[int, int, list[str]]]:
    """(byte offset, line number, tokens) of each line from ``offset`` on."""
    f.seek(offset)
    pos = offset
    for raw in f:
        yield pos, line, raw.decode("latin-1").split()
        pos += len(raw)
        line += 1


def read_header(path: str | os.PathLike[str], shown: str | None = None) -> VcdHeader:
    """Read and check the header (everything up to ``$enddefinitions $end``).

    >>> import os, tempfile
    >>> p = os.path.join(tempfile.mkdtemp(), "h.vcd")
    >>> _ = open(p, "w").write("$timescale 10ns $end $scope module top $end "
    ...                        "$var reg 4 # bus [3:0] $end $upscope $end $enddefinitions $end")
    >>> h = read_header(p)
    >>> h.tick_s, h.timescale, [(v.path, v.size, v.id) for v in h.variables]
    (1e-08, '10 ns', [('top.bus[3:0]', 4, '#')])
    """
    shown = os.fspath(path) if shown is None else shown
    tick: float | None = None
    timescale = ""
    date = version = ""
    scope: list[str] = []
    variables: list[VcdVar] = []
    command: str | None = None
    args: list[str] = []
    start_line = 0
    with open(path, "rb") as f:
        for offset, line, tokens in _line_tokens(f):
            for i, tok in enumerate(tokens):
                if command is None:
                    if not tok.startswith("$"):
                        raise CaptureError(
                            f"{shown}: line {line}: {tok!r} stands outside any command in the "
                            "header; a VCD header holds only $... $end commands"
                        )
                    if tok == "$end":
                        raise CaptureError(
                            f"{shown}: line {line}: $end closes no command; the header is damaged"
                        )
                    command, args, start_line = tok, [], line
                    continue
                if tok != "$end":
                    args.append(tok)
                    continue
                # a complete command: command args... $end
                if command == "$timescale":
                    tick, timescale = _timescale(args, shown, start_line)
                elif command == "$scope":
                    if not args:
                        raise CaptureError(
                            f"{shown}: line {start_line}: $scope names no scope; write "
                            "'$scope module NAME $end'"
                        )
                    scope.append(args[-1])
                elif command == "$upscope":
                    if not scope:
                        raise CaptureError(
                            f"{shown}: line {start_line}: $upscope without an open $scope; the "
                            "header is damaged"
                        )
                    scope.pop()
                elif command == "$var":
                    variables.append(_var(args, tuple(scope), shown, start_line))
                elif command == "$date":
                    date = " ".join(args)
                elif command == "$version":
                    version = " ".join(args)
                elif command == "$enddefinitions":
                    if tick is None:
                        raise CaptureError(
                            f"{shown}: has no $timescale, so its time stamps have no unit; add "
                            "the analyzer's time step to the header, e.g. '$timescale 1 us $end'"
                        )
                    if not variables:
                        raise CaptureError(
                            f"{shown}: declares no signal ($var) before $enddefinitions; export "
                            "the capture again with its channels"
                        )
                    return VcdHeader(
                        tick_s=tick,
                        timescale=timescale,
                        variables=tuple(variables),
                        date=date,
                        version=version,
                        body_offset=offset,
                        body_line=line,
                        body_skip=i + 1,
                    )
                elif command in DUMP_COMMANDS:
                    raise CaptureError(
                        f"{shown}: line {start_line}: {command} comes before $enddefinitions; "
                        "the header must end with '$enddefinitions $end' before any value"
                    )
                # $comment, and commands this reader has no use for ($attrbegin, ...): skipped
                command = None
    if command is not None:
        raise CaptureError(
            f"{shown}: ends inside {command} (line {start_line}) with no $end; the file looks "
            "truncated: export or copy it again"
        )
    raise CaptureError(
        f"{shown}: the header never ends ('$enddefinitions $end' is missing), so the file holds "
        "no value changes; it looks truncated or is not a VCD file"
    )


def _timescale(args: list[str], shown: str, line: int) -> tuple[float, str]:
    text = "".join(args)
    m = _TIMESCALE.match(text)
    if not m:
        raise CaptureError(
            f"{shown}: line {line}: timescale {' '.join(args)!r} is not a number and a unit; "
            "write it like '1 us', '10 ns' or '100 ps' (units s, ms, us, ns, ps, fs)"
        )
    number = float(m.group(1))
    unit = m.group(2).lower()
    if not number > 0:
        raise CaptureError(f"{shown}: line {line}: timescale {text!r} is zero; give e.g. '1 us'")
    return number * UNITS[unit], f"{m.group(1)} {unit}"


def _var(args: list[str], scope: tuple[str, ...], shown: str, line: int) -> VcdVar:
    if len(args) < 4:
        raise CaptureError(
            f"{shown}: line {line}: '$var {' '.join(args)} $end' needs a type, a size, an "
            "identifier and a name, e.g. '$var wire 1 ! D0 $end'"
        )
    vtype, size_text, ident = args[0], args[1], args[2]
    try:
        size = int(size_text)
    except ValueError:
        size = -1
    if size < 1:
        raise CaptureError(
            f"{shown}: line {line}: $var {ident} has size {size_text!r}; give the width in bits "
            "as a whole number of 1 or more"
        )
    return VcdVar(vtype, size, ident, "".join(args[3:]), scope, line)


def _channel_names(variables: tuple[VcdVar, ...]) -> list[str]:
    """Reference names, with the scope path where two share one, and the identifier where even
    the paths are alike."""
    refs = [v.reference for v in variables]
    names = [v.path if refs.count(v.reference) > 1 else v.reference for v in variables]
    return [
        f"{name} ({v.id})" if names.count(name) > 1 else name
        for name, v in zip(names, variables, strict=True)
    ]


def _truncated(shown: str, what: str) -> CaptureError:
    return CaptureError(f"{shown}: ends {what}; the file looks truncated: export or copy it again")


#: one time stamp and what changed at it: (time or None before the first, [(channels, value)])
Stamp = tuple[int | None, list[tuple[tuple[int, ...], float | None]]]


def _body(
    path: Path, header: VcdHeader, ids: dict[str, tuple[int, ...]], shown: str
) -> Iterator[Stamp]:
    """The value changes, one time stamp at a time (x and z as None). Raises CaptureError for
    anything malformed, naming the line."""
    t: int | None = None
    changes: list[tuple[tuple[int, ...], float | None]] = []
    section: str | None = None
    section_line = 0
    pending: tuple[str, float | None, str, int] | None = None  # kind, value, text, line
    skipped = ""
    with open(path, "rb") as f:
        for _offset, line, tokens in _line_tokens(f, header.body_offset, header.body_line):
            if line == header.body_line:
                tokens = tokens[header.body_skip :]
            for tok in tokens:
                if pending is not None:
                    kind, value, text, _pl = pending
                    pending = None
                    chans = ids.get(tok)
                    if chans is None:
                        raise _unknown(shown, line, f"{text} {tok}", tok, header)
                    if kind != "text":
                        changes.append((chans, value))
                    continue
                if section == "skip":
                    if tok == "$end":
                        section = None
                    continue
                c = tok[0]
                if c == "#":
                    try:
                        nt = int(tok[1:])
                    except ValueError:
                        raise CaptureError(
                            f"{shown}: line {line}: time stamp {tok!r} is not '#' and a whole "
                            "number; the file is damaged"
                        ) from None
                    if nt < 0:
                        raise CaptureError(
                            f"{shown}: line {line}: time stamp {tok!r} is negative; VCD times "
                            "count up from 0"
                        )
                    if t is not None and nt < t:
                        raise CaptureError(
                            f"{shown}: line {line}: time #{nt} comes after #{t}; time stamps "
                            "must not go back (was the file joined from pieces?)"
                        )
                    if t is not None or changes:
                        yield t, changes
                    t, changes = nt, []
                elif c == "$":
                    if tok == "$end":
                        if section is None:
                            raise CaptureError(
                                f"{shown}: line {line}: $end closes no command; the file is "
                                "damaged"
                            )
                        section = None
                    elif section is not None:
                        raise CaptureError(
                            f"{shown}: line {line}: {tok} starts inside {section} (line "
                            f"{section_line}), which has no $end; the file is damaged"
                        )
                    elif tok in DUMP_COMMANDS:
                        section, section_line = tok, line
                    else:  # $comment, or a command this reader does not know: skipped whole
                        section, section_line = "skip", line
                        skipped = tok
                elif c in _SCALAR:
                    if len(tok) == 1:
                        pending = ("scalar", _SCALAR[c], tok, line)
                        continue
                    chans = ids.get(tok[1:])
                    if chans is None:
                        raise _unknown(shown, line, tok, tok[1:], header)
                    changes.append((chans, _SCALAR[c]))
                elif c in "bB":
                    bits = tok[1:].lower()
                    if not bits or set(bits) - set("01xz"):
                        raise CaptureError(
                            f"{shown}: line {line}: vector value {tok!r} is not 'b' and binary "
                            "digits (0, 1, x, z); the file is damaged"
                        )
                    value = None if ("x" in bits or "z" in bits) else float(int(bits, 2))
                    pending = ("vector", value, tok, line)
                elif c in "rR":
                    try:
                        real = float(tok[1:])
                    except ValueError:
                        raise CaptureError(
                            f"{shown}: line {line}: real value {tok!r} is not 'r' and a number; "
                            "the file is damaged"
                        ) from None
                    pending = ("real", real, tok, line)
                elif c in "sS":
                    pending = ("text", None, tok, line)
                else:
                    raise CaptureError(
                        f"{shown}: line {line}: {tok!r} is neither a time stamp (#...), a value "
                        "change (0!, 1!, b1010 #, r1.5 $) nor a command; the file is damaged"
                    )
    if pending is not None:
        raise _truncated(shown, f"after the value {pending[2]!r} (line {pending[3]}), before its "
                         "identifier")
    if section is not None:
        name = skipped if section == "skip" else section
        raise _truncated(shown, f"inside {name} (line {section_line}), which has no $end")
    if t is not None or changes:
        yield t, changes


def _unknown(shown: str, line: int, text: str, ident: str, header: VcdHeader) -> CaptureError:
    have = ", ".join(f"{v.id} ({v.reference})" for v in header.variables[:8])
    if len(header.variables) > 8:
        have += f" and {len(header.variables) - 8} more"
    return CaptureError(
        f"{shown}: line {line}: value change {text!r} names identifier {ident!r}, which no $var "
        f"declares (the header declares {have}); the file is damaged or its header belongs to "
        "another capture"
    )


@dataclass(frozen=True)
class VcdScan:
    """What one pass over the value changes found (memory does not grow with the file)."""

    #: first and last time stamp, in time-stamp units
    first: int
    last: int
    #: greatest common divisor of every time stamp less the first (0 with a single time stamp)
    step: int
    #: number of time stamps and of value changes
    stamps: int
    changes: int
    #: value of each channel at the first time stamp (None: undefined, read as 0)
    initial: tuple[float | None, ...]
    #: x or z values seen after the first time stamp
    undefined: int


def scan(path: Path, header: VcdHeader, ids: dict[str, tuple[int, ...]], shown: str) -> VcdScan:
    """Read the value changes once: checks, first and last time stamp, their common step."""
    n_ch = 1 + max(c for chans in ids.values() for c in chans)
    initial: list[float | None] = [None] * n_ch
    first: int | None = None
    last = 0
    step = 0
    stamps = changes = undefined = 0
    gcd = math.gcd
    for t, ch in _body(path, header, ids, shown):
        changes += len(ch)
        if t is not None:
            stamps += 1
            if first is None:
                first = t
            else:
                step = gcd(step, t - first)
            last = t
        if t is None or t == first:
            for chans, value in ch:
                if value is not None:
                    for c in chans:
                        initial[c] = value
        else:
            undefined += sum(1 for _chans, value in ch if value is None)
    if first is None:
        raise CaptureError(
            f"{shown}: holds no time stamp (#...) after $enddefinitions, so there is nothing to "
            "sample; export the capture again"
        )
    return VcdScan(first, last, step, stamps, changes, tuple(initial), undefined)


def choose_rate(
    tick_s: float, step: int, max_rate: float = DEFAULT_MAX_RATE
) -> tuple[float, int, str]:
    """The sample rate, its interval in time-stamp units, and how it was chosen.

    The analyzer's own rate is one sample per ``step`` time-stamp units; above ``max_rate`` the
    smallest whole multiple of that step at or below ``max_rate`` is taken, so that the samples
    still fall on the analyzer's grid.

    >>> choose_rate(1e-6, 1)[:2]      # 1 us steps: a 1 MHz analyzer
    (1000000.0, 1)
    >>> choose_rate(1e-9, 42)[:2]     # 24 MHz (42 ns, rounded), capped at 1 MHz
    (992063.492, 1008)
    """
    native = 1.0 / (step * tick_s)
    if native <= max_rate * (1 + 1e-12):
        rate = tidy_rate(native)
        return rate, step, f"{rate:.10g} Hz, the analyzer's time step (every change on a sample)"
    factor = math.ceil(native / max_rate * (1 - 1e-12))
    interval = step * factor
    rate = tidy_rate(1.0 / (interval * tick_s))
    return (
        rate,
        interval,
        f"{rate:.10g} Hz: the analyzer's time step gives {tidy_rate(native):.10g} Hz, above the "
        f"{max_rate:.10g} Hz limit, so one sample is taken every {factor} steps (edges between "
        "samples keep their time to a fraction of a sample); give --sample-rate for another rate",
    )


class VcdSource(SourceBase):
    """An open VCD file (see :func:`toothcomb.decoders.readers.open_capture`)."""

    def __init__(
        self,
        path: Path,
        info: CaptureInfo,
        header: VcdHeader,
        ids: dict[str, tuple[int, ...]],
        found: VcdScan,
        interval: float,
    ) -> None:
        super().__init__(info)
        self._path = path
        self._header = header
        self._ids = ids
        self._scan = found
        #: sample interval in time-stamp units (a whole number unless a rate was given)
        self._interval = interval

    @property
    def header(self) -> VcdHeader:
        return self._header

    def _pieces(self, block_size: int) -> Iterator[np.ndarray]:
        n = self.info.n_samples
        n_ch = self.info.n_channels
        span = max(block_size, READ_SPAN)
        first = self._scan.first
        interval = self._interval
        cur = [0.0 if v is None else v for v in self._scan.initial]
        level = np.array(cur, dtype=np.float64)
        us: list[float] = []
        cs: list[int] = []
        ds: list[float] = []
        a = 0
        limit = min(n, a + span) - 0.5  # changes before this (in samples) fall into [a, a+span)
        body = _body(self._path, self._header, self._ids, self.info.path)
        try:
            for t, changes in body:
                if t is None or t <= first:
                    continue  # the initial values, already in ``cur``
                u = (t - first) / interval
                while u >= limit:
                    b = min(n, a + span)
                    yield _render(a, b, level, us, cs, ds, n_ch)
                    us, cs, ds = [], [], []
                    a = b
                    if a >= n:
                        return
                    limit = min(n, a + span) - 0.5
                for chans, value in changes:
                    if value is None:
                        continue
                    for c in chans:
                        d = value - cur[c]
                        if d != 0.0:
                            cur[c] = value
                            us.append(u)
                            cs.append(c)
                            ds.append(d)
        finally:
            body.close()
        while a < n:
            b = min(n, a + span)
            yield _render(a, b, level, us, cs, ds, n_ch)
            us, cs, ds = [], [], []
            a = b


def _render(
    a: int, b: int, level: np.ndarray, us: list[float], cs: list[int], ds: list[float], n_ch: int
) -> np.ndarray:
    """Samples ``a .. b-1`` from the level before them and the steps inside (``level`` is moved
    on past them). Sample ``k`` averages the signal over ``[k - 0.5, k + 0.5)`` samples."""
    n = b - a
    out = np.empty((n, n_ch), dtype=np.float64)
    out[:] = level
    if not us:
        return out
    u = np.asarray(us, dtype=np.float64)
    c = np.asarray(cs, dtype=np.intp)
    d = np.asarray(ds, dtype=np.float64)
    k = np.floor(u + 0.5).astype(np.int64)  # the sample whose interval holds the step
    share = (k + 0.5) - u  # of that interval spent at the new level, 0 < share <= 1
    steps = np.zeros((n + 1, n_ch), dtype=np.float64)
    np.add.at(steps, (k - a + 1, c), d)
    out += np.cumsum(steps, axis=0)[:n]
    np.add.at(out, (k - a, c), d * share)
    np.add.at(level, c, d)
    return out


class VcdReader:
    """Reader plugin for logic-analyzer Value Change Dump files (entry point ``vcd``).

    >>> import os, tempfile
    >>> path = os.path.join(tempfile.mkdtemp(), "la.vcd")
    >>> with open(path, "w") as f:
    ...     _ = f.write("$timescale 1 ms $end\\n$var wire 1 ! crank $end\\n"
    ...                 "$var wire 1 \\" cam $end\\n$enddefinitions $end\\n"
    ...                 "#0\\n$dumpvars 0! 1\\" $end\\n#1\\n1!\\n#3\\n0\\"\\n#4\\n")
    >>> VcdReader.detect(path)
    True
    >>> with VcdReader.open(path) as src:
    ...     print(src.info.sample_rate, src.info.channels, src.info.duration_s)
    ...     print(next(src.blocks()).data.tolist())
    1000.0 ('crank', 'cam') 0.005
    [[0.0, 1.0], [0.5, 1.0], [1.0, 1.0], [1.0, 0.5], [1.0, 0.0]]
    """

    name = "vcd"
    extensions = EXTENSIONS
    handles = "logic-analyzer Value Change Dump files (IEEE Std 1364 VCD)"

    @staticmethod
    def detect(path: str | os.PathLike[str]) -> bool:
        """True when the file starts with a VCD header command (``$date``, ``$timescale``, ...)."""
        try:
            with open(path, "rb") as f:
                head = f.read(4096)
        except OSError:
            return False
        words = head.decode("latin-1").split(None, 1)
        return bool(words) and words[0] in HEADER_COMMANDS

    @staticmethod
    def open(
        path: str | os.PathLike[str],
        *,
        sample_rate: float | None = None,
        max_rate: float | None = None,
        **options: Any,
    ) -> VcdSource:
        """Open a VCD file. ``sample_rate`` (Hz) sets the rate; otherwise the analyzer's own,
        capped at ``max_rate`` (default :data:`DEFAULT_MAX_RATE`)."""
        reject_options("vcd", options)
        rate_given = check_sample_rate(sample_rate)
        cap = check_sample_rate(max_rate, "maximum sample rate") or DEFAULT_MAX_RATE
        shown = os.fspath(path)
        p = check_file(path)
        header = read_header(p, shown)
        used = [v for v in header.variables if v.type.lower() not in TEXT_TYPES]
        if not used:
            raise CaptureError(
                f"{shown}: declares only text variables "
                f"({', '.join(v.reference for v in header.variables)}), no signal with a level; "
                "export the logic channels"
            )
        names = _channel_names(tuple(used))
        ids: dict[str, tuple[int, ...]] = {}
        for k, v in enumerate(used):
            ids[v.id] = (*ids.get(v.id, ()), k)
        for v in header.variables:
            ids.setdefault(v.id, ())  # text variables: known, but no channel
        found = scan(p, header, ids, shown)
        span = found.last - found.first
        if span <= 0:
            raise CaptureError(
                f"{shown}: has a single time stamp (#{found.first}), so it spans no time; "
                "capture for longer (at least two crank revolutions)"
            )
        notes: list[str] = []
        native = 1.0 / (found.step * header.tick_s)
        if rate_given is not None:
            rate = rate_given
            interval: float = 1.0 / (rate * header.tick_s)
            notes.append(
                f"sample rate {rate:.10g} Hz given; the analyzer's time step is "
                f"{tidy_rate(native):.10g} Hz"
            )
        else:
            rate, step, how = choose_rate(header.tick_s, found.step, cap)
            interval = step
            notes.append(f"sample rate {how}")
        n_samples = math.floor(span / interval + 1e-9) + 1
        never = [names[k] for k, v in enumerate(found.initial) if v is None]
        if never:
            notes.append(
                f"{', '.join(never)} had no value at the start and read 0 until the first change"
            )
        if found.undefined:
            notes.append(
                f"{found.undefined} undefined value(s) (x or z) kept the level before them"
            )
        if n_samples > 1 << 40:
            raise UsageError(
                f"{shown}: at {rate:.10g} Hz its {span * header.tick_s:g} s would be {n_samples} "
                "samples; give a lower --sample-rate"
            )
        info = CaptureInfo(
            path=shown,
            sample_rate=float(rate),
            n_samples=n_samples,
            channels=tuple(names),
            format="vcd",
            subtype=f"logic ({header.timescale} time stamps)",
            t0=found.first * header.tick_s,
            units=("",) * len(used),
            full_scale=tuple(v.full_scale for v in used),
            notes=tuple(notes),
        )
        return VcdSource(p, info, header, ids, found, interval)
