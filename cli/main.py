"""The ``toothcomb`` command line: parse the arguments, call the library, render the answer.

Every command is a small function ``run_<name>(args, streams) -> exit code``; :func:`main` wraps
them so that a :class:`~toothcomb.decoders.errors.ToothcombError` becomes one line on stderr and
its exit code, Ctrl-C becomes exit 130, and anything unexpected becomes a one-line internal error
(exit 4). ``--debug`` adds the traceback.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import textwrap
import traceback
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from importlib import import_module
from pathlib import Path
from types import ModuleType
from typing import IO, Any

from rich.console import Console
from rich.text import Text
from toothcomb.decoders.errors import CaptureError, ToothcombError, UsageError
from toothcomb.decoders.heap import keep_freed_memory
from toothcomb.decoders.model import DEFAULT_BLOCK_SIZE
from toothcomb.decoders.options import DecodeOptions

from .argtypes import checked

PROG = "toothcomb"

EXIT_OK = 0
EXIT_OUT_OF_TIME = 1
EXIT_USAGE = 2
EXIT_NO_DECODE = 3
EXIT_INTERNAL = 4
EXIT_INTERRUPTED = 130
#: a reader of stdout went away (``toothcomb ... --json - | head``): 128 + SIGPIPE, as shells do
EXIT_BROKEN_PIPE = 141

#: the shipped demo capture and the simulator preset that makes the same scenario
DEMO_CAPTURE = "demo-idle-60-2.flac"
DEMO_PRESET = "idle-60-2-vr-soundcard"

EXIT_CODES_HELP = """\
exit codes:
  0    decoded, and every mark in time (or no expected angles were given)
  1    decoded, but at least one mark is out of tolerance
  2    bad input or usage (one line on stderr says what and how to fix it)
  3    could not decode (no crank sync, unknown pattern)
  4    internal error (run again with --debug and report the traceback)
  130  interrupted with Ctrl-C"""

DECODE_EXAMPLES = """\
examples:
  toothcomb decode idle.flac
      work out the crank and cam channels, the wheel and the sensors, and print the report
  toothcomb decode scope.csv --crank CH1 --cam CH2 --cam CH3 --wheel 36-1
      name the channels (by name or 0-based index) and the wheel
  toothcomb decode run.wav --json - > run.json
      the result as JSON on stdout (the report goes to stderr)
  toothcomb decode run.h5 --json run.json --plot run.png --quiet
      write the JSON and a plot, print nothing
  toothcomb decode after-job.flac --against engine.toml
      hold every cam edge against an engine profile (or a known-good decode's JSON):
      deviation, teeth off, verdict; exit code 1 when a mark is out of tolerance"""

LEARN_EXAMPLES = """\
examples:
  toothcomb learn known-good.flac engine.toml --sprocket-teeth 42 --drive belt
      decode a capture of an engine known to be in time and write its profile
  toothcomb learn known-good.flac reference.json
      keep the decode itself as the reference instead
  toothcomb decode after-job.flac --against engine.toml
      later: compare a new capture of the same engine with it"""

CH_HELP = "a channel name or its 0-based index"


# --------------------------------------------------------------------------- argument types


_positive_float = checked(
    float, "a number", "e.g. 48000", lambda v: 0 < v < float("inf"),
    "{text} must be a positive finite number",
)


_positive_int = checked(
    int, "a whole number", "e.g. 65536", lambda v: v > 0, "{text} must be a whole number above 0"
)


_tolerance = checked(
    float, "an angle", "e.g. 3", lambda v: 0 < v <= 90,
    "{text} deg CA is not a usable tolerance; give a positive angle up to 90",
)


_sprocket_teeth = checked(
    int, "a tooth count", "the cam sprocket's teeth, e.g. 42", lambda v: 2 <= v <= 400,
    "{text} teeth is outside 2..400; count the sprocket",
)


_angle = checked(
    float, "an angle", "e.g. 276", lambda v: -360 < v < 360, "{text} deg CA is outside -360..360"
)


_width = checked(
    int, "a whole number", "e.g. 100", lambda v: v >= 40,
    "{text} columns is too narrow; give 40 or more",
)


def _plot_kinds(text: str) -> tuple[str, ...]:
    from .plot import parse_kinds

    try:
        return parse_kinds(text)
    except UsageError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _plot_span(text: str) -> Any:
    from .plot import parse_span

    try:
        return parse_span(text)
    except UsageError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


# --------------------------------------------------------------------------- parser


class _Formatter(argparse.RawDescriptionHelpFormatter):
    """Keeps the epilog's own line breaks (examples, exit codes) and a wide option column."""

    def __init__(self, prog: str) -> None:
        super().__init__(prog, max_help_position=32)


def _para(text: str) -> str:
    """A description paragraph filled to the help width (the formatter keeps it as given)."""
    return textwrap.fill(" ".join(text.split()), width=78)


def _add_output_options(p: argparse.ArgumentParser, *, plot: bool) -> None:
    out = p.add_argument_group("output")
    out.add_argument(
        "--json",
        metavar="PATH|-",
        help="write the result as JSON to PATH (replaced whole, never half-written), "
        "or to stdout with '-' (the report then goes to stderr)",
    )
    if plot:
        out.add_argument(
            "--plot",
            metavar="PATH",
            help="draw pictures of the decode to PATH (.png, .svg or .pdf; needs matplotlib), "
            "one figure with a panel per --plot-kind",
        )
        out.add_argument(
            "--plot-kind",
            type=_plot_kinds,
            metavar="KIND[,KIND]",
            help="panels to draw, top to bottom: waveform (crank and cam signals over "
            "--plot-span with teeth, gaps, reference events R1.. and cam events E1..), speed "
            "(per tooth), strip (the 720 deg cycle, expected vs measured edges, off-by-teeth "
            "marked), phase (cam phase vs time, moves, holds), jitter (histogram per edge); "
            "default all: every kind, phase only when a phaser moved",
        )
        out.add_argument(
            "--plot-span",
            type=_plot_span,
            metavar="START:END",
            help="seconds of the capture the waveform panel shows, read again from the file "
            "(default: about two revolutions around the first reference event)",
        )
    _add_force_option(out)
    _add_console_options(out)


def _add_force_option(group: argparse._ArgumentGroup) -> None:
    group.add_argument(
        "--force",
        action="store_true",
        default=argparse.SUPPRESS,
        help="replace output files that already exist (without it an existing file is refused "
        "and left as it is)",
    )


def _add_console_options(group: argparse._ArgumentGroup) -> None:
    group.add_argument(
        "--width", type=_width, metavar="COLS", help="report width in columns (default: terminal)"
    )
    group.add_argument(
        "--quiet",
        "-q",
        action="store_true",
        default=argparse.SUPPRESS,
        help="print no report and no progress bar",
    )
    group.add_argument(
        "--debug",
        action="store_true",
        default=argparse.SUPPRESS,
        help="show the full traceback when something fails",
    )


def _capture_options(p: argparse.ArgumentParser) -> argparse._ArgumentGroup:
    """The options that say what a capture holds (decode and learn share them)."""
    g = p.add_argument_group("what the capture holds (worked out when not given)")
    g.add_argument("--crank", metavar="CH", help=f"crank sensor channel: {CH_HELP}")
    g.add_argument(
        "--cam",
        metavar="CH",
        action="append",
        default=[],
        help=f"cam sensor channel: {CH_HELP}; repeat for each cam",
    )
    g.add_argument("--wheel", metavar="N-M", help="crank wheel in trade notation, e.g. 60-2, 36-1")
    g.add_argument("--crank-sensor", choices=("hall", "vr"), help="crank sensor kind")
    g.add_argument("--cam-sensor", choices=("hall", "vr"), help="cam sensor kind (every cam)")
    g.add_argument(
        "--sample-rate",
        type=_positive_float,
        metavar="HZ",
        help="sample rate for files that carry none (or to override a CSV time column)",
    )
    return g


def _verdict_options(p: argparse.ArgumentParser) -> argparse._ArgumentGroup:
    """The options of a timing comparison (decode and batch share them)."""
    v = p.add_argument_group("timing verdict")
    v.add_argument(
        "--against",
        metavar="REF",
        help="compare with REF: an engine profile (.toml), the --json output of a decode of a "
        "known-good capture of the same engine, or a shipped profile's name "
        "(see 'toothcomb profiles')",
    )
    v.add_argument(
        "--sprocket-teeth",
        type=_sprocket_teeth,
        metavar="T",
        help="teeth on the cam sprocket (one drive tooth = 720/T deg CA); overrides the profile",
    )
    v.add_argument(
        "--tolerance",
        type=_tolerance,
        metavar="DEG",
        help="largest deviation still in time, deg CA; overrides the profile (default: the "
        "profile's, else 3)",
    )
    return v


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of every command (``--help`` on each)."""
    parser = argparse.ArgumentParser(
        prog=PROG,
        description=_para(
            "Read crank and cam position sensor captures (scope CSV, sound-card WAV/FLAC, "
            "HDF5) and tell, tooth by tooth, where each cam edge sits in crank degrees after the "
            "crank reference event (tooth 1, the first tooth after the gap)."
        ),
        epilog="Run 'toothcomb COMMAND --help' for the options of a command.\n\n" + EXIT_CODES_HELP,
        formatter_class=_Formatter,
    )
    parser.add_argument("--version", action="version", version=f"{PROG} {_version()}")
    parser.add_argument(
        "--debug",
        action="store_true",
        default=False,
        help="show the full traceback when something fails",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    # decode
    p = sub.add_parser(
        "decode",
        help="decode a capture: crank wheel, cam edge angles, jitter",
        description=_para(
            "Decode a capture: find the crank reference events, then measure every cam "
            "edge in crank degrees after them. Channels, sensors and the wheel are worked out from "
            "the signals unless given."
        ),
        epilog=DECODE_EXAMPLES + "\n\n" + EXIT_CODES_HELP,
        formatter_class=_Formatter,
    )
    p.add_argument("capture", metavar="CAPTURE", help="capture file (.csv, .wav, .flac, .h5)")
    g = _capture_options(p)
    g.add_argument(
        "--block-size",
        type=_positive_int,
        metavar="N",
        default=DEFAULT_BLOCK_SIZE,
        help="samples read per block; the result does not depend on it (default: %(default)s)",
    )
    g.add_argument(
        "--one-process",
        action="store_true",
        help="decode in this process alone; by default a long capture's crank channel is "
        "decoded in a second process beside it (Linux, two cores or more; same result)",
    )
    _verdict_options(p)
    ph = p.add_argument_group("cam phaser")
    ph.add_argument(
        "--phaser-parked",
        action="store_true",
        help="the cam phasers should stay parked in this capture (cranking, valve unplugged): "
        "report any move as a fault, and the offset from park when a profile gives it",
    )
    ph.add_argument(
        "--valve",
        action="append",
        default=[],
        metavar="CH[=CAM]",
        help="channel CH carries a phaser valve's PWM command, driving the cam on channel CAM "
        "(repeat for each valve); without it a channel switching at a steady frequency with "
        "flyback spikes is taken as one, and paired with the cam that moved most",
    )
    ph.add_argument(
        "--valve-drive",
        choices=("low-side", "high-side"),
        help="which side the valve driver switches (default: told from the flyback spikes)",
    )
    _add_output_options(p, plot=True)
    p.set_defaults(run=run_decode)

    # describe
    p = sub.add_parser(
        "describe",
        help="list channels, levels and what each channel looks like, without decoding",
        description=_para(
            "Read a capture once and describe it: format, sample rate, duration, level "
            "statistics of every channel and a guess of what each channel carries."
        ),
        epilog="example:\n  toothcomb describe scope.csv\n\n" + EXIT_CODES_HELP,
        formatter_class=_Formatter,
    )
    p.add_argument("capture", metavar="CAPTURE", help="capture file (.csv, .wav, .flac, .h5)")
    p.add_argument(
        "--sample-rate",
        type=_positive_float,
        metavar="HZ",
        help="sample rate for files that carry none",
    )
    _add_output_options(p, plot=False)
    p.set_defaults(run=run_describe)

    # demo
    p = sub.add_parser(
        "demo",
        help="decode the demo capture (an engine at idle, 60-2 wheel)",
        description=_para(
            f"Decode the demo capture captures/{DEMO_CAPTURE}, looked for in the current "
            "folder and next to the program. When it is not there, the same scenario is "
            "simulated into a temporary folder and decoded."
        ),
        epilog="example:\n  toothcomb demo --json demo.json\n\n" + EXIT_CODES_HELP,
        formatter_class=_Formatter,
    )
    _add_output_options(p, plot=True)
    p.set_defaults(run=run_demo)

    # simulate
    p = sub.add_parser(
        "simulate",
        help="write a simulated capture from a scenario file or a preset",
        description=_para(
            "Write a simulated crank/cam capture. The output format follows the suffix "
            "of OUT: .wav, .flac, .csv or .h5."
        ),
        epilog="examples:\n"
        "  toothcomb simulate scenario.json out.flac --truth out.truth.json\n"
        f"  toothcomb simulate --preset {DEMO_PRESET} demo.flac\n"
        "  toothcomb simulate --list\n\n" + EXIT_CODES_HELP,
        formatter_class=_Formatter,
    )
    p.add_argument(
        "files",
        metavar="SCENARIO.json OUT",
        nargs="*",
        help="scenario file and output capture (with --preset: only OUT)",
    )
    p.add_argument("--preset", metavar="NAME", help="use a built-in scenario instead of a file")
    p.add_argument("--list", action="store_true", help="list the built-in scenarios and exit")
    p.add_argument("--truth", metavar="PATH", help="also write the true answer as JSON to PATH")
    p.add_argument(
        "--teeth",
        action="store_true",
        help="put every crank tooth event in the true answer (large for long captures)",
    )
    p.add_argument(
        "--duration", type=_positive_float, metavar="S", help="change the length in seconds"
    )
    p.add_argument("--seed", type=int, metavar="N", help="change the noise seed")
    out = p.add_argument_group("output")
    _add_force_option(out)
    _add_console_options(out)
    p.set_defaults(run=run_simulate)

    # learn
    p = sub.add_parser(
        "learn",
        help="decode a known-good capture and keep it as an engine profile or reference",
        description=_para(
            "Decode a capture of an engine known to be in time and write what it shows as an "
            "engine profile (OUT ending in .toml) or as the decode's JSON (OUT ending in .json). "
            "A later capture of the same engine is compared with it by 'toothcomb decode "
            "CAPTURE --against OUT'. Each expected edge keeps its own uncertainty."
        ),
        epilog=LEARN_EXAMPLES + "\n\n" + EXIT_CODES_HELP,
        formatter_class=_Formatter,
    )
    p.add_argument("capture", metavar="CAPTURE", help="capture file (.csv, .wav, .flac, .h5)")
    p.add_argument("out", metavar="OUT", help="profile to write (.toml) or reference (.json)")
    _capture_options(p)
    e = p.add_argument_group("what the profile also records (.toml only)")
    e.add_argument("--name", metavar="NAME", help="the profile's name (default: from OUT)")
    e.add_argument("--description", metavar="TEXT", help="one line on the engine and set-up")
    e.add_argument(
        "--sprocket-teeth", type=_sprocket_teeth, metavar="T", help="teeth on the cam sprocket"
    )
    e.add_argument("--drive", choices=("belt", "chain", "gear"), help="what turns the cams")
    e.add_argument(
        "--tolerance", type=_tolerance, metavar="DEG", help="largest deviation still in time"
    )
    e.add_argument(
        "--tdc-after-reference",
        type=_angle,
        metavar="DEG",
        help="angle from the crank reference event to TDC of cylinder 1 (reports then give "
        "BTDC/ATDC)",
    )
    e.add_argument("--cylinders", type=_positive_int, metavar="N", help="number of cylinders")
    out = p.add_argument_group("output")
    _add_force_option(out)
    _add_console_options(out)
    p.set_defaults(run=run_learn)

    # profiles
    p = sub.add_parser(
        "profiles",
        help="list the engine profiles that ship with toothcomb, or print one",
        description=_para(
            "List the invented demo engine profiles that ship with toothcomb. With NAME, print "
            "that profile's TOML, to start a profile of your own from it."
        ),
        epilog="examples:\n  toothcomb profiles\n  toothcomb profiles demo-belt-60-2-vr > "
        "mine.toml\n\n" + EXIT_CODES_HELP,
        formatter_class=_Formatter,
    )
    p.add_argument("name", metavar="NAME", nargs="?", help="print this profile's TOML")
    p.set_defaults(run=run_profiles)

    # plugins, preview (in their own modules)
    from .patterns_cmd import add_patterns_parser
    from .plugins_cmd import add_plugins_parser
    from .preview import add_preview_parser

    add_plugins_parser(sub, _Formatter, EXIT_CODES_HELP)
    add_patterns_parser(sub, _Formatter, EXIT_CODES_HELP)
    add_preview_parser(sub, _Formatter, EXIT_CODES_HELP)

    # batch (its own module): many captures, on this machine's cores or on Dask
    from .batch_cmd import add_batch_parser

    add_batch_parser(sub, _Formatter, EXIT_CODES_HELP)

    # version
    p = sub.add_parser(
        "version",
        help="print the version",
        description=_para("Print the version."),
        formatter_class=_Formatter,
    )
    p.set_defaults(run=run_version)
    return parser


# --------------------------------------------------------------------------- plumbing


@dataclass(frozen=True)
class Streams:
    """Where a command writes: stdout for results, stderr for messages."""

    out: IO[str]
    err: IO[str]


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("toothcomb")
    except PackageNotFoundError:
        return "unknown (not installed)"


def _flag(args: argparse.Namespace, name: str) -> bool:
    return bool(getattr(args, name, False))


class _ReportConsole(Console):
    """A console that leaves a closed pipe to :func:`main` (rich would exit with status 1,
    which here means "a mark out of tolerance")."""

    def on_broken_pipe(self) -> None:
        self.quiet = True
        raise BrokenPipeError


def make_console(stream: IO[str], width: int | None) -> Console:
    """A rich console for reports on ``stream`` (colour only when it is a terminal)."""
    return _ReportConsole(file=stream, width=width, highlight=False, emoji=False, soft_wrap=False)


def _report_console(args: argparse.Namespace, streams: Streams) -> Console | None:
    """Where the report goes: nowhere with --quiet, stderr when stdout carries the JSON."""
    if _flag(args, "quiet"):
        return None
    to_stderr = getattr(args, "json", None) == "-"
    return make_console(streams.err if to_stderr else streams.out, args.width)


def _progress_console(streams: Streams) -> Console:
    return Console(file=streams.err, highlight=False, emoji=False)


def _check_capture(path: str) -> None:
    """Fail early, in one sentence, when the capture plainly is not there.

    ``file.h5:/dataset`` names a dataset inside a file: only the file part has to exist.
    """
    if "://" in path or Path(path).exists():
        return
    head = path.rsplit(":", 1)[0] if ":" in path else ""
    if head and Path(head).is_file():
        return
    raise CaptureError(f"capture file {path!r} does not exist; check the path and the spelling")


def _check_output_target(path: str | None, what: str, force: bool = False) -> None:
    """Fail before a long decode when an output file could not be written afterwards, or
    already exists and ``force`` (``--force``) is not given: toothcomb writes only to the paths
    named on the command line, and replaces an existing file only when told to."""
    if not path or path == "-":
        return
    target = Path(path)
    if target.is_dir():
        raise UsageError(f"{what} {path!r} is a folder; give a file name")
    if not force and (target.exists() or target.is_symlink()):
        raise UsageError(
            f"{what} {path!r} already exists; give --force to replace it, or choose another name"
        )
    folder = target.parent if str(target.parent) else Path(".")
    if not folder.is_dir():
        raise UsageError(
            f"{what} {path!r} cannot be written: the folder {str(folder)!r} does not exist"
        )


def _one_line(message: str) -> str:
    return " ".join(message.split())


def _say(streams: Streams, message: str) -> None:
    streams.err.write(f"{PROG}: {_one_line(message)}\n")
    streams.err.flush()


def _note(console: Console | None, message: str) -> None:
    if console is not None:
        console.print(Text(message, style="dim"))


# --------------------------------------------------------------------------- commands


def _decode_with_progress(
    path: str, options: DecodeOptions, args: argparse.Namespace, streams: Streams
) -> Any:
    from toothcomb.decoders import pipeline

    from .progress import progress_for

    with progress_for(_progress_console(streams), enabled=not _flag(args, "quiet")) as bar:
        return pipeline.decode_capture(path, options, bar)


def _finish_decode(result: Any, args: argparse.Namespace, streams: Streams) -> int:
    """Write the JSON and the plot, print the report, and choose the exit code."""
    from .output import write_json
    from .report import marks_out_of_time, render_decode

    console = _report_console(args, streams)
    notes: list[str] = []
    if args.json:
        write_json(
            result.to_json(), args.json, stdout=streams.out, overwrite=_flag(args, "force")
        )
        if args.json != "-":
            notes.append(f"JSON written to {args.json}")
    plot = getattr(args, "plot", None)
    if plot:
        from .plot import plot_result

        plot_result(
            result,
            plot,
            kinds=getattr(args, "plot_kind", None),
            span=getattr(args, "plot_span", None),
            overwrite=_flag(args, "force"),
        )
        notes.append(f"plot written to {plot}")
    if console is not None:
        render_decode(result, console, notes)
    return EXIT_OUT_OF_TIME if marks_out_of_time(result) else EXIT_OK


def _prepare_outputs(args: argparse.Namespace) -> None:
    _check_output_target(getattr(args, "json", None), "JSON file", _flag(args, "force"))
    kinds, span = getattr(args, "plot_kind", None), getattr(args, "plot_span", None)
    for flag, value in (
        ("--plot-kind", None if kinds is None else ",".join(kinds)),
        ("--plot-span", None if span is None else f"{span.start_s:g}:{span.end_s:g}"),
    ):
        if value is not None and not getattr(args, "plot", None):
            raise UsageError(
                f"{flag} {value} says what to draw but not where; add --plot PATH (e.g. run.png)"
            )
    if getattr(args, "plot", None):
        from .plot import plot_format, require_matplotlib

        plot_format(args.plot)
        require_matplotlib()
        _check_output_target(args.plot, "plot file", _flag(args, "force"))


def _reference(args: argparse.Namespace) -> Any:
    """The profile ``--against`` names, read and checked before the decode starts."""
    against = getattr(args, "against", None)
    if against is None:
        for flag, value in (
            ("--sprocket-teeth", getattr(args, "sprocket_teeth", None)),
            ("--tolerance", getattr(args, "tolerance", None)),
        ):
            if value is not None:
                raise UsageError(
                    f"{flag} {value} needs something to compare with; add --against REF (an "
                    "engine profile, or the JSON of a known-good decode)"
                )
        return None
    from toothcomb.decoders.profiles import load_reference

    return load_reference(against)


def decode_options(args: argparse.Namespace) -> DecodeOptions:
    """The decode hints and settings given on the command line (decode, learn and batch share
    them; an option a command does not have keeps its default)."""
    return DecodeOptions(
        crank=args.crank,
        cams=tuple(args.cam),
        wheel=args.wheel,
        crank_sensor=args.crank_sensor,
        cam_sensor=args.cam_sensor,
        sample_rate=args.sample_rate,
        block_size=getattr(args, "block_size", DEFAULT_BLOCK_SIZE),
        phaser_parked=bool(getattr(args, "phaser_parked", False)),
        valves=tuple(getattr(args, "valve", ()) or ()),
        valve_drive=getattr(args, "valve_drive", None),
        worker_process=not getattr(args, "one_process", False),
    )


def run_decode(args: argparse.Namespace, streams: Streams) -> int:
    """``toothcomb decode``: decode a capture, compare it when asked, and report."""
    _prepare_outputs(args)
    _check_capture(args.capture)
    reference = _reference(args)
    options = decode_options(args)
    result = _decode_with_progress(args.capture, options, args, streams)
    if reference is not None:
        from toothcomb.decoders.verdict import compare

        result = compare(
            result,
            reference,
            sprocket_teeth=getattr(args, "sprocket_teeth", None),
            tolerance_deg=getattr(args, "tolerance", None),
        )
    return _finish_decode(result, args, streams)


def run_learn(args: argparse.Namespace, streams: Streams) -> int:
    """``toothcomb learn``: decode a known-good capture and write it as a profile or reference."""
    from toothcomb.decoders.profiles import dumps_profile, learn_profile

    from .output import dumps_json, write_atomic
    from .report import PHASE_MOVED_DEG, edge_range, render_decode

    suffix = Path(args.out).suffix.lower()
    if suffix not in (".toml", ".json"):
        raise UsageError(
            f"output {args.out!r} ends in {suffix or 'nothing'!r}; name it .toml for an engine "
            "profile or .json for a reference decode"
        )
    extras = {
        "--name": args.name,
        "--description": args.description,
        "--sprocket-teeth": args.sprocket_teeth,
        "--drive": args.drive,
        "--tolerance": args.tolerance,
        "--tdc-after-reference": args.tdc_after_reference,
        "--cylinders": args.cylinders,
    }
    given = [k for k, v in extras.items() if v is not None]
    if suffix == ".json" and given:
        raise UsageError(
            f"{given[0]} is recorded only in a profile; name the output .toml instead of .json"
        )
    _check_output_target(args.out, "output file", _flag(args, "force"))
    _check_capture(args.capture)
    options = decode_options(args)
    result = _decode_with_progress(args.capture, options, args, streams)
    edges = sum(len(c.edges) for c in result.cams)
    if suffix == ".toml":
        profile = learn_profile(
            result,
            name=args.name or Path(args.out).stem,
            description=args.description or "",
            sprocket_teeth=args.sprocket_teeth,
            drive=args.drive,
            tolerance_deg=args.tolerance,
            tdc_after_reference_deg=args.tdc_after_reference,
            cylinders=args.cylinders,
        )
        write_atomic(
            args.out, dumps_profile(profile), what="profile", overwrite=_flag(args, "force")
        )
        what = f"profile {profile.name!r} written to {args.out}"
    else:
        from toothcomb.decoders.profiles import profile_from_decode_json

        profile_from_decode_json(result.to_json(), args.capture)  # refuses a decode without cams
        write_atomic(
            args.out, dumps_json(result.to_json()), what="reference", overwrite=_flag(args, "force")
        )
        what = f"reference decode written to {args.out}"
    notes = [f"{what} ({len(result.cams)} cams, {edges} edges)"]
    moved = [
        f"{c.channel} {e.flank}" for c in result.cams for e in c.edges
        if edge_range(e) > PHASE_MOVED_DEG
    ]
    if moved:
        notes.append(
            f"careful: {', '.join(moved)} moved by more than {PHASE_MOVED_DEG:g} deg CA during "
            "the capture; learn from a capture with every phaser parked (steady idle)"
        )
    console = _report_console(args, streams)
    if console is not None:
        render_decode(result, console, notes)
    return EXIT_OK


def run_profiles(args: argparse.Namespace, streams: Streams) -> int:
    """``toothcomb profiles``: list the shipped engine profiles, or print one."""
    from toothcomb.decoders.profiles import dumps_profile, shipped_profile, shipped_profiles

    if args.name:
        streams.out.write(dumps_profile(shipped_profile(args.name)))
        return EXIT_OK
    names = shipped_profiles()
    wide = max((len(n) for n in names), default=0)
    streams.out.write("".join(f"{n:<{wide}}  {d}\n" for n, d in sorted(names.items())))
    return EXIT_OK


def run_describe(args: argparse.Namespace, streams: Streams) -> int:
    """``toothcomb describe``: channels, levels and guesses, without decoding."""
    from toothcomb.decoders import describe

    from .output import write_json
    from .progress import progress_for
    from .report import render_description

    _prepare_outputs(args)
    _check_capture(args.capture)
    with progress_for(_progress_console(streams), enabled=not _flag(args, "quiet")) as bar:
        desc = describe.describe_capture(args.capture, sample_rate=args.sample_rate, progress=bar)
    notes: list[str] = []
    if args.json:
        write_json(desc.to_json(), args.json, stdout=streams.out, overwrite=_flag(args, "force"))
        if args.json != "-":
            notes.append(f"JSON written to {args.json}")
    console = _report_console(args, streams)
    if console is not None:
        render_description(desc, console, notes)
    return EXIT_OK


def find_demo_capture(cwd: Path | None = None) -> Path | None:
    """The shipped demo capture: ``captures/`` in the current folder, then in the source tree."""
    here = Path.cwd() if cwd is None else cwd
    for folder in (here / "captures", Path(__file__).resolve().parents[1] / "captures"):
        candidate = folder / DEMO_CAPTURE
        if candidate.is_file():
            return candidate
    return None


def _simulator() -> ModuleType:
    try:
        return import_module("toothcomb.decoders.simulate")
    except ImportError as exc:
        raise UsageError(
            f"the simulator cannot be loaded ({exc}); reinstall toothcomb to get it back"
        ) from exc


def run_demo(args: argparse.Namespace, streams: Streams) -> int:
    """``toothcomb demo``: decode the shipped demo capture, or a simulated copy of it."""
    _prepare_outputs(args)
    console = _report_console(args, streams)
    found = find_demo_capture()
    options = DecodeOptions()
    if found is not None:
        _note(console, f"demo: decoding the shipped capture {found}")
        result = _decode_with_progress(str(found), options, args, streams)
        return _finish_decode(result, args, streams)
    with tempfile.TemporaryDirectory(prefix="toothcomb-demo-") as tmp:
        path = Path(tmp) / DEMO_CAPTURE
        _simulate_preset(DEMO_PRESET, path, None)
        _note(
            console,
            f"demo: captures/{DEMO_CAPTURE} was not found, so the same scenario (preset "
            f"{DEMO_PRESET!r}) was simulated into {path} (removed afterwards)",
        )
        result = _decode_with_progress(str(path), options, args, streams)
        return _finish_decode(result, args, streams)


def _simulate_preset(name: str, out: Path, truth: str | None) -> None:
    sim = _simulator()
    sim.write_scenario(sim.preset(name), out, truth_path=truth)


def _load_scenario(path: str) -> dict[str, Any]:
    """A scenario file as a dict; the simulator checks its fields."""
    import json

    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise UsageError(f"scenario file {path!r} does not exist; check the path") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise UsageError(f"scenario file {path!r} cannot be read: {exc}") from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise UsageError(
            f"scenario file {path!r} is not valid JSON (line {exc.lineno}, column {exc.colno}: "
            f"{exc.msg}); fix it or start from a preset"
        ) from None
    if not isinstance(data, dict):
        raise UsageError(
            f"scenario file {path!r} holds a JSON {type(data).__name__}, not an object; "
            'a scenario is an object such as {"duration_s": 1.0}'
        )
    return data


def run_simulate(args: argparse.Namespace, streams: Streams) -> int:
    """``toothcomb simulate``: write a simulated capture (and optionally its true answer)."""
    sim = _simulator()
    if args.list:
        presets: dict[str, str] = dict(sim.PRESETS)
        wide = max((len(n) for n in presets), default=0)
        streams.out.write("".join(f"{n:<{wide}}  {d}\n" for n, d in sorted(presets.items())))
        return EXIT_OK
    files: list[str] = args.files
    changes: dict[str, Any] = {}
    if args.duration is not None:
        changes["duration_s"] = args.duration
    if args.seed is not None:
        changes["seed"] = args.seed
    if args.preset:
        if len(files) != 1:
            raise UsageError(
                f"with --preset give exactly one output file, not {len(files)} "
                f"({' '.join(files) or 'none'}); e.g. toothcomb simulate --preset {args.preset} "
                "out.flac"
            )
        out = files[0]
        scenario: Any = sim.preset(args.preset, **changes)
        source = f"preset {args.preset!r}"
    else:
        if len(files) != 2:
            raise UsageError(
                f"simulate needs a scenario file and an output file, got {len(files)} "
                f"({' '.join(files) or 'none'}); e.g. toothcomb simulate scenario.json out.flac"
            )
        scenario_path, out = files
        scenario = {**_load_scenario(scenario_path), **changes}
        source = f"scenario {scenario_path}"
    _check_output_target(out, "capture file", _flag(args, "force"))
    _check_output_target(args.truth, "truth file", _flag(args, "force"))
    answer = sim.write_scenario(scenario, out, teeth=args.teeth)
    if args.truth:
        from .output import dumps_json, write_atomic

        write_atomic(
            args.truth, dumps_json(answer), what="truth file", overwrite=_flag(args, "force")
        )
    if not _flag(args, "quiet"):
        truth = f", true answer in {args.truth}" if args.truth else ""
        streams.err.write(f"wrote {out} from {source}{truth}\n")
    return EXIT_OK


def run_version(args: argparse.Namespace, streams: Streams) -> int:
    """``toothcomb version``."""
    streams.out.write(f"{PROG} {_version()}\n")
    return EXIT_OK


# --------------------------------------------------------------------------- entry point


def _exit_status(code: object) -> int:
    """The int of a ``SystemExit`` code (argparse: 0 after --help, 2 on a usage error)."""
    if code is None:
        return EXIT_OK
    if isinstance(code, int):
        return code
    return EXIT_USAGE


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line with ``argv`` (default: ``sys.argv[1:]``) and return the exit code.

    >>> main(["version"])  # doctest: +ELLIPSIS
    toothcomb ...
    0
    """
    streams = Streams(sys.stdout, sys.stderr)
    parser = build_parser()
    try:
        args = parser.parse_args(None if argv is None else list(argv))
    except SystemExit as exc:
        return _exit_status(exc.code)
    debug = _flag(args, "debug")
    run: Callable[[argparse.Namespace, Streams], int] = args.run
    keep_freed_memory()  # freed arrays are reused instead of faulted in again (see heap)
    try:
        return run(args, streams)
    except ToothcombError as err:
        if debug:
            traceback.print_exc(file=streams.err)
        _say(streams, str(err) or type(err).__name__)
        return err.exit_code
    except KeyboardInterrupt:
        _say(streams, "interrupted")
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        # the reader of stdout is gone; keep Python from complaining while it flushes at exit
        devnull = os.open(os.devnull, os.O_WRONLY)
        try:
            os.dup2(devnull, sys.stdout.fileno())
        except (OSError, ValueError):
            pass
        finally:
            os.close(devnull)
        return EXIT_BROKEN_PIPE
    except Exception as exc:
        if debug:
            traceback.print_exc(file=streams.err)
        hint = "" if debug else " (run with --debug for the traceback)"
        _say(streams, f"internal error: {type(exc).__name__}: {exc}{hint}")
        return EXIT_INTERNAL
