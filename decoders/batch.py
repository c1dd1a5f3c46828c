"""Decode many captures at once: on this machine's cores or on a Dask cluster.

One pure function, :func:`decode_one`, decodes one capture with the given options and returns a
small :class:`SummaryRow` (what a fleet table needs) and the decode's full JSON. It never raises
for a bad capture: an unreadable or undecodable file becomes an error row carrying the exit code
and the one-line sentence ``toothcomb decode`` would have given, so one bad file never stops a
batch.

:func:`iter_decode` and :func:`decode_many` hand that function to any
:class:`concurrent.futures.Executor`: a :class:`~concurrent.futures.ProcessPoolExecutor` on this
machine (:func:`local_executor`) or the executor of a ``dask.distributed`` client
(:func:`dask_executor`, ``client.get_executor()`` is a ``concurrent.futures`` executor too). The
local and the distributed runs share every line past the executor, and their rows come back in
the order of the capture list, whatever order the workers finish in.

>>> import tempfile, pathlib
>>> from concurrent.futures import ThreadPoolExecutor
>>> folder = pathlib.Path(tempfile.mkdtemp())
>>> (folder / "empty.wav").write_bytes(b"")
0
>>> with ThreadPoolExecutor(1) as pool:
...     batch = decode_many(find_captures([folder]), BatchOptions(), pool)
>>> row = batch.rows[0]
>>> row.status, row.exit_code, row.result_file, batch.exit_code
('error', 2, 'empty.json', 5)
"""

from __future__ import annotations

import csv
import io
import logging
import os
import re
from collections.abc import Callable, Iterable, Iterator, Sequence
from concurrent.futures import Executor, Future, ProcessPoolExecutor, as_completed
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Literal

from .errors import ToothcombError, UsageError
from .heap import keep_freed_memory
from .options import DecodeOptions
from .plugins import READERS, plugins
from .readers.base import split_dataset_path

#: exit code of a batch in which at least one capture could not be read or decoded (each such
#: capture's row carries the code ``toothcomb decode`` would have ended with)
EXIT_SOME_FAILED = 5
#: exit code of a batch in which every capture decoded but some mark is out of tolerance
EXIT_OUT_OF_TIME = 1
#: exit code of an internal error while decoding one capture (in its row)
EXIT_INTERNAL = 4

#: names the summary files take in the output folder (no capture's result may take them)
SUMMARY_STEM = "summary"

#: cam status from worst to best, for the one word a row gives for a verdict
_STATUS_RANK: dict[str, int] = {"off-by-teeth": 3, "drifted": 2, "not-measured": 1, "in-time": 0}

#: progress callback, as elsewhere in the library: (what, done, total)
Progress = Callable[[str, int, int], None]


# --------------------------------------------------------------------------- finding captures


def capture_suffixes() -> tuple[str, ...]:
    """The file suffixes the installed readers claim (lower case, sorted), e.g. ``.flac``.

    >>> {".csv", ".flac", ".h5", ".wav"} <= set(capture_suffixes())
    True
    """
    found: set[str] = set()
    for reader in plugins(READERS).values():
        found.update(e.lower() for e in getattr(reader, "extensions", ()) or ())
    return tuple(sorted(found))


def _hidden(name: str) -> bool:
    return name.startswith(".")


def _walk(folder: Path, suffixes: tuple[str, ...]) -> list[str]:
    """Capture files under ``folder`` (every level), sorted by their path below it; hidden files
    and folders are passed over."""
    out: list[str] = []
    for root, dirs, files in os.walk(folder):
        dirs[:] = sorted(d for d in dirs if not _hidden(d))
        for name in sorted(files):
            if not _hidden(name) and os.path.splitext(name)[1].lower() in suffixes:
                out.append(os.path.join(root, name))
    return sorted(out, key=lambda p: Path(p).relative_to(folder).parts)


def _exists(path: str) -> bool:
    file_part, _ = split_dataset_path(path)
    return os.path.exists(file_part)


def find_captures(
    paths: Iterable[str | os.PathLike[str]], *, check_exists: bool = True
) -> list[str]:
    """The captures ``paths`` name, in a fixed order: a file (or ``file.h5:/dataset``) as given,
    a folder searched at every level for files with a reader's suffix (see
    :func:`capture_suffixes`), sorted. A capture reached twice is kept once, where first seen.

    With ``check_exists`` a path that does not exist is a :class:`UsageError`; without it, it is
    kept (its decode then fails with its own sentence, in its own row). Finding nothing at all is
    a :class:`UsageError` that lists the suffixes looked for.

    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> for name in ("b.flac", "a.csv", "notes.md", "sub/c.h5"):
    ...     (d / name).parent.mkdir(exist_ok=True); _ = (d / name).write_bytes(b"")
    >>> [pathlib.Path(p).relative_to(d).as_posix() for p in find_captures([d, d / "a.csv"])]
    ['a.csv', 'b.flac', 'sub/c.h5']
    """
    suffixes = capture_suffixes()
    out: list[str] = []
    seen: set[str] = set()
    given = [os.fspath(p) for p in paths]
    for path in given:
        if os.path.isdir(path):
            found = _walk(Path(path), suffixes)
        elif check_exists and not _exists(path):
            raise UsageError(
                f"capture or folder {path!r} does not exist; check the path and the spelling"
            )
        else:
            found = [path]
        for p in found:
            key = os.path.normcase(os.path.abspath(p))
            if key not in seen:
                seen.add(key)
                out.append(p)
    if not out:
        where = ", ".join(repr(p) for p in given) or "nothing"
        raise UsageError(
            f"no captures found in {where}; toothcomb reads files ending in {', '.join(suffixes)}"
        )
    return out


def read_capture_list(text: str) -> list[str]:
    """The capture paths of a list: one a line; blank lines and lines starting with ``#`` are
    skipped, surrounding spaces dropped. Relative paths are relative to the current folder.

    >>> read_capture_list("# fleet, week 12\\nvan-1/idle.flac\\n\\n  van-2/idle.flac  \\n")
    ['van-1/idle.flac', 'van-2/idle.flac']
    """
    lines = (line.strip() for line in text.splitlines())
    return [line for line in lines if line and not line.startswith("#")]


def result_names(captures: Sequence[str]) -> list[str]:
    """The name of each capture's result file in the output folder: the capture's stem plus
    ``.json`` (an HDF5 dataset path adds its parts), characters other than letters, digits,
    ``.``, ``_`` and ``-`` replaced by ``_``. Names that would clash (whatever their case) or
    take the summary's name get ``-2``, ``-3``, ... in the order of the list.

    >>> result_names(["a/run.wav", "b/run.flac", "summary.csv", "x.h5:/ch/crank"])
    ['run.json', 'run-2.json', 'summary-2.json', 'x-ch-crank.json']
    """
    taken = {SUMMARY_STEM}
    out: list[str] = []
    for capture in captures:
        file_part, sep, inner = capture.rpartition(":")
        if not (sep and file_part and inner.startswith("/")):
            file_part, inner = capture, ""
        stem = Path(file_part).stem or "capture"
        if inner:
            stem += "-" + "-".join(p for p in inner.split("/") if p)
        stem = re.sub(r"[^A-Za-z0-9._-]", "_", stem)
        name, k = stem, 1
        while name.lower() in taken:
            k += 1
            name = f"{stem}-{k}"
        taken.add(name.lower())
        out.append(f"{name}.json")
    return out


# --------------------------------------------------------------------------- one capture


@dataclass(frozen=True)
class BatchOptions:
    """What every capture of a batch is decoded with (picklable: it travels to the workers)."""

    #: the hints and settings of each decode
    decode: DecodeOptions = field(default_factory=DecodeOptions)
    #: what to compare each decode with: an engine profile, a known-good decode's JSON, or a path
    #: or shipped profile name (:func:`~toothcomb.decoders.profiles.load_reference`); None: no
    #: comparison. Give a loaded profile when the workers cannot see the file.
    reference: Any = None
    #: teeth on the cam sprocket, overriding the reference's
    sprocket_teeth: int | None = None
    #: tolerance in deg CA, overriding the reference's
    tolerance_deg: float | None = None


@dataclass(frozen=True)
class EdgeSummary:
    """One distinct cam edge of a capture, in a few numbers."""

    #: "leading" / "trailing" (Hall flanks) or "centre" (VR tooth centre)
    flank: str
    #: "rising" or "falling"
    direction: str
    #: revolution of the 720 deg cycle (0 or 1), None when the cycle phase is unknown
    revolution: int | None
    #: mean angle after the most recent crank reference event, deg CA (0 <= angle < 360)
    angle_deg: float
    #: circular standard deviation of the angle, deg CA
    std_deg: float
    #: peak-to-peak time interval error of the edge (IEEE Std 2414-2020 TIE), deg CA; None when
    #: too few events
    jitter_pp_deg: float | None
    #: number of events
    n: int
    #: "in-time", "drifted" or "off-by-teeth" after a comparison, else None
    status: str | None = None
    #: measured - expected, deg CA (+ = late), after a comparison
    deviation_deg: float | None = None

    @property
    def label(self) -> str:
        """``leading rising rev 0``: which edge this is, in words."""
        rev = "" if self.revolution is None else f" rev {self.revolution}"
        return f"{self.flank} {self.direction}{rev}"

    def to_json(self) -> dict[str, Any]:
        return {
            "flank": self.flank,
            "direction": self.direction,
            "revolution": self.revolution,
            "angle_deg": self.angle_deg,
            "std_deg": self.std_deg,
            "jitter_pp_deg": self.jitter_pp_deg,
            "n": self.n,
            "status": self.status,
            "deviation_deg": self.deviation_deg,
        }


@dataclass(frozen=True)
class CamSummary:
    """One cam channel of a capture: its edges."""

    channel: str
    sensor: str
    edges: tuple[EdgeSummary, ...]

    def to_json(self) -> dict[str, Any]:
        return {
            "channel": self.channel,
            "sensor": self.sensor,
            "edges": [e.to_json() for e in self.edges],
        }


@dataclass(frozen=True)
class SummaryRow:
    """One capture of a batch: whether it decoded and, if so, what matters at a glance."""

    #: the capture as it was listed
    file: str
    #: "ok" (decoded) or "error" (could not be read or decoded)
    status: Literal["ok", "error"]
    #: the exit code ``toothcomb decode`` would have given this capture (0, 1, 2, 3 or 4)
    exit_code: int
    #: why it failed, in one sentence ("" when it decoded)
    error: str = ""
    #: name of this capture's result file in the output folder (set by :func:`iter_decode`)
    result_file: str | None = None
    #: reader format ("flac", "csv", ...)
    format: str | None = None
    duration_s: float | None = None
    #: crank wheel ("60-2"), crank channel and sensor
    wheel: str | None = None
    crank_channel: str | None = None
    crank_sensor: str | None = None
    #: mean engine speed, rpm
    rpm_mean: float | None = None
    revolutions: int | None = None
    #: crank reference events found
    reference_events: int | None = None
    sync_losses: int | None = None
    cams: tuple[CamSummary, ...] = ()
    #: the worst cam status after a comparison ("in-time", "not-measured", "drifted",
    #: "off-by-teeth"); None when nothing was compared
    verdict: str | None = None
    #: the verdict in words
    verdict_sentences: tuple[str, ...] = ()

    @property
    def ok(self) -> bool:
        return self.status == "ok"

    def to_json(self) -> dict[str, Any]:
        return {
            "file": self.file,
            "status": self.status,
            "exit_code": self.exit_code,
            "error": self.error,
            "result_file": self.result_file,
            "format": self.format,
            "duration_s": self.duration_s,
            "wheel": self.wheel,
            "crank_channel": self.crank_channel,
            "crank_sensor": self.crank_sensor,
            "rpm_mean": self.rpm_mean,
            "revolutions": self.revolutions,
            "reference_events": self.reference_events,
            "sync_losses": self.sync_losses,
            "cams": [c.to_json() for c in self.cams],
            "verdict": self.verdict,
            "verdict_sentences": list(self.verdict_sentences),
        }


@dataclass(frozen=True)
class Decoded:
    """What :func:`decode_one` hands back: the row and the decode's full JSON."""

    row: SummaryRow
    #: ``DecodeResult.to_json()`` of the decode (with the verdict), None when it failed
    result: dict[str, Any] | None = None

    def result_json(self) -> dict[str, Any]:
        """The per-capture file's content: the decode's JSON, or for a failed capture its
        path, exit code and sentence."""
        if self.result is not None:
            return self.result
        return {
            "tool": {"name": "toothcomb", "schema": 1},
            "capture": {"path": self.row.file},
            "error": {"exit_code": self.row.exit_code, "message": self.row.error},
        }


def _one_line(text: str) -> str:
    return " ".join(text.split())


def _edge_summary(edge: Any) -> EdgeSummary:
    cmp = edge.comparison
    return EdgeSummary(
        flank=edge.flank,
        direction=edge.direction,
        revolution=edge.revolution,
        angle_deg=edge.angle.mean,
        std_deg=edge.angle.std,
        jitter_pp_deg=edge.jitter.tie_pp_deg if edge.jitter is not None else None,
        n=edge.angle.n,
        status=cmp.status if cmp is not None else None,
        deviation_deg=cmp.deviation_deg if cmp is not None else None,
    )


def summarize(path: str, result: Any) -> SummaryRow:
    """The row of a decoded capture (a :class:`~toothcomb.decoders.result.DecodeResult`, with
    its verdict when it was compared). Its exit code is what ``toothcomb decode`` gives: 1 when a
    compared mark is out of tolerance, else 0."""
    cams = tuple(
        CamSummary(c.channel, c.sensor, tuple(_edge_summary(e) for e in c.edges))
        for c in result.cams
    )
    out_of_time = any(e.status not in (None, "in-time") for c in cams for e in c.edges)
    verdict, sentences = None, ()
    if result.verdict is not None:
        statuses = [c.status for c in result.verdict.cams] or ["in-time"]
        verdict = max(statuses, key=lambda s: _STATUS_RANK.get(s, len(_STATUS_RANK)))
        sentences = tuple(result.verdict.sentences)
    crank = result.crank
    return SummaryRow(
        file=path,
        status="ok",
        exit_code=EXIT_OUT_OF_TIME if out_of_time else 0,
        format=result.capture.format,
        duration_s=result.capture.duration_s,
        wheel=crank.wheel,
        crank_channel=crank.channel,
        crank_sensor=crank.sensor,
        rpm_mean=crank.rpm.mean,
        revolutions=crank.revolutions,
        reference_events=len(crank.reference_times_s),
        sync_losses=crank.sync_losses,
        cams=cams,
        verdict=verdict,
        verdict_sentences=sentences,
    )


def failed_row(path: str, error: BaseException) -> SummaryRow:
    """The row of a capture that could not be decoded: a :class:`ToothcombError` keeps its own
    exit code and sentence; anything else is an internal error (exit code 4).

    >>> r = failed_row("x.wav", UsageError("channel 'cam2' is not in x.wav"))
    >>> r.status, r.exit_code, r.error
    ('error', 2, "channel 'cam2' is not in x.wav")
    >>> failed_row("x.wav", MemoryError()).exit_code
    4
    """
    if isinstance(error, ToothcombError):
        code, text = error.exit_code, _one_line(str(error)) or type(error).__name__
    else:
        code = EXIT_INTERNAL
        text = _one_line(f"internal error: {type(error).__name__}: {error}")
    return SummaryRow(file=path, status="error", exit_code=code, error=text)


def decode_one(path: str, options: BatchOptions) -> Decoded:
    """Decode one capture (and compare it when ``options.reference`` is set): the row and the
    full JSON. Never raises for a bad capture; its failure is in the row.

    >>> d = decode_one("no-such-capture.flac", BatchOptions())
    >>> d.row.status, d.row.exit_code, d.result
    ('error', 2, None)
    """
    from .pipeline import decode_capture

    try:
        # the batch keeps every core busy with captures of its own: no worker per capture
        result = decode_capture(path, replace(options.decode, worker_process=False))
        if options.reference is not None:
            from .verdict import compare

            result = compare(
                result,
                options.reference,
                sprocket_teeth=options.sprocket_teeth,
                tolerance_deg=options.tolerance_deg,
            )
        return Decoded(summarize(path, result), result.to_json())
    except Exception as exc:  # one bad capture must never stop the batch
        return Decoded(failed_row(path, exc))


# --------------------------------------------------------------------------- many captures


def iter_decode(
    captures: Sequence[str],
    options: BatchOptions,
    executor: Executor,
    progress: Progress | None = None,
) -> Iterator[tuple[int, Decoded]]:
    """Decode every capture through ``executor``; yield ``(index in captures, decoded)`` as each
    finishes (so results can be written and dropped one by one). Each row carries its
    :func:`result_names` name. A worker that dies turns its capture into an internal-error row;
    when the caller stops early, captures not yet started are cancelled."""
    names = result_names(captures)
    total = len(captures)
    futures: dict[Future[Decoded], int] = {
        executor.submit(decode_one, path, options): i for i, path in enumerate(captures)
    }
    if progress is not None:
        progress("captures", 0, total)
    try:
        for done, future in enumerate(as_completed(futures), start=1):
            i = futures[future]
            try:
                decoded = future.result()
            except Exception as exc:  # the worker itself failed (killed, out of memory, ...)
                decoded = Decoded(failed_row(captures[i], exc))
            if progress is not None:
                progress("captures", done, total)
            yield i, replace(decoded, row=replace(decoded.row, result_file=names[i]))
    finally:
        for future in futures:
            future.cancel()


@dataclass(frozen=True)
class BatchResult:
    """The rows of a batch, in the order of its capture list, and the full results if kept."""

    rows: tuple[SummaryRow, ...]
    #: each capture's :meth:`Decoded.result_json`, in the same order (empty when not kept)
    results: tuple[dict[str, Any], ...] = ()

    @property
    def decoded(self) -> int:
        return sum(r.ok for r in self.rows)

    @property
    def failed(self) -> int:
        return len(self.rows) - self.decoded

    @property
    def exit_code(self) -> int:
        """0 every capture decoded (and every compared mark in time); 1 every capture decoded
        but some mark is out of tolerance; :data:`EXIT_SOME_FAILED` (5) some capture could not
        be read or decoded."""
        if self.failed:
            return EXIT_SOME_FAILED
        return EXIT_OUT_OF_TIME if any(r.exit_code == EXIT_OUT_OF_TIME for r in self.rows) else 0

    def to_json(self) -> dict[str, Any]:
        """The summary as JSON: counts, the batch's exit code and every row."""
        return {
            "tool": {"name": "toothcomb", "schema": 1},
            "batch": {
                "captures": len(self.rows),
                "decoded": self.decoded,
                "failed": self.failed,
                "exit_code": self.exit_code,
            },
            "rows": [r.to_json() for r in self.rows],
        }

    def to_csv(self) -> str:
        """The summary as CSV text (see :func:`summary_csv`)."""
        return summary_csv(self.rows)


def decode_many(
    captures: Sequence[str],
    options: BatchOptions,
    executor: Executor,
    progress: Progress | None = None,
    *,
    keep_results: bool = True,
) -> BatchResult:
    """Decode every capture through ``executor`` and gather the rows in the list's order
    (with the full results unless ``keep_results`` is false)."""
    rows: list[SummaryRow | None] = [None] * len(captures)
    results: list[dict[str, Any] | None] = [None] * len(captures)
    for i, decoded in iter_decode(captures, options, executor, progress):
        rows[i] = decoded.row
        if keep_results:
            results[i] = decoded.result_json()
    return BatchResult(
        tuple(r for r in rows if r is not None),
        tuple(r for r in results if r is not None) if keep_results else (),
    )


# --------------------------------------------------------------------------- the CSV table

#: the columns every summary CSV starts with (cam columns follow, see :func:`summary_columns`)
BASE_COLUMNS: tuple[str, ...] = (
    "file",
    "status",
    "exit_code",
    "error",
    "result_file",
    "format",
    "duration_s",
    "wheel",
    "crank_channel",
    "crank_sensor",
    "rpm_mean",
    "revolutions",
    "reference_events",
    "sync_losses",
    "verdict",
)


def summary_columns(rows: Sequence[SummaryRow]) -> list[str]:
    """The CSV header for ``rows``: :data:`BASE_COLUMNS`, then for cam ``i`` (1-based, in each
    capture's order) ``cam{i}_channel`` and, for its edge ``j``, ``cam{i}_edge{j}`` (which edge,
    e.g. ``leading rising rev 0``), ``cam{i}_edge{j}_angle_deg`` (mean angle after the reference
    event) and ``cam{i}_edge{j}_jitter_pp_deg``; with a comparison also ``..._status`` and
    ``..._deviation_deg``. Enough columns for the capture with the most cams and edges.

    >>> summary_columns([SummaryRow("a.wav", "error", 2, "bad")])[:4]
    ['file', 'status', 'exit_code', 'error']
    """
    compared = any(e.status is not None for r in rows for c in r.cams for e in c.edges)
    n_edges: list[int] = []
    for r in rows:
        for i, c in enumerate(r.cams):
            if i == len(n_edges):
                n_edges.append(0)
            n_edges[i] = max(n_edges[i], len(c.edges))
    cols = list(BASE_COLUMNS)
    for i, n in enumerate(n_edges, start=1):
        cols.append(f"cam{i}_channel")
        for j in range(1, n + 1):
            e = f"cam{i}_edge{j}"
            cols += [e, f"{e}_angle_deg", f"{e}_jitter_pp_deg"]
            if compared:
                cols += [f"{e}_status", f"{e}_deviation_deg"]
    return cols


def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return repr(value) if value == value and abs(value) != float("inf") else ""
    return str(value)


def summary_record(row: SummaryRow) -> dict[str, str]:
    """One row as CSV cells by column name (floats at full precision, None as empty)."""
    rec = {c: _cell(getattr(row, c)) for c in BASE_COLUMNS}
    for i, cam in enumerate(row.cams, start=1):
        rec[f"cam{i}_channel"] = cam.channel
        for j, edge in enumerate(cam.edges, start=1):
            e = f"cam{i}_edge{j}"
            rec[e] = edge.label
            rec[f"{e}_angle_deg"] = _cell(edge.angle_deg)
            rec[f"{e}_jitter_pp_deg"] = _cell(edge.jitter_pp_deg)
            rec[f"{e}_status"] = _cell(edge.status)
            rec[f"{e}_deviation_deg"] = _cell(edge.deviation_deg)
    return rec


def summary_csv(rows: Sequence[SummaryRow]) -> str:
    """The summary table as CSV text: a header row (:func:`summary_columns`), then one row per
    capture.

    >>> print(summary_csv([SummaryRow("a.wav", "error", 2, "a.wav: the file is empty")]), end="")
    file,status,exit_code,error,result_file,format,duration_s,wheel,crank_channel,crank_sensor,\
rpm_mean,revolutions,reference_events,sync_losses,verdict
    a.wav,error,2,a.wav: the file is empty,,,,,,,,,,,
    """
    cols = summary_columns(rows)
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=cols, extrasaction="ignore", lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow(summary_record(row))
    return buf.getvalue()


# --------------------------------------------------------------------------- executors


def default_jobs() -> int:
    """The cores this process may run on (all of them, unless it is pinned to fewer)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


#: modules the workers' parent process imports once, so that each worker starts with them
_PRELOAD = ["toothcomb.decoders.pipeline", "toothcomb.decoders.verdict"]


def local_executor(jobs: int | None = None) -> ProcessPoolExecutor:
    """Worker processes on this machine: ``jobs`` of them (default: every core).

    Where the system has it, workers come from a fork server that has imported the decoder
    once: as quick to start as a plain fork, and safe while the caller runs threads (a progress
    bar, a Dask client) -- a plain fork copies their locks in whatever state they are.
    """
    import multiprocessing

    context = None
    if "forkserver" in multiprocessing.get_all_start_methods():
        context = multiprocessing.get_context("forkserver")
        context.set_forkserver_preload(_PRELOAD)
    return ProcessPoolExecutor(
        max_workers=jobs or default_jobs(), mp_context=context, initializer=keep_freed_memory
    )


#: what ``--dask`` takes to start a cluster on this machine instead of joining one
DASK_LOCAL = "local"


def _dask() -> Any:
    try:
        import dask.distributed as dd
    except ImportError as exc:
        raise UsageError(
            f"running on Dask needs the dask[distributed] package ({exc}); install it with "
            "pip install 'toothcomb[dask]', or leave out --dask to use this machine's cores"
        ) from None
    return dd


@contextmanager
def dask_executor(scheduler: Any, jobs: int | None = None) -> Iterator[Executor]:
    """The ``concurrent.futures`` executor of a Dask client, open while the context is.

    ``scheduler`` is a scheduler address (``tcp://host:8786``; the workers need toothcomb
    installed and must see the capture paths), ``"local"`` for a cluster of ``jobs`` one-thread
    worker processes on this machine (closed afterwards), or a ``dask.distributed.Client`` the
    caller owns (used as it is, not closed).
    """
    owned: list[Any] = []
    if hasattr(scheduler, "get_executor"):
        client = scheduler
    else:
        dd = _dask()
        address = str(scheduler)
        if address == DASK_LOCAL:
            cluster = dd.LocalCluster(
                n_workers=jobs or default_jobs(),
                threads_per_worker=1,
                processes=True,
                dashboard_address=None,
                # its workers' own shutdown notes ("still alive after 4 s, killing" on a busy
                # machine) are no news to the user; errors still show
                silence_logs=logging.ERROR,
            )
            owned.append(cluster)
            client = dd.Client(cluster)
        else:
            try:
                client = dd.Client(address, timeout="10s")
            except (OSError, TimeoutError, ValueError) as exc:
                raise UsageError(
                    f"cannot reach the Dask scheduler at {address!r} ({_one_line(str(exc))}); "
                    "give its address as tcp://HOST:PORT, or --dask local for a cluster on this "
                    "machine"
                ) from None
        owned.insert(0, client)
    # pure=False: every capture is decoded afresh, never answered from a cached task of the
    # same name (a capture file can change between two batches on one cluster)
    executor = client.get_executor(pure=False)
    try:
        yield executor
    finally:
        executor.shutdown(wait=False)
        for thing in owned:
            thing.close()


@contextmanager
def open_executor(jobs: int | None = None, dask: Any = None) -> Iterator[Executor]:
    """The executor a batch runs on: :func:`local_executor` when ``dask`` is None, else
    :func:`dask_executor`. Closed when the context ends (unfinished work cancelled on an error).
    """
    if dask is not None:
        with dask_executor(dask, jobs) as ex:
            yield ex
        return
    pool = local_executor(jobs)
    try:
        yield pool
    except BaseException:
        pool.shutdown(wait=False, cancel_futures=True)
        raise
    pool.shutdown(wait=True)
