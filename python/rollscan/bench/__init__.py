"""``rollscan bench``: rollscan against the NumPy/SciPy references, in one run.

Each module in this package exposes ``cases(quick: bool) -> list[Case]``;
:func:`main` runs them all and prints one table (or JSON).
"""

from __future__ import annotations

from .harness import Case, main

__all__ = ["Case", "main"]
