"""Benchmark harness (filled in by the benchmark commit)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable


@dataclass
class Case:
    """One benchmark case: a rollscan call and the references it is compared to.

    ``run`` is the rollscan call; ``refs`` maps a reference name to a callable
    computing the same result; ``bytes_moved`` is what the kernel must read and
    write (for the memory floor); ``fresh_out_bytes`` the bytes of outputs the
    call allocates (for the page-fault allowance).
    """

    group: str
    name: str
    run: Callable[[], object]
    refs: dict[str, Callable[[], object]] = field(default_factory=dict)
    bytes_moved: int = 0
    fresh_out_bytes: int = 0
    run_out: Callable[[], object] | None = None


def main(argv: list[str] | None = None) -> int:
    raise SystemExit("rollscan bench: harness not built yet")
