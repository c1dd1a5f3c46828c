"""A progress bar for long decodes, fed by the library's ``progress(what, done, total)`` calls."""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from types import TracebackType

from rich.console import Console
from rich.progress import (
    BarColumn,
    Progress,
    TaskID,
    TaskProgressColumn,
    TextColumn,
    TimeElapsedColumn,
    TimeRemainingColumn,
)

#: what the library calls: (what, done, total)
ProgressCallback = Callable[[str, int, int], None]

#: a decode shorter than this (seconds) shows no bar at all: it would only flicker
SHOW_AFTER_S = 1.0
#: the bar is updated at most this often (seconds); the library reports every block
UPDATE_EVERY_S = 0.1


class StageProgress:
    """One bar per stage the library names, shown on ``console`` while the context is open.

    The object is the callback the library takes: ``bar(what, done, total)``. A total of 0 or
    less means "unknown" (the bar then pulses). The bar appears once ``show_after_s`` seconds
    have gone by (:func:`progress_for` waits :data:`SHOW_AFTER_S`, so a short decode shows
    none) and is redrawn at most every :data:`UPDATE_EVERY_S` seconds, so that reporting every
    block costs next to nothing. ``clock`` gives the time in seconds (for tests).

    >>> import io
    >>> from rich.console import Console
    >>> con = Console(file=io.StringIO(), force_terminal=True, width=60)
    >>> with StageProgress(con) as bar:
    ...     bar("reading", 5, 10)
    ...     bar("reading", 10, 10)
    >>> bar.completed("reading"), bar.shown
    (10.0, True)
    """

    def __init__(
        self,
        console: Console,
        show_after_s: float = 0.0,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self._clock = clock
        self._show_after = float(show_after_s)
        self._t0 = 0.0
        self._last: dict[str, float] = {}
        self._latest: dict[str, tuple[int, int]] = {}
        #: True once the bar has been drawn
        self.shown = False
        self._progress = Progress(
            TextColumn("[bold]{task.description}"),
            BarColumn(),
            TaskProgressColumn(),
            TimeElapsedColumn(),
            TimeRemainingColumn(),
            console=console,
            transient=True,
            # drawn from the calls alone: no thread of its own (a decode may fork a worker,
            # which is safe only while the process runs one thread)
            auto_refresh=False,
        )
        self._tasks: dict[str, TaskID] = {}

    def __enter__(self) -> StageProgress:
        self._t0 = self._clock()
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        if self.shown:
            self._progress.stop()

    def __call__(self, what: str, done: int, total: int) -> None:
        self._latest[what] = (done, total)
        now = self._clock()
        task = self._tasks.get(what)
        finished = 0 < total <= done
        if task is not None and not finished and now - self._last[what] < UPDATE_EVERY_S:
            return
        self._last[what] = now
        known = total if total > 0 else None
        if task is None:
            task = self._progress.add_task(what, total=known)
            self._tasks[what] = task
        self._progress.update(task, completed=done, total=known)
        if not self.shown and now - self._t0 >= self._show_after:
            self._progress.start()
            self.shown = True
        if self.shown:
            self._progress.refresh()

    def completed(self, what: str) -> float:
        """How far the stage ``what`` has come (for tests and scripts)."""
        return float(self._latest[what][0])


@contextmanager
def progress_for(
    console: Console, enabled: bool, show_after_s: float = SHOW_AFTER_S
) -> Iterator[ProgressCallback | None]:
    """Yield a progress callback drawing on ``console``, or None when it should stay silent.

    Bars are drawn only when ``enabled`` and the console is a terminal (never into a pipe or a
    log file), and only once the work has taken ``show_after_s`` seconds.

    >>> import io
    >>> from rich.console import Console
    >>> with progress_for(Console(file=io.StringIO()), enabled=True) as cb:
    ...     print(cb)
    None
    """
    if not enabled or not console.is_terminal:
        yield None
        return
    with StageProgress(console, show_after_s=show_after_s) as bar:
        yield bar
