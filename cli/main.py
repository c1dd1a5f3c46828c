"""Command line entry point (placeholder until the CLI lands)."""

from __future__ import annotations


def main(argv: list[str] | None = None) -> int:
    print("toothcomb")
    return 0
