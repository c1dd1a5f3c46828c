"""``toothcomb plugins``: the installed readers, sensor front ends, wheel and actuator decoders.

Each comes from an entry point (groups ``toothcomb.readers``, ``toothcomb.frontends``,
``toothcomb.wheels``); the list shows its name, the distribution that provides it with its
version, and what it handles. A plugin that fails to load is listed with its error; the others
are listed (and work) all the same.

>>> import io
>>> from rich.console import Console
>>> from toothcomb.decoders.plugins import describe_plugins
>>> out = io.StringIO()
>>> render_plugins(describe_plugins(), Console(file=out, width=120))
>>> "missing-tooth" in out.getvalue() and "N-M missing-tooth" in out.getvalue()
True
"""

from __future__ import annotations

import argparse
import json
from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

from rich.console import Console
from rich.table import Table
from rich.text import Text
from toothcomb.decoders.plugins import GROUPS, KINDS, PluginInfo, describe_plugins

if TYPE_CHECKING:
    from .main import Streams

EXAMPLES = """\
examples:
  toothcomb plugins
      the installed readers, front ends and wheel decoders, and what each handles
  toothcomb plugins --json
      the same as JSON on stdout"""


def add_plugins_parser(sub: Any, formatter: type[argparse.HelpFormatter], exit_codes: str) -> None:
    """Add the ``plugins`` command to the subparsers ``sub``."""
    from .main import _para, _width

    p = sub.add_parser(
        "plugins",
        help="list the installed readers, sensor front ends, wheel and actuator decoders",
        description=_para(
            "List the plugins toothcomb found through its entry points (readers, sensor front "
            "ends, wheel decoders), the distribution that provides each with its version, and "
            "what each handles. A plugin that fails to load is listed with its error; the others "
            "still work."
        ),
        epilog=EXAMPLES + "\n\n" + exit_codes,
        formatter_class=formatter,
    )
    p.add_argument("--json", action="store_true", help="print the list as JSON on stdout")
    p.add_argument(
        "--width", type=_width, metavar="COLS", help="table width in columns (default: terminal)"
    )
    p.set_defaults(run=run_plugins)


def plugins_json(infos: Sequence[PluginInfo]) -> dict[str, Any]:
    """The list as a JSON-able dict: every plugin, and the names of the broken ones."""
    return {
        "plugins": [i.to_json() for i in infos],
        "broken": [f"{i.group}:{i.name}" for i in infos if not i.ok],
    }


def _provider(info: PluginInfo) -> str:
    return f"{info.distribution} {info.version}".strip()


def render_plugins(infos: Sequence[PluginInfo], console: Console) -> None:
    """Print the plugins as a table, one section per group, then a line on the broken ones."""
    table = Table(title="toothcomb plugins", title_justify="left", expand=False)
    table.add_column("kind", no_wrap=True)
    table.add_column("name", no_wrap=True, style="bold")
    table.add_column("provided by", no_wrap=False)
    table.add_column("handles", overflow="fold")
    for group in GROUPS:
        mine = [i for i in infos if i.group == group]
        for k, info in enumerate(mine):
            what = (
                Text(info.handles)
                if info.ok
                else Text(f"not usable: {info.error}", style="red")
            )
            table.add_row(
                KINDS[group] if k == 0 else "",
                info.name,
                _provider(info),
                what,
                end_section=k == len(mine) - 1,
            )
    console.print(table)
    bad = [i for i in infos if not i.ok]
    if bad:
        names = ", ".join(f"{i.name} ({i.kind})" for i in bad)
        console.print(
            Text(
                f"{len(bad)} plugin(s) could not be used and are left out: {names}; the others "
                "work as listed",
                style="yellow",
            )
        )


def run_plugins(args: argparse.Namespace, streams: Streams) -> int:
    """``toothcomb plugins``: list the plugins (exit 0 even when some are broken: the listing is
    the answer, and it names them)."""
    from .main import make_console

    infos = describe_plugins()
    if args.json:
        streams.out.write(json.dumps(plugins_json(infos), indent=2) + "\n")
        return 0
    render_plugins(infos, make_console(streams.out, args.width))
    return 0
