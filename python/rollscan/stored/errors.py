"""The one error type of the stored pipeline: bad input, named precisely."""

from __future__ import annotations

_PLACES = ("partition ", "collection")


class StoredError(Exception):
    """Bad stored input: names the shard, the column and the first offending step.

    ``str(err)`` is a single line, which the command prints before exiting with
    status 2.
    """

    def __init__(self, message: str, *, shard=None, column=None, step=None):
        self.message = message
        self.shard = None if shard is None else str(shard)
        self.column = column
        self.step = step
        super().__init__(str(self))

    def __str__(self) -> str:
        where = []
        if self.shard is not None:
            # in-memory collections name their parts "partition K" / "collection"
            named = self.shard.startswith(_PLACES)
            where.append(self.shard if named else f"shard {self.shard}")
        if self.column is not None:
            where.append(f"column {self.column!r}")
        if self.step is not None:
            where.append(f"step {self.step}")
        text = " ".join(self.message.split())
        return f"{', '.join(where)}: {text}" if where else text
