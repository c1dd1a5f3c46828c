"""Argument types of the command line: parse, check the range, and say what would work.

Each is made by :func:`checked`, so every option's error reads the same way: the value quoted,
what it is not, and an example.

>>> revs = checked(int, "a whole number", "e.g. 2", lambda v: 1 <= v <= 50,
...                "{text} revolutions is outside 1..50")
>>> revs("3")
3
>>> try:
...     revs("x")
... except argparse.ArgumentTypeError as e:
...     print(e)
'x' is not a whole number; give e.g. 2
"""

from __future__ import annotations

import argparse
from collections.abc import Callable
from typing import TypeVar

T = TypeVar("T", int, float)


def checked(
    kind: Callable[[str], T], noun: str, example: str, ok: Callable[[T], bool], complaint: str
) -> Callable[[str], T]:
    """An argparse type: ``kind(text)``, refused with "TEXT is not NOUN; give EXAMPLE" when it
    does not parse, and with ``complaint`` (``{text}`` = the quoted value) when ``ok`` is false."""

    def parse(text: str) -> T:
        try:
            value = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not {noun}; give {example}") from None
        if not ok(value):
            raise argparse.ArgumentTypeError(complaint.format(text=repr(text)))
        return value

    return parse
