"""Small files for the catalogue of bad input (tests/test_bad_input.py): a good panel of
depots by month in each source kind, and one file per trap, named for the trap."""

from __future__ import annotations

import os
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.compute  # noqa: F401 - pa.compute
import pyarrow.parquet as pq


def depots(seed: int = 11, n_units: int = 12, n_months: int = 8) -> pa.Table:
    """A balanced panel with an integer month, a text column and a 0/1 column."""
    rng = np.random.default_rng(seed)
    depot = np.repeat(np.arange(1, n_units + 1), n_months)
    month = np.tile(np.arange(1, n_months + 1), n_units)
    staff = rng.normal(50, 5, depot.size) + depot
    promo = (rng.random(depot.size) < 0.4).astype(float)
    parcels = 10 * depot + 2.0 * staff + 30 * promo + rng.normal(0, 3, depot.size)
    kind = np.array(["hub", "city", "rural"])[depot % 3]
    return pa.table({
        "depot": depot.astype(np.int64), "month": month.astype(np.int64), "parcels": parcels,
        "staff_hours": staff, "promo": promo, "depot_kind": kind,
        "note": pa.array([None] * depot.size, type=pa.string()),
    })  # fmt: skip


def _corrupt_pages(path: Path, table: pa.Table) -> None:
    """A Parquet file whose footer is intact but whose data pages are overwritten."""
    pq.write_table(table, path, compression="snappy")
    raw = bytearray(path.read_bytes())
    meta = pq.read_metadata(path)
    start = 4
    end = meta.row_group(0).column(0).data_page_offset + meta.row_group(0).column(0).total_compressed_size
    for i in range(start + 8, min(end + 400, len(raw) - 8 - meta.serialized_size)):
        raw[i] = 0xFF ^ raw[i]
    path.write_bytes(bytes(raw))


def make_files(root: Path) -> Path:
    """Write every file the catalogue names into ``root`` and return it."""
    table = depots()
    pq.write_table(table, root / "depots.parquet")
    frame = table.to_pandas()
    frame.drop(columns=["note"]).to_csv(root / "depots.csv", index=False)
    lines = (root / "depots.csv").read_text().splitlines()
    lines[5] = lines[5] + ",17,extra"
    (root / "extra_fields.csv").write_text("\n".join(lines) + "\n")
    (root / "empty.csv").write_text("")
    (root / "header_only.csv").write_text(lines[0] + "\n")
    pq.write_table(table, root / "parquet_named.csv")
    pq.write_table(table.slice(0, 0), root / "no_rows.parquet")
    (root / "not_parquet.parquet").write_bytes(b"PAR1 this is not really a Parquet file")
    _corrupt_pages(root / "corrupt_pages.parquet", table)
    (root / "not_duckdb.duckdb").write_text("not a database\n")
    con = duckdb.connect(str(root / "depots.duckdb"))
    con.register("t", table)
    con.execute("CREATE TABLE depots AS SELECT * FROM t")
    con.close()
    mixed = root / "mixed"
    mixed.mkdir()
    pq.write_table(table.slice(0, 48), mixed / "a.parquet")
    pq.write_table(table.slice(48).drop_columns(["staff_hours"]).append_column("staff", table.slice(48).column("staff_hours")), mixed / "b.parquet")
    kinds = root / "mixed_kinds"
    kinds.mkdir()
    pq.write_table(table.slice(0, 48), kinds / "a.parquet")
    rest = table.slice(48)
    as_text = pa.array([f"{v:.3f}" for v in rest.column("staff_hours").to_pylist()])
    pq.write_table(rest.set_column(3, "staff_hours", as_text), kinds / "b.parquet")
    (root / "no_parquet").mkdir()
    (root / "no_parquet" / "readme.txt").write_text("no data here\n")
    locked = root / "locked"
    locked.mkdir()
    pq.write_table(table, locked / "depots.parquet")
    os.chmod(locked, 0)
    pq.write_table(table, root / "locked_file.parquet")
    os.chmod(root / "locked_file.parquet", 0)
    # traps in the values
    n = table.num_rows
    nonfinite = table.column("staff_hours").to_numpy().copy()
    nonfinite[3], nonfinite[10], nonfinite[20] = np.nan, np.inf, -np.inf
    pq.write_table(table.set_column(3, "staff_hours", pa.array(nonfinite)), root / "not_finite.parquet")
    units = pa.array([None] * n, type=pa.int64())
    pq.write_table(table.set_column(0, "depot", units), root / "no_units.parquet")
    text_month = pa.array([f"m{m}" for m in table.column("month").to_pylist()])
    pq.write_table(table.set_column(1, "month", text_month), root / "text_month.parquet")
    doubled = pa.concat_tables([table, table.slice(0, 3)])
    pq.write_table(doubled, root / "doubled.parquet")
    out_of_range = table.set_column(3, "staff_hours", pa.compute.multiply(table.column("staff_hours"), 1e-300))
    out_of_range = out_of_range.set_column(2, "parcels", pa.compute.multiply(table.column("parcels"), 1e300))
    pq.write_table(out_of_range, root / "out_of_range.parquet")
    # spec files (bigpanel run)
    head = '[source]\npath = "depots.parquet"\nunit = "depot"\nperiod = "month"\n[defaults]\noutcome = "parcels"\n'
    (root / "misspelled.toml").write_text(head + '[models.base]\nregresors = ["staff_hours"]\n')
    (root / "no_models.toml").write_text(head)
    (root / "not_toml.toml").write_text(head + "[models.base\n")
    (root / "column_typo.toml").write_text(head + '[models.base]\nregressors = ["staff_hour"]\n')
    (root / "good.toml").write_text(head + '[models.base]\nregressors = ["staff_hours"]\n')
    return root
