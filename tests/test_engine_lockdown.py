"""The engine after set-up: it reads the source's files and nothing else, writes nothing,
changes no setting, loads no extension, and leaves a DuckDB source byte for byte as it was.

Two layers are checked separately: DuckDB's own settings (``allowed_paths``,
``enable_external_access = false``, ``lock_configuration``; through ``session.con.raw``,
past bigpanel's guard) and the guard that runs single SELECT statements only (through
``session.con``). Also here: remote URLs refused, the one-thread instance for chunk
queries, spilling to a private folder, and the checks of the engine options.
"""

from __future__ import annotations

import hashlib
import os
import tempfile
from pathlib import Path

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from bigpanel import BigpanelError, Engine, InputError, inspect_panel, open_source
from bigpanel.cli import main
from bigpanel.source import Session, out_of_memory_message

from checkup_data import make_panel


@pytest.fixture(scope="module")
def root(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("lockdown")
    panel = make_panel(seed=5)
    (root / "data").mkdir()
    pq.write_table(panel, root / "data" / "depots.parquet")
    (root / "parts").mkdir()
    half = panel.num_rows // 2
    pq.write_table(panel.slice(0, half), root / "parts" / "a.parquet")
    pq.write_table(panel.slice(half), root / "parts" / "b.parquet")
    (root / "secret").mkdir()
    pq.write_table(pa.table({"secret": [42]}), root / "secret" / "other.parquet")
    (root / "secret" / "notes.txt").write_text("not for the engine\n")
    con = duckdb.connect(str(root / "data" / "depots.duckdb"))
    con.execute("CREATE TABLE depots AS SELECT * FROM read_parquet($1)", [str(root / "data" / "depots.parquet")])
    con.close()
    return root


def snapshot(folder: Path) -> dict[str, tuple[int, str]]:
    """Every file under ``folder``: modification time (ns) and content hash."""
    return {str(p): (p.stat().st_mtime_ns, hashlib.sha256(p.read_bytes()).hexdigest())
            for p in sorted(folder.rglob("*")) if p.is_file()}


def refused_by_engine(con: duckdb.DuckDBPyConnection, sql: str) -> str:
    with pytest.raises(duckdb.Error) as info:
        con.execute(sql).fetchall()
    return str(info.value)


# One statement per thing the engine must not do after set-up; each must fail in DuckDB
# itself (the configuration), whatever bigpanel's checks upstream let through.
ESCAPES = {
    "read-other-parquet": ("SELECT * FROM read_parquet({other})", "Permission Error"),
    "read-other-text": ("SELECT * FROM read_text({notes})", "Permission Error"),
    "read-system-file": ("SELECT * FROM read_csv('/etc/passwd')", "Permission Error"),
    "list-a-folder": ("SELECT * FROM glob({secret_glob})", "Permission Error"),
    "copy-to-new-file": ("COPY (SELECT 42 AS x) TO {pwned}", "Permission Error"),
    "attach-another-database": ("ATTACH {newdb} AS x", "Permission Error"),
    "set-threads": ("SET threads = 1", "configuration has been locked"),
    "set-memory": ("SET memory_limit = '1GB'", "configuration has been locked"),
    "reopen-access": ("SET enable_external_access = true", "configuration has been locked"),
    "widen-paths": ("SET allowed_directories = ['/']", "configuration has been locked"),
    "reset-lock": ("RESET lock_configuration", "configuration has been locked"),
    "install-extension": ("INSTALL httpfs", "Permission Error"),
    "load-extension": ("LOAD httpfs", "Permission Error"),
    "remote-read": ("SELECT * FROM read_parquet('https://example.invalid/x.parquet')", "Permission Error"),
}


def _fill(sql: str, root: Path) -> str:
    def lit(p: Path | str) -> str:
        return "'" + str(p).replace("'", "''") + "'"

    return sql.format(other=lit(root / "secret" / "other.parquet"), notes=lit(root / "secret" / "notes.txt"),
                      secret_glob=lit(root / "secret" / "*"), pwned=lit(root / "pwned.csv"), newdb=lit(root / "new.duckdb"))


SOURCES = {
    "parquet": lambda root: open_source(root / "data" / "depots.parquet"),
    "parquet-folder": lambda root: open_source(root / "parts"),
    "duckdb-table": lambda root: open_source(root / "data" / "depots.duckdb", table="depots"),
    "query-on-file": lambda root: open_source(None, query=f"SELECT * FROM '{root / 'data' / 'depots.parquet'}'"),
    "query-on-range": lambda root: open_source(None, query="SELECT range AS depot, 1 AS month FROM range(10)"),
}


@pytest.mark.parametrize("kind", SOURCES)
@pytest.mark.parametrize("escape", ESCAPES)
def test_engine_cannot_escape_after_set_up(root, kind, escape):
    before = snapshot(root)
    with Session(SOURCES[kind](root)) as session:
        sql, expected = ESCAPES[escape]
        assert expected in refused_by_engine(session.con.raw, _fill(sql, root))
        assert session.run("SELECT count(*) AS n FROM " + session.source.relation()).column("n")[0].as_py() > 0
    assert snapshot(root) == before
    assert not (root / "pwned.csv").exists() and not (root / "new.duckdb").exists()


def test_settings_in_force_after_set_up(root):
    with Session(open_source(root / "data" / "depots.parquet")) as session:
        rows = dict(session.con.raw.execute(
            "SELECT name, value FROM duckdb_settings() WHERE name IN ('autoinstall_known_extensions', "
            "'autoload_known_extensions', 'enable_external_access', 'lock_configuration', 'allowed_paths', "
            "'allowed_directories', 'temp_directory')").fetchall())
        assert rows["autoinstall_known_extensions"] == "false" and rows["autoload_known_extensions"] == "false"
        assert rows["enable_external_access"] == "false" and rows["lock_configuration"] == "true"
        assert rows["allowed_paths"] == f"[{root / 'data' / 'depots.parquet'}]"
        # DuckDB adds the spill folder itself (a private folder, removed on close)
        assert rows["allowed_directories"] == f"[{os.path.join(session.spill_folder, 'main')}/]"
        assert rows["temp_directory"] == os.path.join(session.spill_folder, "main")
        # the built-in extensions work without auto-loading: json, icu (time zones), core_functions
        # (parquet: every scan); listing extensions is refused (it reads the home folder)
        assert session.con.execute(
            "SELECT json_serialize_sql('SELECT 1') LIKE '%SELECT_NODE%', "
            "hour(TIMESTAMPTZ '2020-01-01 12:00:00+00' AT TIME ZONE 'Asia/Tokyo'), list_sum([1, 2])").fetchone() == (True, 21, 3)
        assert "Permission Error" in refused_by_engine(session.con.raw, "SELECT * FROM duckdb_extensions()")


GUARDED = [
    "COPY (SELECT 1) TO 'x.csv'", "ATTACH 'x.duckdb' AS x", "DETACH bigpanel_src", "SET threads = 1",
    "INSTALL httpfs", "LOAD parquet", "PRAGMA threads = 1", "CREATE TABLE t AS SELECT 1",
    "DELETE FROM bigpanel_src.depots", "SELECT 1; SELECT 2", "CALL pragma_version()", "CHECKPOINT",
]


@pytest.mark.parametrize("sql", GUARDED)
def test_guard_runs_single_selects_only(root, sql):
    before = snapshot(root)
    with Session(open_source(root / "data" / "depots.duckdb", table="depots")) as session:
        with pytest.raises(BigpanelError, match="not exactly one SELECT statement"):
            session.con.execute(sql)
        with pytest.raises(BigpanelError, match="not exactly one SELECT statement"):
            session.run(sql)
        cursor = session.cursor(threads=1)
        with pytest.raises(BigpanelError, match="not exactly one SELECT statement"):
            cursor.execute(sql)
        cursor.close()
        assert session.con.execute("SELECT count(*) FROM bigpanel_src.depots").fetchone()[0] > 0
    assert snapshot(root) == before


def test_guard_is_needed_for_sources_that_allowed_paths_leave_writable(root, tmp_path):
    """Why the guard exists: DuckDB lets an allowed path be written, and lets a detached
    read-only file be attached again for writing. The guard refuses both statements."""
    victim = tmp_path / "victim.parquet"
    pq.write_table(pa.table({"depot": [1], "month": [1]}), victim)
    before = snapshot(tmp_path)
    with Session(open_source(victim)) as session:
        with pytest.raises(BigpanelError, match="not exactly one SELECT"):
            session.con.execute(f"COPY (SELECT 0 AS depot) TO '{victim}' (USE_TMP_FILE false)")
    assert snapshot(tmp_path) == before
    db = tmp_path / "victim.duckdb"
    con = duckdb.connect(str(db))
    con.execute("CREATE TABLE depots AS SELECT 1 AS depot, 1 AS month")
    con.close()
    before = snapshot(tmp_path)
    with Session(open_source(db, table="depots")) as session:
        for sql in ("DETACH bigpanel_src", f"ATTACH '{db}' AS again", "DROP TABLE again.depots"):
            with pytest.raises(BigpanelError, match="not exactly one SELECT"):
                session.con.execute(sql)
    assert snapshot(tmp_path) == before


def test_query_source_reads_exactly_its_own_files(root, monkeypatch):
    monkeypatch.chdir(root)
    query = "SELECT * FROM read_parquet('parts/*.parquet') WHERE depot IN (SELECT depot FROM 'data/depots.parquet')"
    with Session(open_source(None, query=query)) as session:
        raw = session.con.raw
        paths, folders = (raw.execute(f"SELECT value FROM duckdb_settings() WHERE name = '{n}'").fetchone()[0]
                          for n in ("allowed_paths", "allowed_directories"))
        assert paths == f"[{root / 'data' / 'depots.parquet'}]"
        assert folders == f"[{os.path.join(session.spill_folder, 'main')}/, {root / 'parts'}/]"
        assert "Permission Error" in refused_by_engine(raw, _fill("SELECT * FROM read_parquet({other})", root))
        assert "Permission Error" in refused_by_engine(raw, "SELECT * FROM 'secret/other.parquet'")
    report = inspect_panel(open_source(None, query=query), "depot", "month")
    assert report.n_rows == make_panel(seed=5).num_rows


def test_query_inside_a_duckdb_file_may_read_the_files_it_names(root):
    query = f"SELECT d.* FROM depots d JOIN '{root / 'parts' / 'a.parquet'}' a USING (depot, month)"
    source = open_source(root / "data" / "depots.duckdb", query=query)
    with Session(source) as session:
        raw = session.con.raw
        allowed = raw.execute("SELECT value FROM duckdb_settings() WHERE name = 'allowed_paths'").fetchone()[0]
        # DuckDB adds the attached file and its write-ahead logs itself (hence the SELECT-only guard)
        db = root / "data" / "depots.duckdb"
        assert set(allowed.strip("[]").split(", ")) == {str(root / "parts" / "a.parquet"), str(db), f"{db}.wal",
                                                         f"{db}.wal.checkpoint", f"{db}.wal.recovery"}
        assert "Permission Error" in refused_by_engine(raw, f"SELECT * FROM '{root / 'parts' / 'b.parquet'}'")
    assert inspect_panel(source, "depot", "month").n_rows == make_panel(seed=5).num_rows // 2


def test_query_that_reads_no_file_may_read_none(root):
    with Session(open_source(None, query="SELECT range AS depot, range % 3 AS month FROM range(30)")) as session:
        raw = session.con.raw
        assert raw.execute("SELECT value FROM duckdb_settings() WHERE name = 'allowed_paths'").fetchone()[0] == "[]"
        assert "Permission Error" in refused_by_engine(raw, f"SELECT * FROM '{root / 'data' / 'depots.parquet'}'")
        assert session.run("SELECT count(*) AS n FROM " + session.source.relation()).column("n")[0].as_py() == 30


def test_a_file_outside_the_source_is_refused_with_a_sentence(root):
    with Session(open_source(root / "data" / "depots.parquet")) as session:
        with pytest.raises(InputError, match=r"tried to reach '.*other.parquet', which bigpanel does not open"):
            session.run(_fill("SELECT * FROM read_parquet({other})", root))


REMOTE = ["http://example.invalid/d.parquet", "https://example.invalid/d.parquet", "s3://bucket/d.parquet",
          "gs://bucket/d.parquet", "gcs://bucket/d.parquet", "az://container/d.parquet",
          "abfss://c@acct.dfs.core.windows.net/d.parquet", "hf://datasets/x/d.parquet", "r2://bucket/d.parquet"]


@pytest.mark.parametrize("url", REMOTE)
def test_remote_urls_are_refused(url, capsys):
    with pytest.raises(InputError, match="remote URL"):
        open_source(url)
    with pytest.raises(InputError, match="remote URL"):
        inspect_panel(open_source(None, query=f"SELECT * FROM read_parquet(['{url}'])"), "depot", "month")
    with pytest.raises(InputError, match="remote URL"):
        inspect_panel(open_source(None, query=f"SELECT * FROM '{url}'"), "depot", "month")
    code = main(["checkup", url, "--unit", "depot", "--period", "month"])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "remote URL" in err and "Traceback" not in err


def test_a_url_as_a_value_in_a_query_is_data_not_a_source(root):
    query = f"SELECT * FROM '{root / 'data' / 'depots.parquet'}' WHERE depot_kind <> 'https://example.invalid/'"
    assert inspect_panel(open_source(None, query=query), "depot", "month").n_rows == make_panel(seed=5).num_rows


# ---------------------------------------------------------------- the one-thread instance


def test_chunk_cursors_run_on_one_thread_and_the_main_instance_keeps_its_threads(root):
    with Session(open_source(root / "data" / "depots.parquet", engine=Engine(threads=2))) as session:
        single = session.cursor(threads=1)
        assert single.execute("SELECT current_setting('threads')").fetchone()[0] == 1
        assert "configuration has been locked" in refused_by_engine(single.raw, "SET threads = 2")
        single.close()
        assert session.con.execute("SELECT current_setting('threads')").fetchone()[0] == 2
        assert sorted(os.listdir(session.spill_folder)) == ["main", "single"]


# ---------------------------------------------------------------- spill folders


def test_spill_folder_is_private_under_the_system_temp_and_removed(root):
    with Session(open_source(root / "data" / "depots.parquet")) as session:
        folder = Path(session.spill_folder)
        assert folder.parent == Path(tempfile.gettempdir()) and folder.name.startswith("bigpanel-")
        assert folder.stat().st_mode & 0o777 == 0o700
    assert not folder.exists()


def test_temp_directory_gets_a_private_subfolder_and_keeps_the_rest(tmp_path):
    parent = tmp_path / "spill" / "here"  # made on demand
    pq.write_table(make_panel(seed=5), tmp_path / "depots.parquet")
    with Session(open_source(tmp_path / "depots.parquet", engine=Engine(temp_directory=str(parent)))) as session:
        assert Path(session.spill_folder).parent == parent
    assert parent.is_dir() and list(parent.iterdir()) == []


SPILL_QUERY = "SELECT count(*) AS n FROM (SELECT range AS i FROM range(1500000) ORDER BY hash(range))"


def test_spilling_works_under_the_lockdown(root):
    """A sort that does not fit in 16MB completes (it spills to the private folder,
    which is not on the allowed list); with spilling off the same query runs out of memory."""
    source = open_source(root / "data" / "depots.parquet", engine=Engine(memory_limit="16MB", threads=1))
    with Session(source) as session:
        assert session.run(SPILL_QUERY).column("n")[0].as_py() == 1_500_000
    con = source.connect(spill_folder=None)
    with pytest.raises(duckdb.OutOfMemoryException):
        con.execute(SPILL_QUERY).fetchall()
    con.close()


def test_out_of_memory_message_fits_the_settings(root, tmp_path):
    tight = open_source(None, query="SELECT 1 AS depot, 1 AS month", engine=Engine(memory_limit="8MB", threads=1))
    with Session(tight) as session:
        with pytest.raises(BigpanelError) as info:
            session.run("SELECT list(range) AS l FROM range(20000000)")
    message = str(info.value)
    assert "under --memory-limit 8MB" in message and "Raise --memory-limit" in message
    assert "give --temp-directory" in message and "GB free" in message
    given = open_source(None, query="SELECT 1", engine=Engine(memory_limit="8MB", temp_directory=str(tmp_path)))
    assert "free space in --temp-directory" in out_of_memory_message(given, str(tmp_path), "x")
    unlimited = open_source(None, query="SELECT 1")
    text = out_of_memory_message(unlimited, str(tmp_path), "x")
    assert "no --memory-limit set" in text and "Set --memory-limit" in text


# ---------------------------------------------------------------- engine options


@pytest.mark.parametrize("value", ["-1GB", "0", "0GB", "abc", "-1", "500", "150%", "4 parsecs", "1e9"])
def test_memory_limit_refused(value):
    with pytest.raises(InputError, match=r"Option --memory-limit must be a positive size .*got '"):
        Engine(memory_limit=value)


@pytest.mark.parametrize("value", ["500MB", "4GB", "2GiB", "1.5GB", "64 mib", "80%", "1TB"])
def test_memory_limit_accepted_in_duckdb_forms(root, value):
    with Session(open_source(root / "data" / "depots.parquet", engine=Engine(memory_limit=value))) as session:
        assert session.con.execute("SELECT current_setting('memory_limit')").fetchone()[0]


@pytest.mark.parametrize("value", [0, -2, 1.5, True, 10**12])
def test_threads_out_of_range_refused(value):
    with pytest.raises(InputError, match="Option --threads must be a whole number from 1 to"):
        Engine(threads=value)


def test_temp_directory_checked_before_any_scan(tmp_path, capsys):
    blocker = tmp_path / "a-file"
    blocker.write_text("x")
    for bad, reason in ((blocker, "which is a file"), (blocker / "below", r"which cannot be made \(not a directory\)"),
                        ("/proc/bigpanel-spill", "which cannot be made")):
        with pytest.raises(InputError, match=reason):
            Engine(temp_directory=str(bad))
        # the source does not even exist: the option is named, not the source
        code = main(["checkup", str(tmp_path / "missing.parquet"), "--unit", "depot", "--period", "month",
                     "--temp-directory", str(bad)])
        err = capsys.readouterr().err
        assert code == 2 and "--temp-directory" in err and "missing.parquet" not in err, err
