"""Every kind of source gives the same checkup, checked against the pandas reference
(tests/checkup_data.reference_checkup) on the same rows."""

from __future__ import annotations

import hashlib
from pathlib import Path

import duckdb
import pandas as pd
import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from bigpanel import BigpanelError, InputError, open_source
from bigpanel.panel import inspect_panel
from bigpanel.source import Session

from checkup_data import CHECKED, make_panel, reference_checkup
from test_panel import assert_matches


@pytest.fixture(scope="module")
def table() -> pa.Table:
    return make_panel(seed=11)


@pytest.fixture(scope="module")
def reference(table) -> dict:
    return reference_checkup(table.to_pandas(), "depot", "month", CHECKED)


@pytest.fixture(scope="module")
def files(table, tmp_path_factory) -> dict[str, Path]:
    """The same panel as one Parquet file, a hive-partitioned folder tree, a set of files
    for a glob, two CSV files, and a DuckDB file holding a table and a view."""
    root = tmp_path_factory.mktemp("sources")
    out = {"parquet": root / "depots.parquet"}
    pq.write_table(table, out["parquet"], row_group_size=100)

    out["hive"] = root / "hive"
    frame = table.to_pandas()
    for kind, part in frame.groupby("depot_kind"):
        for year, rows in part.groupby(pd.to_datetime(part["month"]).dt.year):
            folder = out["hive"] / f"depot_kind={kind}" / f"year={year}"
            folder.mkdir(parents=True)
            piece = pa.Table.from_pandas(rows.drop(columns="depot_kind"), schema=table.schema.remove(6), preserve_index=False)
            pq.write_table(piece, folder / "part-0.parquet")

    out["glob"] = root / "pieces"
    out["glob"].mkdir()
    half = table.num_rows // 2
    pq.write_table(table.slice(0, half), out["glob"] / "a-1.parquet")
    pq.write_table(table.slice(half), out["glob"] / "a-2.parquet")
    (out["glob"] / "notes.txt").write_text("not data\n")

    out["csv"] = root / "csv"
    out["csv"].mkdir()
    frame.iloc[:half].to_csv(out["csv"] / "part-1.csv", index=False)
    frame.iloc[half:].to_csv(out["csv"] / "part-2.csv", index=False)

    out["duckdb"] = root / "depots.duckdb"
    con = duckdb.connect(str(out["duckdb"]))
    con.register("frame", table)
    con.execute("CREATE TABLE depots AS SELECT * FROM frame")
    con.execute("CREATE VIEW city AS SELECT * FROM depots WHERE depot_kind = 'city'")
    con.close()
    return out


def check(source, table, reference, expected_columns=CHECKED):
    report = inspect_panel(source, "depot", "month")
    assert sorted(c.name for c in report.columns) == sorted(expected_columns)
    assert_matches(report, reference)
    return report


def test_parquet_file(files, table, reference):
    report = check(open_source(files["parquet"]), table, reference)
    assert report.source == "depots.parquet"


def test_parquet_folder_with_key_value_subfolders(files, table):
    """Folder names depot_kind=... and year=... become columns; the files lack depot_kind."""
    report = inspect_panel(open_source(files["hive"]), "depot", "month")
    frame = table.to_pandas()
    frame["year"] = pd.to_datetime(frame["month"]).dt.year
    ref = reference_checkup(frame, "depot", "month", CHECKED + ["year"])
    assert_matches(report, ref)
    checks = {c.name: c for c in report.columns}
    assert checks["depot_kind"].dtype == "VARCHAR" and checks["depot_kind"].n_missing == 0
    assert checks["year"].within_estimable is True  # a depot spans two years


def test_glob(files, table, reference):
    check(open_source(str(files["glob"] / "a-*.parquet")), table, reference)


def test_csv_files_detected_types_and_override(files, table, reference):
    detected = check(open_source(str(files["csv"] / "*.csv")), table, reference)
    assert (detected.unit_dtype, detected.period_dtype) == ("BIGINT", "DATE")
    pinned = check(open_source(str(files["csv"] / "*.csv"), csv_types={"depot": "VARCHAR"}), table, reference)
    assert pinned.unit_dtype == "VARCHAR"
    as_text = open_source(str(files["csv"] / "*.csv"), csv_types={"month": "VARCHAR"})
    with pytest.raises(InputError, match="'month' .* type VARCHAR, which cannot be a period"):
        inspect_panel(as_text, "depot", "month")


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_duckdb_table_and_view_read_only(files, table, reference):
    before = _digest(files["duckdb"])
    check(open_source(files["duckdb"], table="depots"), table, reference)
    frame = table.to_pandas()
    city = inspect_panel(open_source(files["duckdb"], table="city"), "depot", "month")
    assert_matches(city, reference_checkup(frame[frame["depot_kind"] == "city"], "depot", "month", CHECKED))
    with Session(open_source(files["duckdb"], table="depots")) as session:
        with pytest.raises(BigpanelError, match="not exactly one SELECT statement"):
            session.con.execute("DELETE FROM bigpanel_src.depots")
        with pytest.raises(duckdb.Error, match="read-only"):  # the engine's own layer, past the guard
            session.con.raw.execute("DELETE FROM bigpanel_src.depots")
    with pytest.raises(InputError):
        inspect_panel(open_source(files["duckdb"], query="DELETE FROM depots RETURNING *"), "depot", "month")
    assert _digest(files["duckdb"]) == before


def test_query_inside_duckdb_file_and_on_its_own(files, table, reference):
    check(open_source(files["duckdb"], query="SELECT * FROM depots"), table, reference)
    path = str(files["parquet"]).replace("'", "''")
    check(open_source(None, query=f"SELECT * FROM read_parquet('{path}')"), table, reference)


@pytest.mark.parametrize("convert", [lambda t: t, pl.from_arrow, lambda t: t.to_pandas()], ids=["arrow", "polars", "pandas"])
def test_in_memory_frames(table, reference, convert):
    frame = convert(table)
    report = check(open_source(frame), table, reference)
    assert report.source.startswith("in-memory")


def test_row_filter_on_a_file(files, table):
    report = inspect_panel(open_source(files["parquet"], where="depot_kind = 'hub' AND parcels IS NOT NULL"), "depot", "month")
    frame = table.to_pandas()
    kept = frame[(frame["depot_kind"] == "hub") & frame["parcels"].notna()]
    assert_matches(report, reference_checkup(kept, "depot", "month", CHECKED))
