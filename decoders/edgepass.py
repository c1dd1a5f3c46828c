"""One pass of every channel's samples through its front end, for the whole decode.

Turning samples into edges needs to know only what each channel carries (the front ends'
calibration), not which channel is the crank or which wheel it has. So the pass starts right
after the channels are looked at, and the first seconds' edges that identify the crank and its
wheel are the first edges of that same pass (:class:`Received` keeps them): no sample goes
through a front end twice (the probe the channels were looked at is read on its own). Once the
crank is known, the channels nobody follows are dropped (:meth:`EdgePass.keep`).

The pass hands over edges, never samples, so memory stays flat whatever the capture's length.

A worker thread for the pass was tried and left out: with the front ends on a thread of their
own beside the tooth tracker, ten-minute two-channel WAVs decoded no faster on two cores (1.49
to 1.82 s threaded against 1.35 to 1.87 s in one thread, over eight runs): the threads trade the
interpreter lock at every hand-over. One thread per channel, each reading the file itself, was
no faster either. Memory is not what holds them back (two ten-minute decodes in two processes at
once take 0.48-0.49 s each, against 0.44 s alone), and a process of its own is faster: on a long
capture the crank's front end, the longest part of the pass, goes on in a forked worker
(:meth:`EdgePass.hand_off`, :mod:`toothcomb.decoders.worker`), with the same edges.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Generator, Iterator
from dataclasses import dataclass
from typing import Any

from . import worker as _worker
from .levels import FiniteWatch
from .model import Block, CaptureSource, Edges


@dataclass(frozen=True)
class EdgeBatch:
    """What the front ends found in one block (``final``: what they still held at the end)."""

    #: index of the sample after the block
    stop: int
    #: channel -> edges completed by this block
    edges: dict[int, Edges]
    #: channel -> edges of the second front end some channels have (a valve's PWM view)
    extra: dict[int, Edges]
    #: channel -> the front end's ``settled_s`` (where it has one) after the block or an
    #: earlier one: edges before it are all out
    settled: dict[int, float]
    final: bool = False


class EdgePass:
    """Every block of ``source`` through the front ends, as a stream of :class:`EdgeBatch`.

    ``frontends`` and ``extra`` map channels to front ends; ``keep(channels)`` drops the others
    from the next block on (once the decode knows which channels it follows). Iterate over the
    pass once; the last batch (``final``) holds what the front ends still held at the end.
    """

    def __init__(
        self,
        source: CaptureSource,
        frontends: dict[int, Any],
        extra: dict[int, Any],
        block_size: int,
        watch: FiniteWatch,
    ) -> None:
        self._source = source
        self.sample_rate = source.info.sample_rate
        self._frontends = dict(frontends)
        self._extra = dict(extra)
        self._block_size = block_size
        self._watch = watch
        self._wanted: frozenset[int] | None = None
        self._started = False
        #: index of the sample after the last block fed
        self.fed = 0
        #: channels whose front ends are to go to a worker process (:meth:`hand_off`)
        self._to_worker: frozenset[int] = frozenset()
        self._worker_min: int | None = None
        self._worker: _worker.FrontEndWorker | None = None
        #: the sample the worker took over at (None: no worker)
        self.worker_start: int | None = None
        self._rejected: dict[int, dict[int, int]] = {}
        #: the channels this process reads once a worker reads its own (None: all of them)
        self._own: frozenset[int] | None = None
        self._gen: Generator[EdgeBatch, None, None] | None = None

    def keep(self, channels: set[int]) -> None:
        """Follow only ``channels`` (in either map) from the next block on."""
        self._wanted = frozenset(channels)

    def hand_off(self, channels: set[int], min_samples: int | None = None) -> None:
        """Run the front ends of ``channels`` in a worker process from the next block on
        (:mod:`toothcomb.decoders.worker`), when this process can fork one and at least
        ``min_samples`` (default :data:`~toothcomb.decoders.worker.MIN_SAMPLES`, or
        :data:`~toothcomb.decoders.worker.MIN_SAMPLES_APART` for a source whose channels the
        two processes read apart) samples are still to come; otherwise nothing changes. The
        edges are the same either way. :meth:`release` and :meth:`settled_s` are not available
        once a worker took over."""
        self._to_worker = frozenset(channels)
        self._worker_min = min_samples

    def rejected(self, channel: int) -> dict[int, int]:
        """The pulses the front end of ``channel`` rejected, by direction (where it counts
        them; the worker's count where a worker ran it)."""
        if channel in self._rejected:
            return self._rejected[channel]
        return dict(getattr(self._frontends[channel], "rejected", {}))

    def _start_worker(self, start: int, by_codes: bool, scale: float | None) -> None:
        """Fork the worker for :meth:`hand_off`'s channels at block ``start``, if it may be."""
        theirs = {
            c: fe
            for c, fe in self._frontends.items()
            if c in self._to_worker and (self._wanted is None or c in self._wanted)
        }
        self._to_worker = frozenset()
        n = self._source.info.n_samples
        # a file that stores each channel apart: the worker reads its channels, this process
        # the others, and each watches what it reads
        apart = not by_codes and _worker.reads_apart(self._source)
        least = self._worker_min
        if least is None:
            least = _worker.MIN_SAMPLES_APART if apart else _worker.MIN_SAMPLES
        if not (
            theirs
            and (scale or not by_codes)
            and n - start >= least
            and start % self._block_size == 0
            and _worker.starts_anywhere(self._source, codes=by_codes)
            and _worker.can_fork()
        ):
            return
        for fe in theirs.values():  # an optional method: what the worker should inherit
            before_fork = getattr(fe, "before_fork", None)
            if before_fork is not None:
                before_fork(n - start)
        try:
            self._worker = _worker.FrontEndWorker(
                self._source, theirs, start, scale if by_codes else None, self._block_size,
                watch=self._watch if apart else None,
            )
        except OSError:  # no pipe or no process to be had (limits, memory): one process it is
            return
        self.worker_start = start
        if apart:
            every = frozenset(range(self._source.info.n_channels))
            self._own = (every - frozenset(theirs)) | frozenset(self._extra)

    # -- the work itself: a plain loop over the blocks --

    def _batches(self) -> Iterator[EdgeBatch]:
        src = self._source
        scale = getattr(src, "code_scale", None)
        # the second front ends take floats (they clip the samples first)
        by_codes = bool(scale) and all(
            hasattr(fe, "process_codes") for fe in self._frontends.values()
        )
        settled: dict[int, float] | None = None
        try:
            for block in self._blocks(by_codes):
                data = block.data
                self._watch.check(data)
                if self._to_worker:
                    self._start_worker(block.start, by_codes, scale)
                worker = self._worker
                wanted = self._wanted
                theirs: dict[int, Edges] = {}
                their_settled: dict[int, float] = {}
                if worker is not None:
                    stop, theirs, their_settled = worker.next()
                    if stop != block.stop:
                        raise RuntimeError(f"worker block ends at {stop}, not {block.stop}")
                edges = {}
                for c, fe in self._frontends.items():
                    if c in theirs:
                        edges[c] = theirs[c]
                    elif wanted is None or c in wanted:
                        col = data[:, c]
                        edges[c] = (
                            fe.process_codes(col, block.start, scale)
                            if by_codes
                            else fe.process(col, block.start)
                        )
                extra = {}
                for c, fe in self._extra.items():
                    if wanted is None or c in wanted:
                        col = data[:, c] * scale if by_codes else data[:, c]
                        extra[c] = fe.process(col, block.start)
                self.fed = block.stop
                # the front ends' settled times move only when they search what they gathered,
                # which is when edges come out; an older (earlier) time is always a safe one
                if settled is None or any(len(e) for e in edges.values()):
                    settled = self._settled() | their_settled
                yield EdgeBatch(block.stop, edges, extra, settled)
            wanted = self._wanted
            final: dict[int, Edges] = {}
            final_settled: dict[int, float] = {}
            if self._worker is not None:
                final, final_settled, self._rejected = self._worker.finish()
                self._worker = None
            yield EdgeBatch(
                src.info.n_samples,
                {
                    c: final[c] if c in final else fe.finish()
                    for c, fe in self._frontends.items()
                    if c in final or wanted is None or c in wanted
                },
                {c: fe.finish() for c, fe in self._extra.items() if wanted is None or c in wanted},
                self._settled() | final_settled,
                final=True,
            )
        finally:
            if self._worker is not None:
                self._worker.close()
                self._worker = None

    def _blocks(self, by_codes: bool) -> Iterator[Block]:
        """The blocks of the pass: every channel's samples; once a worker reads its channels
        itself (:attr:`_own` set), only the others'."""
        src = self._source
        size = self._block_size
        stream = src.code_blocks(size) if by_codes else src.blocks(size)
        for block in stream:
            yield block
            if self._own is not None:
                close = getattr(stream, "close", None)
                if close is not None:
                    close()
                yield from src.blocks_from(size, start=block.stop, channels=self._own)
                return

    def release(self) -> EdgeBatch:
        """The edges the front ends can time from what they have been fed, without waiting for
        their batches to fill (those of a front end without ``release`` stay where they are).
        They are the edges the pass gives anyway: the front ends time their work in batches of
        any size."""
        if self.worker_start is not None:
            raise RuntimeError("a pass whose front ends went to a worker releases nothing early")
        wanted = self._wanted

        def out(fes: dict[int, Any]) -> dict[int, Edges]:
            return {
                c: fe.release()
                for c, fe in fes.items()
                if hasattr(fe, "release") and (wanted is None or c in wanted)
            }

        return EdgeBatch(self.fed, out(self._frontends), out(self._extra), self._settled())

    def settled_s(self) -> float:
        """No edge of a followed channel earlier than this (s) is still to come."""
        if self.worker_start is not None:
            raise RuntimeError("a pass whose front ends went to a worker has no settled time")
        wanted = self._wanted
        return min(
            (
                float(getattr(fe, "settled_s", math.inf))
                for c, fe in self._frontends.items()
                if wanted is None or c in wanted
            ),
            default=math.inf,
        )

    def _settled(self) -> dict[int, float]:
        return _worker.settled_times(self._frontends)

    def __iter__(self) -> Iterator[EdgeBatch]:
        if self._started:
            raise RuntimeError("an edge pass is iterated once")
        self._started = True
        self._gen = self._batches()
        return self._gen

    def close(self) -> None:
        """End the pass where it is: its worker, if one runs, is stopped and waited for (by the
        pass's own ``finally``). A decode that fails half-way calls it, so that no worker
        outlives it."""
        if self._gen is not None:
            self._gen.close()


class Received:
    """The batches of an :class:`EdgePass` taken so far, for the first seconds' look at the
    edges before the decode proper follows them."""

    def __init__(self, edge_pass: EdgePass, progress: Callable[[int], None] | None) -> None:
        self._pass = edge_pass
        self._rate = edge_pass.sample_rate
        self._batches = iter(edge_pass)
        self._progress = progress
        self.held: list[EdgeBatch] = []
        self.stop = 0
        self.done = False

    def __iter__(self) -> Iterator[EdgeBatch]:
        """The batches held, then the rest of the pass."""
        held, self.held = self.held, []
        yield from held
        for batch in self._batches:
            self.stop = batch.stop
            self.done = batch.final
            yield batch

    def until(self, t_s: float) -> None:
        """Take batches until every edge before ``t_s`` seconds is out, or the pass has ended.
        Past that time, what the front ends hold is released block by block until they have
        settled beyond it."""
        limit = t_s * self._rate
        while not self.done:
            if self.stop >= limit:
                self.held.append(self._pass.release())
                if self._pass.settled_s() >= t_s:
                    break
            batch = next(self._batches, None)
            if batch is None:
                self.done = True
                break
            self.held.append(batch)
            self.stop = batch.stop
            self.done = batch.final
            if self._progress is not None:
                self._progress(batch.stop)

    def edges(self, channel: int, before_s: float | None = None) -> Edges:
        """The edges of ``channel`` taken so far (those before ``before_s`` seconds)."""
        e = Edges.concat([b.edges[channel] for b in self.held if channel in b.edges])
        return e if before_s is None else e.select(e.times < before_s)
