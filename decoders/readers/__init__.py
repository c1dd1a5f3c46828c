"""Capture readers: turn a file into a stream of sample blocks.

:func:`open_capture` is the one entry point. It picks a reader plugin (group
``toothcomb.readers``) by sniffing the file's content: HDF5 first, then audio, then VCD, then
any third-party reader, then delimited text, or the one named by ``reader=``. The built-in
readers are registered through entry points exactly as a third-party reader would be.

>>> import numpy as np, os, tempfile
>>> from toothcomb.decoders.readers.write import write_capture
>>> path = os.path.join(tempfile.mkdtemp(), "run.flac")
>>> write_capture(path, np.zeros((4800, 2)), 48000, ["crank", "cam"])
>>> with open_capture(path) as src:
...     print(src.info.format, src.info.sample_rate, src.info.n_samples)
...     print([b.data.shape for b in src.blocks(2000)])
flac 48000.0 4800
[(2000, 2), (2000, 2), (800, 2)]
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import replace
from typing import Any

from ..errors import CaptureError, PluginError, UsageError
from ..model import CaptureSource
from ..plugins import READERS, plugins
from .base import (
    check_channel_count,
    check_file,
    check_file_rate,
    check_sample_rate,
    split_dataset_path,
)

__all__ = ["PREFERRED_ORDER", "CaptureSource", "open_capture", "supported_formats"]

#: readers tried first, in this order (sniffing binary formats before text, and VCD's header
#: keywords before the lenient delimited-text sniff); others follow by name
PREFERRED_ORDER: tuple[str, ...] = ("hdf5", "audio", "vcd", "csv")
#: readers tried last: the delimited-text sniff takes almost any file of numbers, so a
#: third-party reader of a text format gets to look first
LAST_ORDER: tuple[str, ...] = ("csv",)


def _ordered() -> list[tuple[str, Any]]:
    have = plugins(READERS)
    first = [n for n in PREFERRED_ORDER if n in have and n not in LAST_ORDER]
    last = [n for n in LAST_ORDER if n in have]
    names = first + sorted(n for n in have if n not in first and n not in last) + last
    return [(n, have[n]) for n in names]


def supported_formats() -> str:
    """The readers there are and their suffixes, in words (for messages and ``--help``).

    >>> "hdf5 (.h5" in supported_formats()
    True
    """
    parts = []
    for name, r in _ordered():
        exts = ", ".join(getattr(r, "extensions", ())) or "any suffix"
        parts.append(f"{name} ({exts})")
    return "; ".join(parts)


def _detects(reader: Any, path: str) -> bool:
    try:
        return bool(reader.detect(path))
    except Exception:  # a sniff must never abort the search for the right reader
        return False


def open_capture(
    path: str | os.PathLike[str],
    *,
    sample_rate: float | None = None,
    reader: str | None = None,
    progress: Callable[[int, int], None] | None = None,
    **options: Any,
) -> CaptureSource:
    """Open a capture file and return a source that streams it in blocks.

    ``path`` may name a dataset inside an HDF5 file as ``file.h5:/group/dataset``.
    ``sample_rate`` (Hz) is for files that carry none, or overrides the file's own (with a note in
    ``info.notes``). ``reader`` forces a reader by name (``"audio"``, ``"csv"``, ``"hdf5"`` or a
    third-party one); other keyword options go to the reader. ``progress(done, total)`` is
    called as a reader that reads the whole file when opening it (a scope CSV: every row is
    parsed and checked) gets on; readers that declare ``takes_progress = True`` are given it.

    Raises :class:`CaptureError` for a missing, empty or unreadable file or one no reader
    recognises (the message lists the formats there are), :class:`UsageError` for bad options.
    """
    given = os.fspath(path)
    rate = check_sample_rate(sample_rate)
    file_part, inner = split_dataset_path(given)
    check_file(file_part)
    if reader is not None:
        have = plugins(READERS)
        if reader not in have:
            raise UsageError(
                f"there is no reader {reader!r}; choose one of {', '.join(sorted(have))}"
            )
        chosen = (reader, have[reader])
    else:
        chosen = next(((n, r) for n, r in _ordered() if _detects(r, file_part)), None)
        if chosen is None:
            suffix = os.path.splitext(file_part)[1].lower()
            claim = [(n, r) for n, r in _ordered() if suffix in getattr(r, "extensions", ())]
            if not claim:
                raise CaptureError(
                    f"{given}: not a capture format toothcomb reads; supported are "
                    f"{supported_formats()}"
                )
            # its suffix says what it should be: let that reader say what is wrong with it
            chosen = claim[0]
    name, plugin = chosen
    if inner is not None:
        if name != "hdf5" and not getattr(plugin, "takes_dataset_path", False):
            raise CaptureError(
                f"{given}: only HDF5 files take a ':/path' suffix, and {file_part} is read as "
                f"{name}"
            )
        options["dataset"] = inner
    if rate is not None:
        options["sample_rate"] = rate
    if progress is not None and getattr(plugin, "takes_progress", False):
        options["progress"] = progress
    try:
        source = plugin.open(file_part, **options)
    except (CaptureError, UsageError, PluginError):
        raise
    except TypeError as exc:
        raise UsageError(f"reader {name!r} does not take these options ({exc})") from None
    except OSError as exc:
        # permissions changed, or a disk error, between the checks above and the reader's open
        raise CaptureError(
            f"{given}: cannot be read ({exc.strerror or exc}); check the file and its permissions"
        ) from None
    try:
        check_channel_count(given, source.info.n_channels, f"the file (read as {name})")
        check_file_rate(given, float(source.info.sample_rate))
    except CaptureError:
        source.close()
        raise
    if source.info.path != given:
        try:
            source.info = replace(source.info, path=given)
        except AttributeError:  # a third-party source with a read-only info keeps its own
            pass
    return source
