"""``toothcomb batch``: decode many captures, on this machine's cores or on a Dask cluster.

The work is the library's (:mod:`toothcomb.decoders.batch`); this module parses the options,
writes the files (each atomically) and renders the summary table.

>>> import io
>>> from rich.console import Console
>>> from toothcomb.decoders.batch import BatchResult, SummaryRow
>>> out = io.StringIO()
>>> rows = (SummaryRow("bad.wav", "error", 2, "bad.wav: the file is empty", "bad.json"),)
>>> render_batch(BatchResult(rows), Console(file=out, width=100), "results")
>>> "bad.wav: the file is empty" in out.getvalue(), "0 decoded, 1 failed" in out.getvalue()
(True, True)
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

from rich.console import Console
from rich.table import Table
from rich.text import Text
from toothcomb.decoders.batch import (
    DASK_LOCAL,
    EXIT_SOME_FAILED,
    SUMMARY_STEM,
    BatchOptions,
    BatchResult,
    SummaryRow,
    find_captures,
    iter_decode,
    open_executor,
    read_capture_list,
)
from toothcomb.decoders.errors import UsageError

from .argtypes import checked

if TYPE_CHECKING:
    from .main import Streams

EXAMPLES = """\
examples:
  toothcomb batch fleet/ --out results
      decode every capture under fleet/ on all cores; results/summary.csv, summary.json and
      one JSON per capture
  toothcomb batch a.flac b.csv c.h5 --out results --jobs 2 --wheel 60-2
      three captures, two at a time, with the same hints for each
  toothcomb batch --list week12.txt --out results --against engine.toml
      the captures listed in a file (one a line), each held against an engine profile
  toothcomb batch fleet/ --out results --dask tcp://scheduler:8786
      run on a Dask cluster (pip install 'toothcomb[dask]'; the workers need toothcomb and
      must see the capture paths)
  toothcomb batch fleet/ --out results --dask local
      a Dask cluster on this machine, one worker process per core"""

BATCH_EXIT_CODES = f"""\
exit codes:
  0    every capture decoded (and, with --against, every mark in time)
  1    every capture decoded, but some mark is out of tolerance
  2    bad input or usage before anything was decoded (a PATH missing, no captures found,
       --out not a folder, an unreachable Dask scheduler)
  4    internal error (run again with --debug and report the traceback)
  {EXIT_SOME_FAILED}    some captures could not be read or decoded: each has an error row in the
       summary with the sentence and the exit code 'toothcomb decode' would give it
       (2 bad input, 3 could not decode, 4 internal error); the others are decoded and
       written all the same
  130  interrupted with Ctrl-C"""


_jobs = checked(
    int, "a number of jobs", "e.g. 4", lambda v: v >= 1, "{text} jobs is too few; give 1 or more"
)


def add_batch_parser(sub: Any, formatter: type[argparse.HelpFormatter], exit_codes: str) -> None:
    """Add the ``batch`` command to the subparsers ``sub`` (``exit_codes`` is the common text;
    batch has its own, with code 5)."""
    from .main import _add_console_options, _capture_options, _para, _verdict_options

    p = sub.add_parser(
        "batch",
        help="decode many captures in parallel (all cores, or a Dask cluster) into one summary",
        description=_para(
            "Decode every capture named, listed or found in the folders given (at every level, "
            "by the suffixes the installed readers take), in parallel on this machine's cores or "
            "on a Dask cluster. Writes DIR/summary.csv and DIR/summary.json (one row per capture "
            "in the order found: wheel, engine speed, revolutions, reference events, each cam "
            "edge's mean angle and jitter, the verdict with --against) and DIR/NAME.json per "
            "capture (the decode's JSON; NAME is the capture's name without its suffix). A "
            "capture that cannot be read or decoded becomes an error row with its sentence and "
            "never stops the batch."
        ),
        epilog=EXAMPLES + "\n\n" + BATCH_EXIT_CODES,
        formatter_class=formatter,
    )
    p.add_argument(
        "paths",
        metavar="PATH",
        nargs="*",
        help="capture files and folders (folders are searched at every level)",
    )
    w = p.add_argument_group("the batch")
    w.add_argument(
        "--out",
        metavar="DIR",
        required=True,
        help="folder for the summary and the per-capture results (made if missing)",
    )
    w.add_argument(
        "--force",
        action="store_true",
        help="replace the results already in --out (without it, a folder holding results is "
        "refused)",
    )
    w.add_argument(
        "--list",
        metavar="FILE",
        dest="capture_list",
        help="also decode the captures listed in FILE, one path a line ('#' starts a comment; "
        "'-' reads the list from stdin); a listed file that is missing gets an error row",
    )
    w.add_argument(
        "--jobs",
        "-j",
        type=_jobs,
        metavar="N",
        help="captures decoded at once on this machine (default: every core); with --dask "
        "local, the number of workers",
    )
    w.add_argument(
        "--dask",
        metavar="ADDRESS|local",
        help="run on the Dask scheduler at ADDRESS (e.g. tcp://host:8786), or on a Dask cluster "
        "started on this machine with 'local' (needs pip install 'toothcomb[dask]')",
    )
    _capture_options(p)
    _verdict_options(p)
    _add_console_options(p.add_argument_group("output"))
    p.set_defaults(run=run_batch)


def _captures(args: argparse.Namespace) -> list[str]:
    """The captures of the batch: the PATHs (each must exist), then the --list entries."""
    given: list[str] = list(args.paths)
    if not given and not args.capture_list:
        raise UsageError(
            "batch needs captures: give capture files or folders, or --list FILE with one path "
            "a line"
        )
    found = find_captures(given) if given else []
    if args.capture_list:
        listed = read_capture_list(_read_list(args.capture_list))
        if not listed and not found:
            raise UsageError(
                f"the list {args.capture_list!r} names no captures; give one path a line"
            )
        found = find_captures([*found, *listed], check_exists=False)
    return found


def _read_list(name: str) -> str:
    if name == "-":
        return sys.stdin.read()
    try:
        return Path(name).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise UsageError(f"capture list {name!r} does not exist; check the path") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise UsageError(f"capture list {name!r} cannot be read as text ({exc})") from None


def _out_dir(path: str) -> Path:
    out = Path(path)
    if out.exists() and not out.is_dir():
        raise UsageError(f"--out {path!r} is a file; give a folder for the results")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise UsageError(
            f"--out {path!r} cannot be made ({exc.strerror or exc}); choose a folder you can "
            "write to"
        ) from None
    return out


def run_batch(args: argparse.Namespace, streams: Streams) -> int:
    """``toothcomb batch``: decode every capture, write the results and the summary."""
    from .main import _flag, _progress_console, _reference, decode_options, make_console
    from .output import dumps_json, write_atomic
    from .progress import progress_for

    if args.jobs is not None and args.dask not in (None, DASK_LOCAL):
        raise UsageError(
            f"--jobs {args.jobs} applies to this machine; the Dask scheduler at {args.dask!r} "
            "runs as many captures at once as its workers take (leave out --jobs)"
        )
    captures = _captures(args)
    options = BatchOptions(
        decode=decode_options(args),
        reference=_reference(args),
        sprocket_teeth=args.sprocket_teeth,
        tolerance_deg=args.tolerance,
    )
    out = _out_dir(args.out)
    taken = sorted(p.name for p in out.iterdir() if p.suffix in (".json", ".csv"))
    if taken and not _flag(args, "force"):
        raise UsageError(
            f"--out {args.out!r} already holds results ({', '.join(taken[:3])}"
            f"{', ...' if len(taken) > 3 else ''}); give --force to replace them, or choose "
            "another folder"
        )
    rows: list[SummaryRow | None] = [None] * len(captures)
    quiet = _flag(args, "quiet")
    with (
        progress_for(_progress_console(streams), enabled=not quiet) as bar,
        open_executor(args.jobs, args.dask) as executor,
    ):
        for i, decoded in iter_decode(captures, options, executor, bar):
            name = decoded.row.result_file or f"capture-{i + 1}.json"
            write_atomic(out / name, dumps_json(decoded.result_json()), what="result")
            rows[i] = decoded.row
    batch = BatchResult(tuple(r for r in rows if r is not None))
    write_atomic(out / f"{SUMMARY_STEM}.csv", batch.to_csv(), what="summary")
    write_atomic(out / f"{SUMMARY_STEM}.json", dumps_json(batch.to_json()), what="summary")
    if not quiet:
        render_batch(batch, make_console(streams.out, args.width), str(out))
    return batch.exit_code


# --------------------------------------------------------------------------- the summary table


def _cam_text(row: SummaryRow) -> str:
    """Per cam, its channel, how many edges and where its first leading edge sits (its cycle
    angle when the revolution is known), e.g. ``cam 2 edges, 336.02``; the CSV has them all."""
    from .report import fmt_deg

    parts = []
    for c in row.cams:
        first = next((e for e in c.edges if e.flank in ("leading", "centre")), None)
        where = ""
        if first is not None:
            angle = first.angle_deg + 360.0 * (first.revolution or 0)
            where = f", {fmt_deg(angle, unit=False)}"
        parts.append(f"{c.channel} {len(c.edges)} edge{'s' if len(c.edges) != 1 else ''}{where}")
    return "; ".join(parts)


_VERDICT_STYLE = {"off-by-teeth": "bold red", "drifted": "bold yellow", "in-time": "green"}


def _note(row: SummaryRow) -> Text:
    """An error row's sentence and exit code; a compared capture's verdict (the words are in
    summary.json and the capture's own result)."""
    if not row.ok:
        return Text(f"{row.error} (exit {row.exit_code})", style="red")
    if row.verdict is None:
        return Text("")
    return Text(row.verdict, style=_VERDICT_STYLE.get(row.verdict, ""))


def render_batch(batch: BatchResult, console: Console, out_dir: str) -> None:
    """The summary table (one row per capture, in the batch's order) and a closing line."""
    from rich import box

    from .report import fmt_rpm

    table = Table(box=box.SIMPLE_HEAD, show_edge=False, pad_edge=False, collapse_padding=True)
    for header, justify in (
        ("capture", "left"),
        ("status", "left"),
        ("wheel", "left"),
        ("rpm", "right"),
        ("revs", "right"),
        ("cams: edges, first leading", "left"),
        ("verdict / error", "left"),
    ):
        table.add_column(header, justify=justify, overflow="fold")  # type: ignore[arg-type]
    for row in batch.rows:
        table.add_row(
            Text(row.file),
            Text("ok", style="green") if row.ok else Text("ERROR", style="bold red"),
            row.wheel or "",
            fmt_rpm(row.rpm_mean) if row.ok else "",
            "" if row.revolutions is None else str(row.revolutions),
            _cam_text(row),
            _note(row),
        )
    console.print(table)
    console.print(
        f"{len(batch.rows)} captures: {batch.decoded} decoded, {batch.failed} failed; "
        f"summary in {out_dir}/{SUMMARY_STEM}.csv and {SUMMARY_STEM}.json, one result per "
        f"capture beside them"
    )
