"""The ``rollscan`` command (subcommands are added by their modules)."""

from __future__ import annotations

import sys


def main(argv: list[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    if argv and argv[0] == "bench":
        from rollscan.bench import main as bench_main

        return bench_main(argv[1:])
    print("usage: rollscan bench [--quick] [--json]", file=sys.stderr)
    return 2
