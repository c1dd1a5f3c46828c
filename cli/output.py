"""Writing results: plain JSON (NaN becomes null) and atomic file replacement.

A file written here is never seen half-written: the bytes go to a temporary file in the same
folder, are flushed to disk, and then take the target's name in one ``os.replace``.
"""

from __future__ import annotations

import json
import math
import os
import sys
import tempfile
from collections.abc import Mapping
from pathlib import Path
from typing import IO, Any

import numpy as np
from toothcomb.decoders.errors import UsageError

#: the value of ``--json`` that means "write to standard output"
STDOUT = "-"


def to_plain(value: Any) -> Any:
    """Turn ``value`` into plain JSON types: floats stay floats, NaN and infinities become None.

    Mappings become dicts with string keys, tuples/lists/arrays become lists, numpy scalars
    become Python numbers.

    >>> to_plain({"a": (1, float("nan")), "b": np.float32(0.5), "c": np.arange(2)})
    {'a': [1, None], 'b': 0.5, 'c': [0, 1]}
    """
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, (np.bool_,)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        f = float(value)
        return f if math.isfinite(f) else None
    if isinstance(value, Mapping):
        return {str(k): to_plain(v) for k, v in value.items()}
    if isinstance(value, np.ndarray):
        if value.dtype.kind in "iub" or (value.dtype.kind == "f" and np.isfinite(value).all()):
            return value.tolist()  # plain numbers already, NaN-free
        return [to_plain(v) for v in value.tolist()]
    if isinstance(value, (list, tuple)):
        if all(type(v) is float and v - v == 0.0 for v in value):
            return list(value)  # finite floats (a NaN or an infinity fails v - v == 0)
        return [to_plain(v) for v in value]
    if hasattr(value, "to_json"):
        return to_plain(value.to_json())
    raise TypeError(f"cannot write a {type(value).__name__} as JSON")


def dumps_json(data: Any, *, indent: int | None = 2) -> str:
    """JSON text of ``data`` (after :func:`to_plain`), ending in a newline: the text of
    ``json.dumps(..., indent=indent, ensure_ascii=False)``, written faster (:func:`_indented`).

    >>> dumps_json({"x": float("inf"), "y": 1.5}, indent=None)
    '{"x": null, "y": 1.5}\\n'
    >>> print(dumps_json({"a": [1, [2.5, None]], "b": {}}), end="")
    {
      "a": [
        1,
        [
          2.5,
          null
        ]
      ],
      "b": {}
    }
    """
    plain = to_plain(data)
    if indent is None:
        return json.dumps(plain, allow_nan=False, ensure_ascii=False) + "\n"
    return _indented(plain, " " * indent, "\n") + "\n"


#: the JSON text of null, true and false (looked up for ``None`` and ``bool`` only: an ``int``
#: is taken by its exact type first, and ``True == 1`` as a key)
_CONSTANTS = {True: "true", False: "false", None: "null"}


def _numbers(values: list[Any]) -> bool:
    """Whether every item is an ``int`` or ``float`` (not a ``bool``), written by ``repr``."""
    return all(type(v) is float or type(v) is int for v in values)


def _indented(value: Any, step: str, at: str) -> str:
    """``value`` (plain JSON types) as ``json.dumps`` writes it with ``indent`` (``step`` the
    indent's spaces, ``at`` the newline and indentation of the line the value starts on).

    The standard library's encoder writes indented JSON in Python, a call per item; this writes
    the lists of numbers that make most of a result (reference times, events, the speed trace)
    with one ``join`` each, the same text to the byte (a float as ``repr`` writes it, as the
    encoder does)."""
    if type(value) is float or type(value) is int:
        return repr(value)
    if value is None or type(value) is bool:
        return _CONSTANTS[value]
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    inner = at + step
    if isinstance(value, dict):
        if not value:
            return "{}"
        items = (
            json.dumps(str(k), ensure_ascii=False) + ": " + _indented(v, step, inner)
            for k, v in value.items()
        )
        return "{" + inner + ("," + inner).join(items) + at + "}"
    if isinstance(value, list):
        if not value:
            return "[]"
        if _numbers(value):
            return "[" + inner + ("," + inner).join(map(repr, value)) + at + "]"
        deeper = inner + step
        if all(type(v) is list and v and _numbers(v) for v in value):
            # rows of numbers (events: time and angle): each row's own join
            join = ("," + deeper).join
            rows = ("[" + deeper + join(map(repr, v)) + inner + "]" for v in value)
            return "[" + inner + ("," + inner).join(rows) + at + "]"
        return "[" + inner + ("," + inner).join(_indented(v, step, inner) for v in value) + at + "]"
    raise TypeError(f"cannot write a {type(value).__name__} as JSON")


def _describe_target(path: Path, what: str) -> str:
    return f"{what} {str(path)!r}"


def write_atomic(
    path: str | os.PathLike[str],
    data: bytes | str,
    *,
    what: str = "file",
    overwrite: bool = True,
) -> None:
    """Write ``data`` to ``path`` so that readers see either the old file or the whole new one.

    The temporary file is created next to the target (same file system, so ``os.replace`` is
    atomic) and removed if anything fails, Ctrl-C included. A new file gets the usual
    permissions (0666 less the umask); an existing file keeps its own. ``what`` names the file in
    error messages. With ``overwrite=False`` an existing target is refused
    (:class:`UsageError`) and left as it is: the new file is linked into place, which fails
    atomically when the name is taken.

    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> write_atomic(d / "r.json", "{}\\n")
    >>> (d / "r.json").read_text(), sorted(p.name for p in d.iterdir())
    ('{}\\n', ['r.json'])
    """
    target = Path(path)
    payload = data.encode("utf-8") if isinstance(data, str) else data
    folder = target.parent if str(target.parent) else Path(".")
    if target.is_dir():
        raise UsageError(
            f"cannot write {_describe_target(target, what)}: it is a folder; give a file name"
        )
    if not folder.is_dir():
        raise UsageError(
            f"cannot write {_describe_target(target, what)}: the folder {str(folder)!r} does not "
            "exist; create it first or choose another place"
        )
    try:
        mode = target.stat().st_mode & 0o7777
    except OSError:
        umask = os.umask(0)
        os.umask(umask)
        mode = 0o666 & ~umask
    try:
        fd, tmp_name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=folder)
    except OSError as exc:
        raise UsageError(
            f"cannot write {_describe_target(target, what)}: {exc.strerror or exc}; "
            "choose a folder you can write to"
        ) from exc
    tmp = Path(tmp_name)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(payload)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, mode)
        if overwrite:
            os.replace(tmp, target)
        else:
            _link_new(tmp, target)
    except FileExistsError:
        tmp.unlink(missing_ok=True)
        raise UsageError(
            f"{_describe_target(target, what)} already exists; give --force to replace it, or "
            "choose another name"
        ) from None
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise UsageError(
            f"cannot write {_describe_target(target, what)}: {exc.strerror or exc}; "
            "check the free space and permissions there"
        ) from exc
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def _link_new(tmp: Path, target: Path) -> None:
    """Give ``tmp`` the name ``target`` only if that name is free (FileExistsError otherwise),
    then drop the temporary name."""
    try:
        os.link(tmp, target)
    except FileExistsError:
        raise
    except OSError:  # a file system without hard links: check, then rename
        if target.exists() or target.is_symlink():
            raise FileExistsError(str(target)) from None
        os.replace(tmp, target)
        return
    tmp.unlink()


def write_json(
    data: Any, target: str, *, stdout: IO[str] | None = None, overwrite: bool = True
) -> None:
    """Write ``data`` as JSON to ``target``: a file path (atomically) or ``"-"`` for stdout.

    >>> import io
    >>> buf = io.StringIO()
    >>> write_json({"rpm": 800.0}, "-", stdout=buf)
    >>> buf.getvalue()
    '{\\n  "rpm": 800.0\\n}\\n'
    """
    text = dumps_json(data)
    if target == STDOUT:
        out = stdout if stdout is not None else sys.stdout
        out.write(text)
        out.flush()
        return
    write_atomic(target, text, what="JSON file", overwrite=overwrite)
