"""Stored rollouts: shard files in, training targets and per-episode tables out.

Modules: :mod:`~rollscan.stored.io` (chunked reading/atomic writing),
:mod:`~rollscan.stored.schema` (columns and checks),
:mod:`~rollscan.stored.carries` (engine-independent plan / summarise / combine /
finish), :mod:`~rollscan.stored.process` (the local engine),
:mod:`~rollscan.stored.summary`, :mod:`~rollscan.stored.plot`,
:mod:`~rollscan.stored.demo`, and :mod:`~rollscan.stored.numpy_kernels` (the
NumPy reference path). The on-disk format is described in docs/stored-format.md.
"""

from .errors import StoredError

__all__ = ["StoredError"]
