"""Writers of tables: historian exports (``twin simulate``) and back-fill results.

CSV (optionally gzip, by a ``.gz`` suffix) or Parquet (``.parquet``), chosen by
the file name; rows are buffered and written in blocks, so memory is bounded by
``block_rows``. Files are written to ``<name>.part`` and renamed on close, so
a reader never sees half a file under the final name.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.parquet as pq


def table_format(path: str | Path) -> str:
    """``csv``, ``csv.gz`` or ``parquet`` from a file name; ValueError for anything else."""
    name = Path(path).name.lower()
    if name.endswith((".parquet", ".pq")):
        return "parquet"
    if name.endswith(".csv.gz"):
        return "csv.gz"
    if name.endswith(".csv"):
        return "csv"
    raise ValueError(f"{path}: unknown table format; expected a name ending .csv, .csv.gz or .parquet")


class TableWriter:
    """Streams rows of fixed columns to CSV / CSV.gz / Parquet.

    Parameters
    ----------
    path : str or Path
    schema : list of (name, pyarrow type)
    block_rows : int
        Rows buffered before a block is written.
    """

    def __init__(self, path: str | Path, schema: Sequence[tuple[str, pa.DataType]], block_rows: int = 200_000) -> None:
        self.path = Path(path)
        self.format = table_format(self.path)
        self.schema = pa.schema(list(schema))
        self.block_rows = int(block_rows)
        self._cols: list[list[Any]] = [[] for _ in self.schema]
        self._tmp = self.path.with_name(self.path.name + ".part")
        self._sink: Any = None
        self._writer: Any = None
        self.rows = 0

    def _open(self) -> None:
        if self.format == "parquet":
            self._writer = pq.ParquetWriter(str(self._tmp), self.schema, compression="zstd")
            return
        self._sink = pa.OSFile(str(self._tmp), "wb")
        if self.format == "csv.gz":
            self._sink = pa.CompressedOutputStream(self._sink, "gzip")
        self._writer = pcsv.CSVWriter(self._sink, self.schema,
                                      write_options=pcsv.WriteOptions(quoting_style="none"))

    def write_row(self, *values: Any) -> None:
        for col, v in zip(self._cols, values, strict=True):
            col.append(v)
        if len(self._cols[0]) >= self.block_rows:
            self.flush()

    def write_columns(self, columns: Sequence[Any]) -> None:
        """Append whole columns (lists or arrays of equal length)."""
        self.flush()
        batch = pa.record_batch([pa.array(c, type=f.type) for c, f in zip(columns, self.schema, strict=True)],
                                schema=self.schema)
        self._write(batch)

    def flush(self) -> None:
        if not self._cols[0]:
            return
        batch = pa.record_batch([pa.array(c, type=f.type) for c, f in zip(self._cols, self.schema, strict=True)],
                                schema=self.schema)
        self._cols = [[] for _ in self.schema]
        self._write(batch)

    def _write(self, batch: pa.RecordBatch) -> None:
        if self._writer is None:
            self._open()
        if self.format == "parquet":
            self._writer.write_batch(batch)
        else:
            self._writer.write(batch)
        self.rows += batch.num_rows

    def close(self) -> Path:
        """Write what is buffered, close and rename to the final name; returns the path."""
        self.flush()
        if self._writer is None:
            self._open()
        self._writer.close()
        if self._sink is not None:
            self._sink.close()
        os.replace(self._tmp, self.path)
        return self.path

    def __enter__(self) -> TableWriter:
        return self

    def __exit__(self, exc_type: Any, *exc: Any) -> None:
        if exc_type is None:
            self.close()
        else:
            try:
                if self._writer is not None:
                    self._writer.close()
                if self._sink is not None:
                    self._sink.close()
            finally:
                self._tmp.unlink(missing_ok=True)


STRING = pa.string()
FLOAT = pa.float64()
INT = pa.int64()
BOOL = pa.bool_()


_KINDS = {"timestamp": pa.timestamp("us", tz="UTC"), "string": STRING, "float": FLOAT, "bool": BOOL, "int": INT}


def csv_to_parquet(src: str | Path, dst: str | Path, columns: Sequence[tuple[str, str]],
                   block_size: int = 16 << 20) -> Path:
    """Stream a CSV with a header into Parquet with the given column kinds; atomic rename.

    ``columns`` are ``(name, kind)`` with kind ``timestamp`` (RFC 3339 text),
    ``string``, ``float``, ``bool`` or ``int``; an empty cell is null.
    """
    schema = pa.schema([(n, _KINDS[k]) for n, k in columns])
    reader = pcsv.open_csv(
        str(src), read_options=pcsv.ReadOptions(block_size=block_size),
        convert_options=pcsv.ConvertOptions(column_types={n: t for n, t in zip(schema.names, schema.types, strict=True)},
                                            true_values=["true"], false_values=["false"]),
    )
    dst = Path(dst)
    tmp = dst.with_name(dst.name + ".part")
    with pq.ParquetWriter(str(tmp), schema, compression="zstd") as w:
        for batch in reader:
            w.write_batch(pa.record_batch([batch.column(n).cast(schema.field(n).type) for n in schema.names],
                                          schema=schema))
    os.replace(tmp, dst)
    return dst
