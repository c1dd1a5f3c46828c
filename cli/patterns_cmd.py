"""``toothcomb patterns``: the pattern library of crank wheels and cam patterns.

The list shows every pattern (built-in, or from a folder named by ``TOOTHCOMB_PATTERNS``), what
it looks like in a few words, and where it came from; ``toothcomb patterns NAME`` draws the
pattern as a strip and prints its file, ready to copy as the start of a new one.

>>> import io
>>> from rich.console import Console
>>> out = io.StringIO()
>>> render_patterns(pattern_rows(), Console(file=out, width=140))
>>> "tri-gap-36" in out.getvalue() and "60-2" in out.getvalue()
True
"""

from __future__ import annotations

import argparse
import json
from collections import Counter
from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

from rich.console import Console
from rich.table import Table
from rich.text import Text
from toothcomb.decoders.errors import UsageError
from toothcomb.decoders.patterns import ENV, PatternFile, entries, find
from toothcomb.decoders.wheels.missing_tooth import MissingToothSpec
from toothcomb.decoders.wheels.pattern import PatternSpec, spec_from_file

if TYPE_CHECKING:
    from .main import Streams

EXAMPLES = f"""\
examples:
  toothcomb patterns
      every crank wheel and cam pattern in the library
  toothcomb patterns tri-gap-36
      draw one pattern and print its file (a start for a new one)
  toothcomb patterns --kind crank --json
      the crank wheels as JSON on stdout
  {ENV}=~/my-patterns toothcomb decode run.wav --wheel my-wheel
      add patterns of your own: one TOML file each in that folder"""


def add_patterns_parser(sub: Any, formatter: type[argparse.HelpFormatter], exit_codes: str) -> None:
    """Add the ``patterns`` command to the subparsers ``sub``."""
    from .main import _para, _width

    p = sub.add_parser(
        "patterns",
        help="list the crank wheels and cam patterns toothcomb knows, or show one",
        description=_para(
            "List the pattern library: crank wheels (N-M wheels, wheels with several gaps or an "
            "extra tooth) and cam patterns, each one TOML file. Add your own by putting files in "
            f"a folder named by the {ENV} environment variable, or give a file's path to "
            "--wheel. With a NAME, draw that pattern and print its file."
        ),
        epilog=EXAMPLES + "\n\n" + exit_codes,
        formatter_class=formatter,
    )
    p.add_argument("name", metavar="NAME", nargs="?", help="draw this pattern and print its file")
    p.add_argument("--kind", choices=("crank", "cam"), help="list only this kind")
    p.add_argument("--json", action="store_true", help="print the list as JSON on stdout")
    p.add_argument(
        "--width", type=_width, metavar="COLS", help="table width in columns (default: terminal)"
    )
    p.set_defaults(run=run_patterns)


def _spacings(spec: MissingToothSpec | PatternSpec) -> str:
    pitch = spec.pitch_deg
    count = Counter(spec.steps)
    parts = [f"{s * pitch:g} deg x{n}" for s, n in sorted(count.items())]
    return ", ".join(parts)


def crank_summary(spec: MissingToothSpec | PatternSpec) -> str:
    """What a crank wheel looks like, in a few words.

    >>> from toothcomb.decoders.wheels.pattern import PatternWheel
    >>> crank_summary(MissingToothSpec(60, 2))
    '58 teeth on 60 places of 6 deg; one gap of 2 missing teeth'
    >>> crank_summary(PatternWheel.parse("tri-gap-36"))
    '30 teeth on 36 places of 10 deg; 3 gaps of 2 missing teeth each'
    >>> crank_summary(PatternWheel.parse("12+1"))
    '13 teeth on 24 places of 15 deg; spacings 15 deg x2, 30 deg x11'
    """
    head = f"{spec.teeth} teeth on {spec.positions} places of {spec.pitch_deg:g} deg"
    if isinstance(spec, MissingToothSpec):
        return f"{head}; one gap of {_teeth(spec.missing)}"
    gaps = [s - 1 for s in spec.steps if s > 1]
    if min(spec.steps) == 1 and Counter(spec.steps)[1] > len(gaps):
        if len(set(gaps)) == 1:
            return f"{head}; {len(gaps)} gaps of {_teeth(gaps[0])} each"
        return f"{head}; gaps of " + ", ".join(_teeth(g) for g in gaps)
    return f"{head}; spacings {_spacings(spec)}"


def _teeth(n: int) -> str:
    return f"{n} missing tooth" if n == 1 else f"{n} missing teeth"


def wheel_strip(spec: MissingToothSpec | PatternSpec) -> str:
    """One revolution drawn on the grid: '|' a tooth, '.' a place without one, tooth 1 first.

    >>> wheel_strip(MissingToothSpec(12, 1))
    '|||||||||||.'
    """
    marks = ["."] * spec.positions
    k = 0
    for s in spec.steps:
        marks[k] = "|"
        k += s
    return "".join(marks)


def _cam_summary(pf: PatternFile) -> tuple[str, Any]:
    from toothcomb.decoders.analysis.campattern import cam_pattern_spec, describe_cam

    spec = cam_pattern_spec(pf.source if pf.origin == "user" else pf.name)
    return describe_cam(spec), spec


def pattern_rows(kind: str | None = None) -> list[dict[str, Any]]:
    """Every pattern of the library as a row (kind, name, origin, summary, description)."""
    rows: list[dict[str, Any]] = []
    for k in ("crank", "cam"):
        if kind not in (None, k):
            continue
        for name, pf in entries(k).items():
            row: dict[str, Any] = {
                "kind": k,
                "name": name,
                "origin": pf.origin,
                "source": pf.source,
                "description": pf.description,
            }
            if pf.shadows:
                row["replaces"] = pf.shadows
            if k == "crank":
                spec = spec_from_file(pf)
                row["summary"] = crank_summary(spec)
                row["positions"] = spec.positions
                row["teeth_deg"] = list(
                    spec.teeth_deg if isinstance(spec, PatternSpec)
                    else [i * spec.pitch_deg for i in range(spec.teeth)]
                )
            else:
                row["summary"], cam = _cam_summary(pf)
                row["windows_deg"] = [list(w) for w in cam.windows]
            rows.append(row)
    return rows


def render_patterns(rows: Sequence[dict[str, Any]], console: Console) -> None:
    table = Table(title="toothcomb pattern library", title_justify="left", expand=False)
    table.add_column("kind", no_wrap=True)
    table.add_column("name", no_wrap=True, style="bold")
    table.add_column("what it is", overflow="fold")
    table.add_column("from", no_wrap=True)
    last = None
    for i, row in enumerate(rows):
        nxt = rows[i + 1]["kind"] if i + 1 < len(rows) else None
        origin = row["origin"] + (" (replaces the built-in)" if row.get("replaces") else "")
        table.add_row(
            row["kind"] if row["kind"] != last else "",
            row["name"],
            row["summary"],
            origin,
            end_section=nxt != row["kind"],
        )
        last = row["kind"]
    console.print(table)
    console.print(
        Text(
            f"Add a pattern: one TOML file per pattern in a folder named by {ENV}, or give the "
            "file's path to --wheel; `toothcomb patterns NAME` prints a file to start from.",
            style="dim",
        )
    )


def _file_text(pf: PatternFile) -> str:
    if pf.origin == "user":
        with open(pf.source, encoding="utf-8") as fh:
            return fh.read()
    from importlib import resources

    folder = resources.files("toothcomb.decoders.patterns") / pf.kind
    return (folder / f"{pf.name}.toml").read_text(encoding="utf-8")


def show_pattern(name: str, console: Console, out: Any) -> None:
    """Draw one pattern and print its file."""
    pf = find("crank", name) or find("cam", name)
    if pf is None:
        known = ", ".join([*entries("crank"), *entries("cam")])
        raise UsageError(f"there is no pattern {name!r}; the library has {known}")
    if pf.kind == "crank":
        spec = spec_from_file(pf)
        console.print(Text(f"{pf.name}: {crank_summary(spec)}", style="bold"))
        console.print(Text("one revolution, tooth 1 first ('|' tooth, '.' no tooth):"))
        console.print(Text(wheel_strip(spec)))
    else:
        summary, cam = _cam_summary(pf)
        console.print(Text(f"{pf.name}: {summary}", style="bold"))
        console.print(Text("one engine cycle, 720 deg CA ('#' tooth or window, '.' none):"))
        cells = 72
        strip = ["."] * cells
        for s, e in cam.windows:
            a = s
            while a < e:
                strip[int(a % 720.0 / 10.0) % cells] = "#"
                a += 10.0
        console.print(Text("".join(strip)))
    console.print(Text(f"file: {pf.source}", style="dim"))
    out.write(_file_text(pf))


def run_patterns(args: argparse.Namespace, streams: Streams) -> int:
    """``toothcomb patterns``: list the library, or show one pattern."""
    from .main import make_console

    console = make_console(streams.out, args.width)
    if args.name:
        show_pattern(args.name, console, streams.out)
        return 0
    rows = pattern_rows(args.kind)
    if args.json:
        streams.out.write(json.dumps({"patterns": rows}, indent=2) + "\n")
        return 0
    render_patterns(rows, console)
    return 0
