"""Turning blocks into Arrow tables and writing them as ordered Parquet files."""

import numpy as np
import pyarrow as pa
import pyarrow.ipc as ipc
import pyarrow.parquet as pq

from .model import DEPOT_KINDS, VALUE_COLUMNS

_KIND = pa.dictionary(pa.int8(), pa.string())
SCHEMA = pa.schema(
    [pa.field(name, pa.int64(), nullable=False) for name in ("depot", "month", "region")]
    + [pa.field(name, pa.float64(), nullable=False) for name in VALUE_COLUMNS]
    + [pa.field("depot_kind", _KIND, nullable=False), pa.field("opened_year", pa.int64(), nullable=False)]
)
# Columns with few distinct values per file; dictionary pages on the random doubles cost time.
_DICTIONARY_COLUMNS = ["month", "region", "vans", "promo", "depot_kind", "opened_year"]


def rows_table(block, depot_index, month_index):
    """Return the block's rows at (depot_index[k], month_index[k]), in that order.

    Parameters
    ----------
    block : datagen.model.Block
    depot_index, month_index : ndarray of int of shape (n_rows,)
        0-based positions within the block.

    Returns
    -------
    pyarrow.Table
    """
    kinds = pa.DictionaryArray.from_arrays(block.kind[depot_index], pa.array(DEPOT_KINDS))
    columns = [block.depot[depot_index], month_index + 1, block.region[depot_index]]
    columns += [block.values[name][depot_index, month_index] for name in VALUE_COLUMNS]
    columns += [kinds, block.opened_year[depot_index]]
    return pa.Table.from_arrays(columns, schema=SCHEMA)


def unit_pieces(block, max_rows):
    """Yield the block's rows sorted by depot then month, in tables of at most `max_rows`
    rows cut between depots (a depot with more rows than that comes alone)."""
    depot_index, month_index = np.nonzero(block.present)
    ends = np.cumsum(block.present.sum(axis=1))
    first = 0
    while first < depot_index.size:
        fitting = np.searchsorted(ends, first + max_rows, side="right") - 1
        end = ends[max(fitting, np.searchsorted(ends, first, side="right"))]
        yield rows_table(block, depot_index[first:end], month_index[first:end])
        first = end


def month_table(block, month):
    """Return the block's rows of one 0-based `month`, sorted by depot."""
    depot_index = np.flatnonzero(block.present[:, month])
    return rows_table(block, depot_index, np.full(depot_index.size, month))


def write_spool(path, block, n_periods):
    """Write a block to an Arrow IPC file with one record batch per month."""
    with pa.OSFile(str(path), "wb") as sink, ipc.new_file(sink, SCHEMA) as writer:
        for month in range(n_periods):
            writer.write_table(month_table(block, month))


def read_spool(path, month):
    """Read one month's rows back from a spool file written by `write_spool`."""
    with pa.OSFile(str(path), "rb") as source:
        return pa.Table.from_batches([ipc.open_file(source).get_batch(month)])


class PartWriter:
    """Write tables, in the order given, to part-00000.parquet, part-00001.parquet, ...

    A table is never split across files; a new file starts when the next table
    would take the current one past `rows_per_file`. Row groups hold exactly
    `row_group_size` rows except the last of each file.
    """

    def __init__(self, folder, rows_per_file, row_group_size, compression, schema=SCHEMA,
                 dictionary_columns=_DICTIONARY_COLUMNS):
        self._schema = schema
        self._dictionary_columns = dictionary_columns
        self._folder = folder
        self._rows_per_file = rows_per_file
        self._row_group_size = row_group_size
        self._compression = compression
        self._writer = None
        self._pending = []
        self._pending_rows = 0
        self._files = []

    def write(self, table):
        """Append `table` (the writer's schema, SCHEMA by default) to the current file or a new one."""
        if self._writer is None or self._files[-1][1] + table.num_rows > self._rows_per_file:
            self._close_file()
            name = f"part-{len(self._files):05d}.parquet"
            self._writer = pq.ParquetWriter(self._folder / name, self._schema, compression=self._compression,
                                            use_dictionary=self._dictionary_columns)
            self._files.append([name, 0])
        self._files[-1][1] += table.num_rows
        self._pending.append(table)
        self._pending_rows += table.num_rows
        if self._pending_rows >= self._row_group_size:
            self._flush(whole_groups_only=True)

    def close(self):
        """Finish the last file; return [(file name, row count), ...]."""
        self._close_file()
        return [tuple(entry) for entry in self._files]

    def _flush(self, whole_groups_only):
        table = pa.concat_tables(self._pending)
        n_write = table.num_rows
        if whole_groups_only:
            n_write -= n_write % self._row_group_size
        self._writer.write_table(table.slice(0, n_write), row_group_size=self._row_group_size)
        rest = table.slice(n_write)
        self._pending = [rest] if rest.num_rows else []
        self._pending_rows = rest.num_rows

    def _close_file(self):
        if self._writer is not None:
            if self._pending_rows:
                self._flush(whole_groups_only=False)
            self._writer.close()
            self._writer = None
