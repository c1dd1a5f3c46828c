"""Plugin discovery through entry points.

Three groups, each with the attributes a plugin must have (checked when it is loaded, so a
wrong plugin is a clear error naming it, not a failure deep inside a decode):

``toothcomb.readers``
    a class with ``name``, ``extensions`` (tuple of lower-case suffixes), ``detect(path) -> bool``
    and ``open(path, **options) -> CaptureSource``.
``toothcomb.frontends``
    a class with ``name`` and ``__init__(sample_rate, levels, **options)``, ``process(samples,
    start) -> Edges`` and ``finish() -> Edges``.
``toothcomb.wheels``
    a class with ``name``, ``parse(text) -> spec or None`` and ``decoder(spec, ...)``.

The built-ins are registered in ``pyproject.toml`` the same way a third party registers its own.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from functools import cache
from importlib.metadata import EntryPoint, entry_points
from typing import Any

from .errors import PluginError

READERS = "toothcomb.readers"
FRONTENDS = "toothcomb.frontends"
WHEELS = "toothcomb.wheels"

#: attributes each group's plugins must carry
REQUIRED: dict[str, tuple[str, ...]] = {
    READERS: ("name", "extensions", "detect", "open"),
    FRONTENDS: ("name", "process", "finish"),
    WHEELS: ("name", "parse", "decoder"),
}

# Used when the package is imported from a source tree that was never installed, so that the
# library still works (the entry points are then missing). Same targets as pyproject.toml.
_BUILTIN: dict[str, dict[str, str]] = {
    READERS: {
        "audio": "toothcomb.decoders.readers.audio:AudioReader",
        "csv": "toothcomb.decoders.readers.scopecsv:ScopeCsvReader",
        "hdf5": "toothcomb.decoders.readers.hdf5:Hdf5Reader",
    },
    FRONTENDS: {
        "hall": "toothcomb.decoders.frontends.hall:HallFrontEnd",
        "vr": "toothcomb.decoders.frontends.vr:VrFrontEnd",
    },
    WHEELS: {
        "missing-tooth": "toothcomb.decoders.wheels.missing_tooth:MissingToothWheel",
    },
}


def check_plugin(group: str, name: str, obj: Any) -> Any:
    """Return ``obj`` if it has what ``group`` needs, else raise :class:`PluginError`.

    >>> class Broken:
    ...     name = "broken"
    >>> try:
    ...     check_plugin(READERS, "broken", Broken)
    ... except PluginError as e:
    ...     print(e)
    plugin 'broken' in group toothcomb.readers lacks extensions, detect, open
    """
    missing = [a for a in REQUIRED[group] if not hasattr(obj, a)]
    if missing:
        raise PluginError(f"plugin {name!r} in group {group} lacks {', '.join(missing)}")
    return obj


def _load(group: str, ep: EntryPoint) -> Any:
    try:
        obj = ep.load()
    except Exception as exc:  # a broken third-party plugin must not hide the others
        raise PluginError(f"plugin {ep.name!r} in group {group} failed to load: {exc}") from exc
    return check_plugin(group, ep.name, obj)


def _entry_points(group: str) -> list[EntryPoint]:
    found = list(entry_points(group=group))
    names = {ep.name for ep in found}
    for name, target in _BUILTIN[group].items():
        if name not in names:
            found.append(EntryPoint(name=name, value=target, group=group))
    return found


@cache
def plugins(group: str) -> dict[str, Any]:
    """All plugins of ``group`` by name, loaded and checked (cached)."""
    return {ep.name: _load(group, ep) for ep in _entry_points(group)}


def plugin(group: str, name: str) -> Any:
    """One plugin by name; the error lists the names there are."""
    have = plugins(group)
    if name not in have:
        there = ", ".join(sorted(have))
        raise PluginError(f"no plugin {name!r} in group {group} (there are: {there})")
    return have[name]


def first(group: str, accept: Callable[[Any], bool], order: Iterable[str] = ()) -> Any | None:
    """The first plugin of ``group`` (names in ``order`` first, then the rest by name) for
    which ``accept(plugin)`` is true, or None."""
    have = plugins(group)
    names = [n for n in order if n in have] + sorted(n for n in have if n not in order)
    for n in names:
        if accept(have[n]):
            return have[n]
    return None
