"""Plugin discovery through entry points.

Four groups, each with the attributes a plugin must have (checked when it is loaded, so a
wrong plugin is a clear error naming it, not a failure deep inside a decode):

``toothcomb.readers``
    a class with ``name``, ``extensions`` (tuple of lower-case suffixes), ``detect(path) -> bool``
    and ``open(path, **options) -> CaptureSource``.
``toothcomb.frontends``
    a class with ``name`` and ``__init__(sample_rate, levels, **options)``, ``process(samples,
    start) -> Edges`` and ``finish() -> Edges``.
``toothcomb.wheels``
    a class with ``name``, ``parse(text) -> spec or None`` and ``decoder(spec, ...)``.
``toothcomb.actuators``
    a class with ``name``, ``add(edges)`` (the channel's edges, block by block) and
    ``finish(drive) -> trace`` (e.g. the PWM periods of a phaser's valve command).

Every plugin may also carry ``handles``: one line saying what it handles (a reader's formats, a
front end's sensor kind, the wheel notation a decoder parses), shown by ``toothcomb plugins``.

The built-ins are registered in ``pyproject.toml`` the same way a third party registers its own.
A plugin that fails to load or lacks what its group needs is set aside with its
:class:`~toothcomb.decoders.errors.PluginError`: the others keep working, asking for the broken
one by name raises its error, and :func:`describe_plugins` lists it with the error.

>>> sorted(plugins(FRONTENDS))
['hall', 'vr']
>>> [(p.name, p.ok) for p in describe_plugins(WHEELS)]
[('missing-tooth', True), ('pattern', True)]
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from dataclasses import dataclass
from functools import cache
from importlib.metadata import EntryPoint, entry_points
from typing import Any

from .errors import PluginError

READERS = "toothcomb.readers"
FRONTENDS = "toothcomb.frontends"
WHEELS = "toothcomb.wheels"
ACTUATORS = "toothcomb.actuators"

#: every group, in the order data flows through them
GROUPS: tuple[str, ...] = (READERS, FRONTENDS, WHEELS, ACTUATORS)

#: what each group's plugins are called in reports
KINDS: dict[str, str] = {
    READERS: "reader", FRONTENDS: "front end", WHEELS: "wheel decoder",
    ACTUATORS: "actuator decoder",
}

#: attributes each group's plugins must carry
REQUIRED: dict[str, tuple[str, ...]] = {
    READERS: ("name", "extensions", "detect", "open"),
    FRONTENDS: ("name", "process", "finish"),
    WHEELS: ("name", "parse", "decoder"),
    ACTUATORS: ("name", "add", "finish"),
}

#: of those, the ones that must be callable
CALLABLE: dict[str, tuple[str, ...]] = {
    READERS: ("detect", "open"),
    FRONTENDS: ("process", "finish"),
    WHEELS: ("parse", "decoder"),
    ACTUATORS: ("add", "finish"),
}

# Used when the package is imported from a source tree that was never installed, so that the
# library still works (the entry points are then missing). Same targets as pyproject.toml.
_BUILTIN: dict[str, dict[str, str]] = {
    READERS: {
        "audio": "toothcomb.decoders.readers.audio:AudioReader",
        "csv": "toothcomb.decoders.readers.scopecsv:ScopeCsvReader",
        "hdf5": "toothcomb.decoders.readers.hdf5:Hdf5Reader",
        "vcd": "toothcomb.decoders.readers.vcd:VcdReader",
    },
    FRONTENDS: {
        "hall": "toothcomb.decoders.frontends.hall:HallFrontEnd",
        "vr": "toothcomb.decoders.frontends.vr:VrFrontEnd",
    },
    WHEELS: {
        "missing-tooth": "toothcomb.decoders.wheels.missing_tooth:MissingToothWheel",
        "pattern": "toothcomb.decoders.wheels.pattern:PatternWheel",
    },
    ACTUATORS: {
        "pwm": "toothcomb.decoders.actuators.pwm:PwmActuator",
    },
}

#: what a plugin found in the source tree, not through an installed distribution, is credited to
SOURCE_TREE = "toothcomb (source tree, not installed)"


def _check_group(group: str) -> str:
    if group not in REQUIRED:
        raise PluginError(f"there is no plugin group {group!r}; the groups are {', '.join(GROUPS)}")
    return group


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
    missing = [a for a in REQUIRED[_check_group(group)] if not hasattr(obj, a)]
    if missing:
        raise PluginError(f"plugin {name!r} in group {group} lacks {', '.join(missing)}")
    if not isinstance(obj.name, str) or not obj.name:
        raise PluginError(
            f"plugin {name!r} in group {group} has name {obj.name!r}; give it a non-empty string"
        )
    flat = [a for a in CALLABLE[group] if not callable(getattr(obj, a))]
    if flat:
        raise PluginError(
            f"plugin {name!r} in group {group}: {', '.join(flat)} must be callable (a method or "
            "a function), not a value"
        )
    if group == READERS:
        ext = obj.extensions
        if not isinstance(ext, tuple | list) or not all(
            isinstance(e, str) and e.startswith(".") for e in ext
        ):
            raise PluginError(
                f"plugin {name!r} in group {group} has extensions {ext!r}; give a tuple of "
                "suffixes such as ('.wav', '.flac')"
            )
    return obj


def handles_of(group: str, obj: Any) -> str:
    """One line saying what a plugin handles: its ``handles`` (attribute or method) and, for a
    reader, its suffixes.

    >>> class Reader:
    ...     handles = "made-up text captures"
    ...     extensions = (".mu",)
    >>> handles_of(READERS, Reader)
    'made-up text captures (.mu)'
    """
    h = getattr(obj, "handles", "")
    if callable(h):
        try:
            h = h()
        except Exception as exc:  # a description must not break the listing
            h = f"(its handles() failed: {exc})"
    text = " ".join(str(h or "").split())
    if group == READERS:
        exts = ", ".join(getattr(obj, "extensions", ()) or ()) or "any suffix"
        text = f"{text} ({exts})" if text else exts
    return text


@dataclass(frozen=True)
class Discovered:
    """One entry point of a plugin group, loaded and checked (or not)."""

    #: entry-point group
    group: str
    #: entry-point name
    name: str
    #: ``module:attribute`` the entry point names
    target: str
    #: distribution that registers it (its project name), or :data:`SOURCE_TREE`
    distribution: str
    #: that distribution's version ("" when not installed)
    version: str
    #: the loaded plugin, None when it is broken
    obj: Any = None
    #: why it cannot be used, None when it can
    error: PluginError | None = None

    @property
    def ok(self) -> bool:
        return self.error is None


@dataclass(frozen=True)
class PluginInfo:
    """What ``toothcomb plugins`` shows about one plugin."""

    group: str
    name: str
    #: distribution that provides it, and its version
    distribution: str
    version: str
    #: one line: what it handles (formats, sensor kind, wheel notation); "" when broken
    handles: str
    #: ``module:attribute``
    target: str
    #: the error that keeps it from being used, None when it works
    error: str | None = None

    @property
    def kind(self) -> str:
        """``reader``, ``front end`` or ``wheel decoder``."""
        return KINDS[self.group]

    @property
    def ok(self) -> bool:
        return self.error is None

    def to_json(self) -> dict[str, Any]:
        return {
            "group": self.group,
            "kind": self.kind,
            "name": self.name,
            "distribution": self.distribution,
            "version": self.version,
            "handles": self.handles,
            "target": self.target,
            "ok": self.ok,
            "error": self.error,
        }


def _load(group: str, ep: EntryPoint) -> Any:
    try:
        obj = ep.load()
    except Exception as exc:  # a broken third-party plugin must not hide the others
        raise PluginError(
            f"plugin {ep.name!r} in group {group} failed to load ({ep.value}): "
            f"{type(exc).__name__}: {exc}"
        ) from exc
    return check_plugin(group, ep.name, obj)


def _dist(ep: EntryPoint) -> tuple[str, str]:
    dist = getattr(ep, "dist", None)
    if dist is None:
        return SOURCE_TREE, ""
    name = dist.metadata["Name"] or getattr(dist, "name", "") or "?"
    return str(name), str(dist.version or "")


def _entry_points(group: str) -> list[EntryPoint]:
    found: list[EntryPoint] = []
    seen: set[tuple[str, str]] = set()
    for ep in entry_points(group=group):
        if (ep.name, ep.value) not in seen:  # the same install seen twice on sys.path
            seen.add((ep.name, ep.value))
            found.append(ep)
    names = {ep.name for ep in found}
    for name, target in _BUILTIN[group].items():
        if name not in names:
            found.append(EntryPoint(name=name, value=target, group=group))
    return found


@cache
def discover(group: str) -> tuple[Discovered, ...]:
    """Every entry point of ``group``, each loaded and checked once (cached; see
    :func:`clear_cache`). A plugin whose name an earlier one already took is set aside too."""
    out: list[Discovered] = []
    taken: dict[str, str] = {}
    for ep in _entry_points(_check_group(group)):
        dist, version = _dist(ep)
        obj, error = None, None
        if ep.name in taken:
            error = PluginError(
                f"plugin {ep.name!r} in group {group} from {dist} is not used: {taken[ep.name]} "
                "registers the same name; uninstall one of them or rename the entry point"
            )
        else:
            try:
                obj = _load(group, ep)
            except PluginError as exc:
                error = exc
            else:
                taken[ep.name] = dist
        out.append(Discovered(group, ep.name, ep.value, dist, version, obj, error))
    return tuple(out)


def clear_cache() -> None:
    """Forget what was discovered, so that plugins installed since are found.

    >>> clear_cache(); sorted(plugins(WHEELS))
    ['missing-tooth', 'pattern']
    """
    discover.cache_clear()


def plugins(group: str) -> dict[str, Any]:
    """The working plugins of ``group`` by name (broken ones are left out; see :func:`broken`)."""
    return {d.name: d.obj for d in discover(group) if d.ok}


def broken(group: str) -> dict[str, PluginError]:
    """The plugins of ``group`` that cannot be used, by name, with the reason.

    >>> broken(READERS)
    {}
    """
    working = plugins(group)
    return {
        d.name: d.error for d in discover(group) if d.error is not None and d.name not in working
    }


def plugin(group: str, name: str) -> Any:
    """One plugin by name; a broken one raises its own error, an unknown name lists the names
    there are."""
    for d in discover(group):
        if d.name == name and d.ok:
            return d.obj
    for d in discover(group):
        if d.name == name and d.error is not None:
            raise d.error
    there = ", ".join(sorted(plugins(group)))
    raise PluginError(f"no plugin {name!r} in group {group} (there are: {there})")


def first(group: str, accept: Callable[[Any], bool], order: Iterable[str] = ()) -> Any | None:
    """The first plugin of ``group`` (names in ``order`` first, then the rest by name) for
    which ``accept(plugin)`` is true, or None."""
    have = plugins(group)
    order = list(order)
    names = [n for n in order if n in have] + sorted(n for n in have if n not in order)
    for n in names:
        if accept(have[n]):
            return have[n]
    return None


def describe_plugins(*groups: str) -> list[PluginInfo]:
    """Every plugin of ``groups`` (default: all three), working or not, for listing: group
    order, then by name."""
    out: list[PluginInfo] = []
    for group in groups or GROUPS:
        for d in sorted(discover(group), key=lambda d: (d.name, d.distribution)):
            out.append(
                PluginInfo(
                    group=group,
                    name=d.name,
                    distribution=d.distribution,
                    version=d.version,
                    handles=handles_of(group, d.obj) if d.ok else "",
                    target=d.target,
                    error=None if d.error is None else str(d.error),
                )
            )
    return out
