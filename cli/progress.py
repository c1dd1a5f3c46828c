"""A progress bar for long decodes, fed by the library's ``progress(what, done, total)`` calls."""

from __future__ import annotations

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


class StageProgress:
    """One bar per stage the library names, shown on ``console`` while the context is open.

    The object is the callback the library takes: ``bar(what, done, total)``. A total of 0 or
    less means "unknown" (the bar then pulses).

    >>> import io
    >>> from rich.console import Console
    >>> con = Console(file=io.StringIO(), force_terminal=True, width=60)
    >>> with StageProgress(con) as bar:
    ...     bar("reading", 5, 10)
    ...     bar("reading", 10, 10)
    >>> bar.completed("reading")
    10.0
    """

    def __init__(self, console: Console) -> None:
        self._progress = Progress(
            TextColumn("[bold]{task.description}"),
            BarColumn(),
            TaskProgressColumn(),
            TimeElapsedColumn(),
            TimeRemainingColumn(),
            console=console,
            transient=True,
        )
        self._tasks: dict[str, TaskID] = {}

    def __enter__(self) -> StageProgress:
        self._progress.start()
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self._progress.stop()

    def __call__(self, what: str, done: int, total: int) -> None:
        known = total if total > 0 else None
        task = self._tasks.get(what)
        if task is None:
            task = self._progress.add_task(what, total=known)
            self._tasks[what] = task
        self._progress.update(task, completed=done, total=known)

    def completed(self, what: str) -> float:
        """How far the stage ``what`` has come (for tests and scripts)."""
        return float(self._progress.tasks[self._tasks[what]].completed)


@contextmanager
def progress_for(console: Console, enabled: bool) -> Iterator[ProgressCallback | None]:
    """Yield a progress callback drawing on ``console``, or None when it should stay silent.

    Bars are drawn only when ``enabled`` and the console is a terminal (never into a pipe or a
    log file).

    >>> import io
    >>> from rich.console import Console
    >>> with progress_for(Console(file=io.StringIO()), enabled=True) as cb:
    ...     print(cb)
    None
    """
    if not enabled or not console.is_terminal:
        yield None
        return
    with StageProgress(console) as bar:
        yield bar
