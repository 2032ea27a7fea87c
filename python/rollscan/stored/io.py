"""Reading and writing shard files a chunk of rows at a time.

Two formats:

* ``.npz`` (always): a zip archive of ``.npy`` members, one per column, as
  written by ``numpy.savez`` / ``numpy.savez_compressed``. Members are parsed
  from their headers only; object (pickled) members are refused before any byte
  of data is read, and ``pickle`` is never called. C-ordered columns are read
  sequentially, ``rows`` at a time, so memory follows the chunk size.
* ``.parquet`` (with the ``parquet`` extra, pyarrow): one arrow column per
  column; a ``[T, N]`` column is a fixed-size list of length ``N``. Memory
  follows the larger of the chunk size and the file's row-group size.

Writers never touch the final name: everything goes to hidden temporary files
in the output directory (registered with :class:`TempFiles`), which the caller
renames into place once every output of the run is complete.
"""

from __future__ import annotations

import os
import shutil
import zipfile
import zlib
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from .errors import StoredError
from .interrupts import critical_method

_COPY_BLOCK = 4 << 20
_CORRUPT = (zipfile.BadZipFile, zlib.error, EOFError, OSError, ValueError)


@dataclass(frozen=True)
class ColumnInfo:
    """A column's element dtype (``None`` when not numeric) and full shape."""

    name: str
    dtype: np.dtype | None
    shape: tuple


def shard_format(path: str) -> str:
    low = str(path).lower()
    if low.endswith(".npz"):
        return "npz"
    if low.endswith(".parquet") or low.endswith(".pq"):
        return "parquet"
    raise StoredError("unknown file type (expected .npz or .parquet)", shard=path)


def open_shard(path: str):
    """Open a shard for reading; header-level problems raise :class:`StoredError`."""
    path = str(path)
    if not os.path.isfile(path):
        raise StoredError("no such file", shard=path)
    fmt = shard_format(path)
    return NpzShard(path) if fmt == "npz" else ParquetShard(path)


# --------------------------------------------------------------------- npz


def _read_npy_header(f):
    version = np.lib.format.read_magic(f)
    if version == (1, 0):
        return np.lib.format.read_array_header_1_0(f)
    if version == (2, 0):
        return np.lib.format.read_array_header_2_0(f)
    raise ValueError(f"unsupported .npy format version {version}")


class NpzShard:
    """One ``.npz`` shard: column headers up front, rows on demand."""

    fmt = "npz"

    def __init__(self, path: str):
        self.path = path
        try:
            self._zip = zipfile.ZipFile(path)
        except _CORRUPT as e:
            raise StoredError(
                f"not a readable .npz archive (truncated or corrupt): {e}", shard=path
            ) from None
        self._members: dict[str, zipfile.ZipInfo] = {}
        self.columns: dict[str, ColumnInfo] = {}
        self._fortran: dict[str, bool] = {}
        for info in self._zip.infolist():
            if info.is_dir():
                continue
            name = info.filename[:-4] if info.filename.endswith(".npy") else info.filename
            try:
                with self._zip.open(info) as f:
                    shape, fortran, dtype = _read_npy_header(f)
            except _CORRUPT as e:
                raise StoredError(
                    f"member is not a readable .npy array (truncated or corrupt): {e}",
                    shard=path,
                    column=name,
                ) from None
            if dtype.hasobject:
                raise StoredError(
                    "holds Python objects (a pickled column); refused, pickled data is never loaded",
                    shard=path,
                    column=name,
                )
            self._members[name] = info
            self.columns[name] = ColumnInfo(name, dtype, tuple(shape))
            self._fortran[name] = bool(fortran) and len(shape) > 1

    @property
    def any_compressed(self) -> bool:
        return any(i.compress_type != zipfile.ZIP_STORED for i in self._members.values())

    def close(self):
        self._zip.close()

    def iter_chunks(self, names, bounds) -> Iterator[dict]:
        """Yield ``{name: rows[bounds[k]:bounds[k+1]]}`` for consecutive row ranges."""
        handles = {}
        try:
            for name in names:
                handles[name] = self._open_data(name)
            for a, b in zip(bounds[:-1], bounds[1:]):
                yield {name: self._read_rows(name, handles[name], a, b) for name in names}
            for name, h in handles.items():
                if not isinstance(h, np.ndarray) and bounds[-1] == self.columns[name].shape[0]:
                    self._drain(name, h, bounds[-1])
        finally:
            for h in handles.values():
                if not isinstance(h, np.ndarray):
                    h.close()

    def _open_data(self, name):
        try:
            f = self._zip.open(self._members[name])
            _read_npy_header(f)
            if self._fortran[name]:
                with f:
                    return _read_rest(f, self.columns[name])
            return f
        except _CORRUPT as e:
            raise StoredError(
                f"cannot read (truncated or corrupt): {e}", shard=self.path, column=name, step=0
            ) from None

    def _read_rows(self, name, h, a, b):
        col = self.columns[name]
        if isinstance(h, np.ndarray):
            return h[a:b]
        row_items = int(np.prod(col.shape[1:], dtype=np.int64))
        nbytes = (b - a) * row_items * col.dtype.itemsize
        try:
            buf = h.read(nbytes)
        except _CORRUPT as e:
            raise StoredError(
                f"cannot read (truncated or corrupt): {e}", shard=self.path, column=name, step=a
            ) from None
        if len(buf) < nbytes:
            got = len(buf) // max(1, row_items * col.dtype.itemsize)
            raise StoredError(
                "data ends early (truncated file)", shard=self.path, column=name, step=a + got
            )
        return np.frombuffer(buf, dtype=col.dtype).reshape((b - a, *col.shape[1:]))

    def _drain(self, name, h, step):
        try:
            extra = h.read()
        except _CORRUPT as e:
            raise StoredError(
                f"cannot read (truncated or corrupt): {e}", shard=self.path, column=name, step=step
            ) from None
        if extra:
            raise StoredError("holds bytes past its declared shape", shard=self.path, column=name)

    def copy_member(self, name: str, dest: zipfile.ZipFile):
        """Copy a column's member byte for byte (same name, same compression)."""
        info = self._members[name]
        out = zipfile.ZipInfo(info.filename, date_time=info.date_time)
        out.compress_type = info.compress_type
        try:
            with self._zip.open(info) as src, dest.open(out, "w", force_zip64=True) as dst:
                shutil.copyfileobj(src, dst, _COPY_BLOCK)
        except (zipfile.BadZipFile, zlib.error, EOFError) as e:
            raise StoredError(
                f"cannot read (truncated or corrupt): {e}", shard=self.path, column=name
            ) from None


def _read_rest(f, col: ColumnInfo):
    """A Fortran-ordered member, read whole (its rows are not contiguous)."""
    n = int(np.prod(col.shape, dtype=np.int64))
    buf = f.read(n * col.dtype.itemsize)
    if len(buf) < n * col.dtype.itemsize:
        raise EOFError("data ends early")
    return np.frombuffer(buf, dtype=col.dtype).reshape(col.shape, order="F")


def _npy_header(dtype: np.dtype, shape: tuple) -> dict:
    return {
        "descr": np.lib.format.dtype_to_descr(np.dtype(dtype)),
        "fortran_order": False,
        "shape": tuple(int(s) for s in shape),
    }


class TempFiles:
    """Every temporary path a run creates, so an error or Ctrl-C removes them all."""

    def __init__(self, directory: str):
        self.directory = directory
        self.paths: list[str] = []
        self._n = 0

    def new(self, stem: str) -> str:
        self._n += 1
        path = os.path.join(self.directory, f".{stem}.rollscan-tmp-{os.getpid()}-{self._n}")
        self.paths.append(path)
        return path

    def discard(self, path: str):
        if os.path.exists(path):
            os.remove(path)
        if path in self.paths:
            self.paths.remove(path)

    def cleanup(self):
        for path in list(self.paths):
            try:
                os.remove(path)
            except FileNotFoundError:
                pass
        self.paths.clear()


class NpzOutput:
    """Writes one output ``.npz``: the input's members copied, plus new columns.

    The new columns arrive a chunk at a time and are appended to raw float64
    side files; :meth:`finish` assembles the archive (optionally transforming a
    new column block by block, which is how ``--normalize`` is applied without
    reading the input a third time).
    """

    def __init__(self, source: NpzShard, new: dict, dtype: np.dtype, temps: TempFiles, stem: str):
        self.source, self.new, self.dtype = source, new, np.dtype(dtype)
        self.temps, self.stem = temps, stem
        self._raw = {name: temps.new(f"{stem}.{name}") for name in new}
        self._files = {name: open(p, "wb") for name, p in self._raw.items()}

    @critical_method
    def write_chunk(self, arrays: dict, table=None):
        for name, x in arrays.items():
            self._files[name].write(np.ascontiguousarray(x, dtype=np.float64).data)

    @critical_method
    def seal(self) -> dict:
        """Close the side files and the source; a picklable state for :func:`finish_sealed`.

        Lets another process (a Dask task) assemble the archive later.
        """
        for f in self._files.values():
            f.close()
        self._files = {}
        self.source.close()
        return {
            "fmt": "npz",
            "source": self.source.path,
            "new": dict(self.new),
            "dtype": self.dtype.str,
            "stem": self.stem,
            "raw": dict(self._raw),
        }

    @classmethod
    def from_sealed(cls, state: dict, temps: TempFiles) -> NpzOutput:
        self = cls.__new__(cls)
        self.source, self.new = NpzShard(state["source"]), state["new"]
        self.dtype, self.temps, self.stem = np.dtype(state["dtype"]), temps, state["stem"]
        self._raw, self._files = dict(state["raw"]), {}
        temps.paths.extend(self._raw.values())  # removed on an error, like our own
        return self

    @critical_method
    def finish(self, transforms=None) -> str:
        for f in self._files.values():
            f.close()
        transforms = transforms or {}
        path = self.temps.new(self.stem)
        compress = zipfile.ZIP_DEFLATED if self.source.any_compressed else zipfile.ZIP_STORED
        with zipfile.ZipFile(path, "w", allowZip64=True) as z:
            for name in self.source.columns:
                self.source.copy_member(name, z)
            for name, shape in self.new.items():
                info = zipfile.ZipInfo(f"{name}.npy", date_time=(1980, 1, 1, 0, 0, 0))
                info.compress_type = compress
                row = int(np.prod(shape[1:], dtype=np.int64)) * 8
                block = max(row, (_COPY_BLOCK // max(row, 1)) * row)
                fn = transforms.get(name)
                with z.open(info, "w", force_zip64=True) as dst, open(self._raw[name], "rb") as src:
                    np.lib.format.write_array_header_1_0(dst, _npy_header(self.dtype, shape))
                    while True:
                        buf = src.read(block)
                        if not buf:
                            break
                        x = np.frombuffer(buf, dtype=np.float64)
                        if fn is not None:
                            x = fn(x)
                        dst.write(np.ascontiguousarray(x, dtype=self.dtype).data)
        self.source.close()
        for p in self._raw.values():
            self.temps.discard(p)
        return path


# ----------------------------------------------------------------- parquet


def _pa():
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        raise StoredError(".parquet shards need pyarrow: pip install 'rollscan[parquet]'") from None
    return pa, pq


def _arrow_info(pa, field, n_rows) -> ColumnInfo:
    t = field.type
    if pa.types.is_fixed_size_list(t):
        inner = t.value_type
        dt = _arrow_numeric(pa, inner)
        return ColumnInfo(field.name, dt, (n_rows, t.list_size))
    return ColumnInfo(field.name, _arrow_numeric(pa, t), (n_rows,))


def _arrow_numeric(pa, t):
    if pa.types.is_boolean(t):
        return np.dtype(bool)
    if pa.types.is_integer(t) or pa.types.is_floating(t):
        return np.dtype(t.to_pandas_dtype())
    return None


class ParquetShard:
    """One ``.parquet`` shard, read in row batches through pyarrow."""

    fmt = "parquet"

    def __init__(self, path: str):
        pa, pq = _pa()
        self.path = path
        try:
            self._file = pq.ParquetFile(path)
        except Exception as e:  # pyarrow raises several types for a bad file
            raise StoredError(
                f"not a readable .parquet file (truncated or corrupt): {e}", shard=path
            ) from None
        n = self._file.metadata.num_rows
        self.schema = self._file.schema_arrow
        self.columns = {f.name: _arrow_info(pa, f, n) for f in self.schema}

    def close(self):
        self._file.close()

    def iter_tables(self, names, bounds):
        """Yield arrow tables of the given columns for consecutive row ranges."""
        pa, _ = _pa()
        cols = None if names is None else list(names)
        batches = self._file.iter_batches(batch_size=65536, columns=cols, use_threads=False)
        pending, have = [], 0
        for a, b in zip(bounds[:-1], bounds[1:]):
            try:
                while have < b - a:
                    batch = next(batches)
                    pending.append(pa.Table.from_batches([batch]))
                    have += batch.num_rows
            except StopIteration:
                raise StoredError(
                    "data ends early (truncated file)", shard=self.path, step=a + have
                ) from None
            except Exception as e:
                raise StoredError(
                    f"cannot read (truncated or corrupt): {e}", shard=self.path, step=a
                ) from None
            table = pa.concat_tables(pending) if len(pending) > 1 else pending[0]
            yield table.slice(0, b - a)
            rest = table.slice(b - a)
            pending, have = ([rest] if rest.num_rows else []), rest.num_rows

    def iter_chunks(self, names, bounds, with_table=False):
        for a, table in zip(bounds, self.iter_tables(None if with_table else names, bounds)):
            arrays = {name: _to_numpy(table.column(name), self.path, name, a) for name in names}
            yield (arrays, table) if with_table else arrays


def _to_numpy(col, path, name, row0=0):
    pa, _ = _pa()
    if col.null_count:
        import pyarrow.compute as pc

        first = int(pc.index(pc.is_null(col), True).as_py())
        raise StoredError("has a missing (null) value", shard=path, column=name, step=row0 + first)
    arr = col.combine_chunks()
    if pa.types.is_fixed_size_list(arr.type):
        width = arr.type.list_size
        return arr.flatten().to_numpy(zero_copy_only=False).reshape(len(arr), width)
    return arr.to_numpy(zero_copy_only=False)


def to_arrow(x):
    pa, _ = _pa()
    if x.ndim == 2:
        return pa.FixedSizeListArray.from_arrays(
            pa.array(np.ascontiguousarray(x).ravel()), x.shape[1]
        )
    return pa.array(x)


class ParquetOutput:
    """Writes one output ``.parquet``: each chunk's input rows plus the new columns.

    With a transform (``--normalize``) the chunks first go to a temporary file
    holding float64 new columns, which :meth:`finish` rewrites transformed.
    """

    def __init__(self, source, new: dict, dtype, temps: TempFiles, stem: str, deferred: bool):
        self.new, self.dtype, self.temps, self.stem = new, np.dtype(dtype), temps, stem
        self.deferred = deferred
        self._path = temps.new(stem)
        self._writer = None
        self._source = source

    @critical_method
    def write_chunk(self, arrays: dict, table):
        _, pq = _pa()
        dt = np.float64 if self.deferred else self.dtype
        for name, x in arrays.items():
            table = table.append_column(name, to_arrow(np.asarray(x, dtype=dt)))
        if self._writer is None:
            self._writer = pq.ParquetWriter(self._path, table.schema)
        self._writer.write_table(table)

    @critical_method
    def _close(self):
        pa, pq = _pa()
        if self._writer is None:  # an empty shard: the input schema plus the new columns
            schema = self._source.schema
            for name, shape in self.new.items():
                t = pa.from_numpy_dtype(self.dtype)
                schema = schema.append(
                    pa.field(name, pa.list_(t, shape[1]) if len(shape) == 2 else t)
                )
            self._writer = pq.ParquetWriter(self._path, schema)
        self._writer.close()
        self._source.close()

    @critical_method
    def seal(self) -> dict:
        """Close the temporary file (deferred mode); a picklable state for :func:`finish_sealed`."""
        self._close()
        return {
            "fmt": "parquet",
            "path": self._path,
            "new": dict(self.new),
            "dtype": self.dtype.str,
            "stem": self.stem,
        }

    @classmethod
    def from_sealed(cls, state: dict, temps: TempFiles) -> ParquetOutput:
        self = cls.__new__(cls)
        self.new, self.dtype, self.temps = state["new"], np.dtype(state["dtype"]), temps
        self.stem, self.deferred, self._path = state["stem"], True, state["path"]
        self._writer = self._source = None
        temps.paths.append(self._path)
        return self

    @critical_method
    def finish(self, transforms=None) -> str:
        pa, pq = _pa()
        if self._source is not None:
            self._close()
        if not self.deferred:
            return self._path
        transforms = transforms or {}
        src = pq.ParquetFile(self._path)
        path = self.temps.new(self.stem)
        writer = None
        for batch in src.iter_batches(batch_size=1 << 20, use_threads=False):
            table = pa.Table.from_batches([batch])
            for name in self.new:
                x = _to_numpy(table.column(name), path, name).astype(np.float64)
                fn = transforms.get(name)
                if fn is not None:
                    x = fn(x.ravel()).reshape(x.shape)
                i = table.schema.get_field_index(name)
                table = table.set_column(i, name, to_arrow(x.astype(self.dtype)))
            if writer is None:
                writer = pq.ParquetWriter(path, table.schema)
            writer.write_table(table)
        src.close()
        if writer is None:
            os.replace(self._path, path)
        else:
            writer.close()
        self.temps.discard(self._path)
        return path


@critical_method
def finish_sealed(state: dict, temps: TempFiles, transforms=None) -> str:
    """Finish an output sealed by ``seal()`` (possibly in another process)."""
    cls = NpzOutput if state["fmt"] == "npz" else ParquetOutput
    return cls.from_sealed(state, temps).finish(transforms)


# ------------------------------------------------------------ small tables


@critical_method
def write_table(path: str, columns: dict, fmt: str, shard_files=None):
    """Write a small table (the per-episode table) in one go to ``path``.

    ``shard_files`` (the input paths, indexed by the table's ``shard`` column)
    is stored once, not per row: as an extra ``shard_files`` member of an
    ``.npz``, or as the ``rollscan.shard_files`` (JSON) metadata of a ``.parquet``.
    """
    files = [str(p) for p in shard_files or []]
    if fmt == "npz":
        extra = {"shard_files": np.array(files, dtype=str)} if shard_files is not None else {}
        with open(path, "wb") as f:
            np.savez(f, **columns, **extra)
    else:
        import json

        pa, pq = _pa()
        table = pa.table({k: pa.array(v) for k, v in columns.items()})
        if shard_files is not None:
            table = table.replace_schema_metadata({"rollscan.shard_files": json.dumps(files)})
        pq.write_table(table, path)


def read_table(path: str, names=None) -> dict:
    """Read a small table whole (``allow_pickle=False``)."""
    shard = open_shard(path)
    try:
        names = list(shard.columns) if names is None else names
        n = max((shard.columns[c].shape[0] for c in names), default=0)
        if shard.fmt == "npz":
            with np.load(path, allow_pickle=False) as z:
                return {c: z[c] for c in names}
        table = next(shard.iter_tables(names, [0, n])) if n else None
        if table is None:
            import pyarrow.parquet as pq

            table = pq.read_table(path, columns=names)
        return {c: table.column(c).to_numpy(zero_copy_only=False) for c in names}
    finally:
        shard.close()
