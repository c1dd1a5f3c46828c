"""Some channels' front ends in a second process, beside the decode (Linux, two cores or more).

The crank's front end does most of a decode's per-sample work: it has fifty times the flanks of
a cam to find and time. On a long capture, :class:`~toothcomb.decoders.edgepass.EdgePass` hands
it to a forked process from one block on: the worker reads the same blocks from the file itself,
runs the front end it was forked with (its state, calibration and all, is the parent's at that
block) and sends the edges back in order, while the decode goes on with the other channels and
the per-edge work. The edges are the very ones one process finds (the same front end on the same
blocks), so the result does not change; only the wall time does. Where the file stores each
channel apart (an HDF5 file read by position, :mod:`~toothcomb.decoders.readers.h5chunks`), the
worker reads only its channels and the decode only the others; the worker then also watches its
samples for NaN, as the decode does with what it reads.

What travels back is bytes in a fixed layout (:func:`pack_blocks`): each block's end, each
channel's edges as the arrays :class:`~toothcomb.decoders.model.Edges` holds (float64 times,
int8 directions, float64 strengths) and its settled time; at the end the edges the front ends
still held and the pulses they rejected; or, when the worker fails, the error's class name and
its sentence. No Python object is rebuilt from what comes through the pipe.

A worker is forked only where that is safe and pays: on Linux, with two cores or more for this
process, no other thread running (a fork copies other threads' locks in whatever state they are
in, but not the threads that would release them: POSIX fork(), rationale) and at least
:data:`MIN_SAMPLES` samples still to come (:data:`MIN_SAMPLES_APART` where each process reads
only its own channels). The worker writes nothing to the terminal and leaves
interrupts to the decode, which stops it when it ends, whichever way.
"""

from __future__ import annotations

import inspect
import os
import signal
import sys
import threading
import warnings
from collections import deque
from multiprocessing.connection import Connection
from typing import Any

import numpy as np

from . import errors
from .errors import DecodeError
from .model import Edges

#: the fewest samples still to come for a worker to pay for its fork (the crank's front end is
#: then more work than the fork, and the other process reading the file as well)
MIN_SAMPLES = 1 << 25
#: the same for a source whose channels the two processes read apart (:func:`reads_apart`):
#: the worker then takes half of the reading too (inflating an HDF5 file's chunks), and pays
#: from about half a minute at 192 kHz (a 1-minute float32 HDF5 decodes in 0.48 s with it,
#: 0.58 s without; half a minute 0.31-0.34 s against 0.34-0.35 s)
MIN_SAMPLES_APART = 1 << 22
#: blocks whose edges travel back in one message
GROUP = 16
#: bytes the pipe from the worker holds: the worker runs ahead by that much at most, so memory
#: stays flat however long the capture (source: Linux pipe(7), "Pipe capacity": 65536 bytes by
#: default, up to /proc/sys/fs/pipe-max-size, 1048576 by default, for an unprivileged process)
PIPE_BYTES = 1 << 20


def can_fork() -> bool:
    """Whether this process may fork a worker: Linux, two cores or more for it, no other thread.

    >>> isinstance(can_fork(), bool)
    True
    """
    if not sys.platform.startswith("linux") or not hasattr(os, "fork"):
        return False
    try:
        cores = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        cores = os.cpu_count() or 1
    return cores >= 2 and threading.active_count() == 1


def starts_anywhere(source: Any, codes: bool = True) -> bool:
    """Whether ``source`` gives its integer codes (``codes``: ``code_blocks(size, start=...)``)
    or its float samples (``blocks_from(size, start=...)``) from any block on, which a worker
    needs to read its share of the file itself (by a file of its own, or by position: a file
    offset shared with the parent would move under both)."""
    return _takes(getattr(source, "code_blocks" if codes else "blocks_from", None), "start")


def _takes(method: Any, name: str) -> bool:
    """Whether ``method`` (None: there is none) takes a parameter called ``name``."""
    if method is None:
        return False
    try:
        return name in inspect.signature(method).parameters
    except (TypeError, ValueError):
        return False


#: what a message is: blocks of edges, the end, a failure
_BLOCKS, _END, _FAILED = b"B", b"E", b"F"


def pack_blocks(
    blocks: list[tuple[int, dict[int, Edges], dict[int, float]]], channels: tuple[int, ...]
) -> bytes:
    """Blocks of (stop, channel -> edges, channel -> settled time) as bytes: the count, then
    per block its stop and the edge count of each of ``channels``; every settled time (NaN
    where a front end has none); then all times, all directions, all strengths.

    >>> e = Edges(np.array([0.5, 0.75]), np.array([1, -1], np.int8), np.array([2.0, 2.5]))
    >>> got = unpack_blocks(pack_blocks([(64, {3: e}, {3: 0.25}), (128, {3: Edges.empty()}, {})],
    ...                                 (3,)), (3,))
    >>> [(stop, {c: x.times.tolist() for c, x in ed.items()}, st) for stop, ed, st in got]
    [(64, {3: [0.5, 0.75]}, {3: 0.25}), (128, {3: []}, {})]
    """
    head = [len(blocks)]
    settled = []
    parts: list[Edges] = []
    for stop, edges, st in blocks:
        head.append(stop)
        for c in channels:
            e = edges[c]
            head.append(len(e))
            parts.append(e)
            settled.append(st.get(c, np.nan))
    return b"".join(
        (
            _BLOCKS,
            np.array(head, dtype="<i8").tobytes(),
            np.array(settled, dtype="<f8").tobytes(),
            *(np.asarray(e.times, dtype="<f8").tobytes() for e in parts),
            *(np.asarray(e.direction, dtype="i1").tobytes() for e in parts),
            *(np.asarray(e.strength, dtype="<f8").tobytes() for e in parts),
        )
    )


def unpack_blocks(
    data: bytes, channels: tuple[int, ...]
) -> list[tuple[int, dict[int, Edges], dict[int, float]]]:
    """What :func:`pack_blocks` packed (the ``channels`` must be the same)."""
    view = memoryview(data)[1:]
    k = len(channels)
    n = int(np.frombuffer(view, "<i8", 1)[0])
    head = np.frombuffer(view, "<i8", 1 + n * (1 + k)).tolist()
    at = 8 * len(head)
    settled = np.frombuffer(view, "<f8", n * k, at).tolist()
    at += 8 * n * k
    counts = [head[1 + b * (1 + k) + 1 + j] for b in range(n) for j in range(k)]
    total = sum(counts)
    times = np.frombuffer(view, "<f8", total, at)
    direction = np.frombuffer(view, "i1", total, at + 8 * total)
    strength = np.frombuffer(view, "<f8", total, at + 9 * total)
    if at + 17 * total != len(view):
        raise ValueError("a message from the worker does not add up")
    out = []
    i = e0 = 0
    for b in range(n):
        stop = head[1 + b * (1 + k)]
        edges, st = {}, {}
        for c in channels:
            e1 = e0 + counts[i]
            edges[c] = Edges(times[e0:e1].copy(), direction[e0:e1].copy(), strength[e0:e1].copy())
            if settled[i] == settled[i]:  # not NaN: the front end has a settled time
                st[c] = settled[i]
            e0 = e1
            i += 1
        out.append((stop, edges, st))
    return out


def _pack_end(
    final: dict[int, Edges], settled: dict[int, float], rejected: dict[int, dict[int, int]],
    channels: tuple[int, ...],
) -> bytes:
    """The end: the last edges and settled times (as one block) and, per channel, the counts
    of pulses rejected by direction (up to two: -1 and +1)."""
    counts = [int(rejected.get(c, {}).get(d, 0)) for c in channels for d in (-1, 1)]
    has = [int(c in rejected) for c in channels]
    tail = np.array(has + counts, dtype="<i8").tobytes()
    return _END + len(tail).to_bytes(8, "little") + tail + pack_blocks([(0, final, settled)],
                                                                        channels)


def _unpack_end(
    data: bytes, channels: tuple[int, ...]
) -> tuple[dict[int, Edges], dict[int, float], dict[int, dict[int, int]]]:
    size = int.from_bytes(data[1:9], "little")
    tail = np.frombuffer(data, "<i8", size // 8, 9).tolist()
    k = len(channels)
    rejected = {
        c: {-1: tail[k + 2 * j], 1: tail[k + 2 * j + 1]}
        for j, c in enumerate(channels)
        if tail[j]
    }
    ((_, final, settled),) = unpack_blocks(data[9 + size :], channels)
    return final, settled, rejected


def _pack_failure(exc: BaseException) -> bytes:
    return _FAILED + f"{type(exc).__name__}\n{exc}".encode("utf-8", "replace")


def _failure(data: bytes) -> Exception:
    """The worker's error as this process raises it: toothcomb's own errors as themselves,
    anything else as a :class:`DecodeError` that names it."""
    name, _, text = data[1:].decode("utf-8", "replace").partition("\n")
    cls = getattr(errors, name, None)
    if isinstance(cls, type) and issubclass(cls, errors.ToothcombError):
        return cls(text)
    return DecodeError(
        f"the second process decoding the crank channel failed ({name}: {text}); decode "
        "again with --one-process"
    )


class FrontEndWorker:
    """``frontends`` (channel -> front end) run over the blocks of ``source`` from sample
    ``start`` on, in a forked process; :meth:`next` gives each block's results in order and
    :meth:`finish` the last edges.

    The caller keeps its own copies of the front ends but must not use them any more: the
    worker's are the live ones. What the caller may still want of them after the pass, the
    pulses each rejected (``rejected``: direction -> count, where a front end counts them),
    comes back with the last edges. Call :meth:`close` when done, also after an error (it
    stops the worker if it still runs). Raises :class:`OSError` when no pipe or process can be
    had (the caller then keeps its front ends). ``watch``: the decode's
    :class:`~toothcomb.decoders.levels.FiniteWatch`, for a worker whose samples the decode does
    not read.
    """

    def __init__(
        self,
        source: Any,
        frontends: dict[int, Any],
        start: int,
        scale: float | None,
        block_size: int,
        watch: Any = None,
    ) -> None:
        self.channels = tuple(sorted(frontends))
        self._queue: deque[tuple[int, dict[int, Edges], dict[int, float]]] = deque()
        self._end: bytes | None = None
        self._pid = 0
        read_fd, write_fd = os.pipe()
        _widen(write_fd)
        try:
            with warnings.catch_warnings():
                # (Python 3.12 on warns of forking with threads; there are none, see can_fork)
                warnings.simplefilter("ignore", DeprecationWarning)
                pid = os.fork()
        except OSError:
            os.close(read_fd)
            os.close(write_fd)
            raise
        if pid == 0:  # pragma: no cover - the worker (coverage does not follow a fork)
            os.close(read_fd)
            _work(Connection(write_fd, readable=False), source, frontends, self.channels,
                  start, scale, block_size, watch)
        os.close(write_fd)
        self._pid = pid
        self._conn = Connection(read_fd, writable=False)

    def _receive(self) -> None:
        try:
            got = self._conn.recv_bytes()
        except (EOFError, OSError):
            status = self._reap()
            raise DecodeError(
                "the second process decoding the crank channel stopped before the end of the "
                f"capture ({status}); decode again with --one-process"
            ) from None
        kind = got[:1]
        if kind == _FAILED:
            self._reap()
            raise _failure(got)
        if kind == _END:
            self._end = got
        elif kind == _BLOCKS:
            self._queue.extend(unpack_blocks(got, self.channels))
        else:
            self.close()
            raise DecodeError("the second process decoding the crank channel sent nonsense")

    def next(self) -> tuple[int, dict[int, Edges], dict[int, float]]:
        """The next block's (stop, channel -> edges, channel -> settled time)."""
        while not self._queue:
            if self._end is not None:
                raise RuntimeError("the worker ended before the blocks did")
            self._receive()
        return self._queue.popleft()

    def finish(
        self,
    ) -> tuple[dict[int, Edges], dict[int, float], dict[int, dict[int, int]]]:
        """The edges the front ends held at the end, their settled times, and the pulses each
        rejected (channels whose front end counts them)."""
        while self._end is None:
            if self._queue:
                raise RuntimeError("the worker has blocks left at the end")
            self._receive()
        self._reap()
        return _unpack_end(self._end, self.channels)

    def _reap(self) -> str:
        """Wait for the worker to end; how it ended, in words."""
        if not self._pid:
            return "ended"
        try:
            _, status = os.waitpid(self._pid, 0)
        except ChildProcessError:
            status = 0
        self._pid = 0
        self._conn.close()
        if os.WIFSIGNALED(status):
            return f"killed by signal {os.WTERMSIG(status)}"
        return f"exit status {os.WEXITSTATUS(status)}"

    def close(self) -> None:
        """Stop the worker if it still runs, and wait for it. Calling it again does nothing."""
        if self._pid:
            try:
                os.kill(self._pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
            self._reap()


def _widen(fd: int) -> None:
    """Let the pipe hold :data:`PIPE_BYTES` (where the system allows): the worker then runs
    that far ahead instead of waiting for the decode to take each message."""
    try:
        import fcntl

        fcntl.fcntl(fd, fcntl.F_SETPIPE_SZ, PIPE_BYTES)
    except (ImportError, AttributeError, OSError):
        pass


def settled_times(frontends: dict[int, Any]) -> dict[int, float]:
    """Each front end's ``settled_s``, where it has one."""
    return {c: float(fe.settled_s) for c, fe in frontends.items() if hasattr(fe, "settled_s")}


def reads_apart(source: Any) -> bool:
    """Whether ``source`` reads some channels of its float samples without the others
    (``blocks_from(size, start=..., channels=...)``: an HDF5 file stores each channel apart).
    The worker then reads only its own, and the decode only the others."""
    return _takes(getattr(source, "blocks_from", None), "channels")


def _float_blocks(source: Any, block_size: int, start: int, channels: tuple[int, ...]) -> Any:
    """The float blocks a worker reads from ``start`` on: only its own channels' samples where
    the source can leave the others out."""
    if reads_apart(source):
        return source.blocks_from(block_size, start=start, channels=frozenset(channels))
    return source.blocks_from(block_size, start=start)


def _work(  # pragma: no cover - runs in the forked worker
    conn: Connection,
    source: Any,
    frontends: dict[int, Any],
    channels: tuple[int, ...],
    start: int,
    scale: float | None,
    block_size: int,
    watch: Any = None,
) -> None:
    """The worker's whole life: the blocks, the front ends, the edges back; then exit without
    running anything of the parent's (no atexit, no finalizers). ``scale``: the value of an
    integer code, or None for float samples; ``watch``: a
    :class:`~toothcomb.decoders.levels.FiniteWatch` for the worker's channels, when the decode
    does not read them."""
    code = 0
    try:
        signal.signal(signal.SIGINT, signal.SIG_IGN)
        warnings.simplefilter("ignore")
        out: list[tuple[int, dict[int, Edges], dict[int, float]]] = []
        blocks = (
            source.code_blocks(block_size, start=start)
            if scale is not None
            else _float_blocks(source, block_size, start, channels)
        )
        for block in blocks:
            data = block.data
            if watch is not None:  # the decode does not see these channels' samples
                for c in channels:
                    watch.check(data[:, c : c + 1])
            edges = {
                c: (
                    fe.process_codes(data[:, c], block.start, scale)
                    if scale is not None
                    else fe.process(data[:, c], block.start)
                )
                for c, fe in frontends.items()
            }
            out.append((block.stop, edges, settled_times(frontends)))
            if len(out) >= GROUP:
                conn.send_bytes(pack_blocks(out, channels))
                out = []
        if out:
            conn.send_bytes(pack_blocks(out, channels))
        final = {c: fe.finish() for c, fe in frontends.items()}
        rejected = {
            c: dict(fe.rejected) for c, fe in frontends.items() if hasattr(fe, "rejected")
        }
        conn.send_bytes(_pack_end(final, settled_times(frontends), rejected, channels))
    except BaseException as exc:  # every failure goes back to the decode
        try:
            conn.send_bytes(_pack_failure(exc))
        except BaseException:  # the decode is gone
            code = 1
    finally:
        os._exit(code)
