"""Ctrl-C and SIGTERM that never land inside a file write.

The command installs :func:`install` once; the writers wrap each file
operation in :func:`critical`. A signal that arrives inside a critical section
is held and raised as ``KeyboardInterrupt`` as soon as the section ends, so a
zip archive or Parquet writer is never left half-closed (which would print
tracebacks from their finalisers) and the usual clean-up then runs.
"""

from __future__ import annotations

import signal
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from functools import wraps

_depth = 0
_pending = False


def _handler(signum, frame):
    global _pending
    if _depth:
        _pending = True
        return
    raise KeyboardInterrupt


def install():
    """Route SIGINT and SIGTERM through the deferral; returns a restore function."""
    if threading.current_thread() is not threading.main_thread():
        return lambda: None
    old = {s: signal.signal(s, _handler) for s in (signal.SIGINT, signal.SIGTERM)}

    def restore():
        for s, h in old.items():
            signal.signal(s, h)

    return restore


@contextmanager
def critical() -> Iterator[None]:
    """A section no interrupt may split; a held one is raised at its end."""
    global _depth, _pending
    _depth += 1
    try:
        yield
    finally:
        _depth -= 1
        if _depth == 0 and _pending:
            _pending = False
            raise KeyboardInterrupt


def critical_method(fn):
    """Decorator form of :func:`critical`."""

    @wraps(fn)
    def inner(*args, **kwargs):
        with critical():
            return fn(*args, **kwargs)

    return inner
