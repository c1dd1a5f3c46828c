"""The pattern library: crank wheels and cam patterns as TOML data files.

Adding an engine's trigger pattern needs no code: write one small TOML file and either put it in
a folder named by the ``TOOTHCOMB_PATTERNS`` environment variable (several folders separated by
the path separator) or give its path wherever a pattern name is accepted. Built-in patterns
live in this package's ``crank/`` and ``cam/`` folders. Every file carries::

    format = "toothcomb-pattern"
    version = 1
    kind = "crank"            # or "cam"
    name = "tri-gap-36"       # letters, digits, '.', '_', '-'; the file is named <name>.toml
    description = "..."

and the keys of its kind (``wheels.pattern`` reads crank files, ``analysis.campattern`` cam
files). A user file whose name matches a built-in one takes its place, and the listing says so.

>>> sorted(p.name for p in entries("crank").values())[:3]
['12+1', '12-1', '24-1']
>>> find("crank", "60-2").origin
'built-in'
"""

from __future__ import annotations

import functools
import os
import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Any, Literal

from ..errors import UsageError

FORMAT = "toothcomb-pattern"
VERSION = 1
#: folders of user pattern files, separated by os.pathsep
ENV = "TOOTHCOMB_PATTERNS"
KINDS = ("crank", "cam")
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.+-]*$")

Kind = Literal["crank", "cam"]


@dataclass(frozen=True)
class PatternFile:
    """One pattern file, read and checked for the keys every pattern file has."""

    kind: str
    name: str
    description: str
    #: where it came from: a path, or ``<package>/crank/<name>.toml``
    source: str
    #: "built-in" or "user"
    origin: str
    #: the whole TOML table
    data: Mapping[str, Any]
    #: the built-in file this one takes the place of, if any
    shadows: str = ""


def parse_text(text: str, source: str, origin: str = "user") -> PatternFile:
    """Check the common keys of a pattern file's TOML text; raises UsageError naming ``source``.

    >>> p = parse_text('format = "toothcomb-pattern"\\nversion = 1\\nkind = "cam"\\n'
    ...                'name = "x"\\ndescription = "d"\\nwindows_deg = [[0, 30]]', "x.toml")
    >>> p.kind, p.name, p.data["windows_deg"]
    ('cam', 'x', [[0, 30]])
    """
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise UsageError(
            f"pattern file {source!r} is not valid TOML ({exc}); fix that line"
        ) from None
    if data.get("format") != FORMAT:
        raise UsageError(
            f"pattern file {source!r} has format {data.get('format')!r}; a pattern file starts "
            f'with format = "{FORMAT}"'
        )
    if data.get("version") != VERSION:
        raise UsageError(
            f"pattern file {source!r} has version {data.get('version')!r}; this toothcomb reads "
            f"version {VERSION}"
        )
    kind = data.get("kind")
    if kind not in KINDS:
        raise UsageError(
            f"pattern file {source!r} has kind {kind!r}; give kind = \"crank\" or \"cam\""
        )
    name = data.get("name")
    if not isinstance(name, str) or not _NAME.match(name):
        raise UsageError(
            f"pattern file {source!r} has name {name!r}; give a name of letters, digits, "
            "'.', '_', '+' or '-'"
        )
    desc = data.get("description", "")
    if not isinstance(desc, str):
        raise UsageError(f"pattern file {source!r}: description {desc!r} is not text")
    return PatternFile(kind, name, desc, source, origin, data)


def load_file(path: str | os.PathLike[str], origin: str = "user") -> PatternFile:
    """Read and check one pattern file."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise UsageError(f"pattern file {str(p)!r} does not exist; check the path") from None
    except UnicodeDecodeError:
        raise UsageError(f"pattern file {str(p)!r} is not UTF-8 text; a pattern is TOML") from None
    except OSError as exc:
        raise UsageError(
            f"pattern file {str(p)!r} cannot be read ({exc.strerror or exc}); check it"
        ) from None
    return parse_text(text, str(p), origin)


def user_dirs() -> list[Path]:
    """The folders named by ``TOOTHCOMB_PATTERNS``, in order."""
    raw = os.environ.get(ENV, "")
    return [Path(d) for d in raw.split(os.pathsep) if d.strip()]


@functools.cache
def _builtin(kind: str) -> dict[str, PatternFile]:
    """The built-in patterns of ``kind`` (package data: read once per process; callers copy
    the dict before changing it)."""
    out: dict[str, PatternFile] = {}
    folder = resources.files(__package__ or "toothcomb.decoders.patterns") / kind
    for item in sorted(folder.iterdir(), key=lambda x: x.name):
        if item.name.endswith(".toml"):
            pf = parse_text(item.read_text(encoding="utf-8"), f"<built-in>/{kind}/{item.name}",
                            "built-in")
            if pf.kind != kind:
                raise UsageError(f"built-in pattern {pf.source!r} has kind {pf.kind!r}")
            out[pf.name] = pf
    return out


def entries(kind: Kind | str) -> dict[str, PatternFile]:
    """Every pattern of ``kind``: the built-in ones, then the user folders' (a user file of the
    same name takes the built-in one's place). A user file that cannot be read raises
    UsageError naming it -- a library that silently drops a pattern would decode with the
    wrong one."""
    if kind not in KINDS:
        raise UsageError(f"pattern kind {kind!r} is unknown; use crank or cam")
    out = dict(_builtin(kind))
    for folder in user_dirs():
        if not folder.is_dir():
            raise UsageError(
                f"{ENV} names {str(folder)!r}, which is not a folder; fix the variable"
            )
        for path in sorted(folder.glob("*.toml")):
            pf = load_file(path)
            if pf.kind != kind:
                continue
            if pf.name in out:
                prev = out[pf.name]
                pf = PatternFile(pf.kind, pf.name, pf.description, pf.source, pf.origin,
                                 pf.data, shadows=prev.source)
            out[pf.name] = pf
    return out


def looks_like_path(text: str) -> bool:
    return text.endswith(".toml") or os.sep in text or "/" in text


def find(kind: Kind | str, text: str) -> PatternFile | None:
    """The pattern ``text`` names: a path to a pattern file, or a library name. None when it
    is neither (so a plugin can try other notations); a path of the wrong kind raises."""
    if looks_like_path(text):
        pf = load_file(text)
        if pf.kind != kind:
            raise UsageError(f"pattern file {text!r} is a {pf.kind} pattern, not a {kind} one")
        return pf
    return entries(kind).get(text.strip())
