"""The catalogue of bad input: every line of README's "When the input is wrong" table is
a row of CASES below, run here as the command line it shows.

Each case runs in a folder of small files made by tests/bad_input_data.py (named for the
trap each sets) and checks: the exit code; for a refusal, exactly one line on stderr,
ending in a full stop, holding the catalogue's message (an ellipsis "…" stands for
DuckDB's or pyarrow's own words, which may change between versions); no traceback, no
Python warning, no file written or changed; and at most about 200 characters of any echoed
user text. ``test_readme_matches_cases`` keeps README's table and CASES the same.

To add a case: add a row to CASES (a trap file, if it needs one, to bad_input_data.py)
and the same row to README's table; run this file.
"""

from __future__ import annotations

import contextlib
import ctypes
import io
import os
import re
import shlex
import subprocess
import sys
import warnings
from dataclasses import dataclass
from pathlib import Path

import pytest

from bigpanel.cli import main

from bad_input_data import make_files

REPO = Path(__file__).resolve().parent.parent

FIT = "--unit depot --period month --outcome parcels --regressors staff_hours"
KEYS = "--unit depot --period month"
LONG500 = "depot_" + "x" * 494  # a 500-character name: the echo limit at work
ABBREVIATIONS = {"$FIT": FIT, "$KEYS": KEYS, "LONG500": LONG500}


@dataclass(frozen=True)
class Case:
    line: str  # the command line as the catalogue shows it (abbreviations above)
    message: str  # the message; "…" stands for words of DuckDB's or pyarrow's own (or a list of keys)
    exit: int
    usage: bool = False  # refused by the option parser (usage lines, then "Error: ...")
    isolated: bool = False  # run in a subprocess, without root's file-access override


CASES = [
    # ---- options
    Case("bigpanel fit depots.parquet $FIT --cluster depot,depot",
         "Option 'cluster' names 'depot' twice. Give two different columns for two-way clustering, or one.", 2),
    Case("bigpanel fit depots.parquet $FIT --cluster depot,month,promo",
         "Option 'cluster' names 3 columns; one- and two-way clustering are supported, so give one or two.", 2),
    Case("bigpanel fit depots.parquet $FIT --cluster nosuch",
         "Column 'nosuch' not found in depots.parquet. Available: depot, month, parcels, staff_hours, promo, depot_kind, note.", 2),
    Case("bigpanel fit depots.parquet $FIT --cluster LONG500",
         "Column 'depot_xxx… ... (500 characters) ... …xxx' not found in depots.parquet. Available: depot, month, parcels, staff_hours, promo, depot_kind, note.", 2),
    Case("bigpanel fit depots.parquet $FIT --variance hc1 --cluster depot",
         "Option 'cluster' is given but 'variance' is 'hc1'. Use --variance cluster, or drop --cluster.", 2),
    Case("bigpanel fit depots.parquet $FIT --estimator fe",
         "Error: Invalid value for '--estimator': … 'fe' is not one of 'pooled', 'within', 'first-difference', 'between', 'random-effects'.", 2, usage=True),
    Case("bigpanel fit depots.parquet $FIT --estimator random-effects --variance hc1",
         "The random-effects estimator takes variance homoskedastic or cluster by the unit 'depot'; got hc1. Use --variance cluster without --cluster.", 2),
    Case("bigpanel fit depots.parquet $FIT --test \"staff_hours = 0, vanz = 0\"",
         "Test 'staff_hours = 0, vanz = 0' names 'vanz', which is neither a number nor a term of the model. Terms: staff_hours (write a name that is not an expression in double quotes).", 2),
    Case("bigpanel fit depots.parquet $FIT --serial-test --estimator pooled",
         "Option 'serial_test' applies to within and first-difference fits, not pooled. Leave out --serial-test, or use --estimator within or first-difference.", 2),
    Case("bigpanel fit depots.parquet $FIT --variance robust",
         "Error: Invalid value for '--variance': … 'robust' is not one of 'homoskedastic', 'hc1', 'cluster'.", 2, usage=True),
    Case("bigpanel fit depots.parquet $FIT --effects promo",
         "Option 'effects' must include the unit column 'depot' for the within estimator (got promo); write --effects depot or --effects depot,month.", 2),
    Case("bigpanel fit depots.parquet $FIT --effects 'depot,cell(promo)'",
         "Effect 'cell(promo)' is not understood: cell() takes two or more column names, like cell(firm, year).", 2),
    Case("bigpanel fit depots.parquet $FIT --effects depot,promo --effects-tolerance 5",
         "Option 'effects_tolerance' must be from 1e-15 to 0.01, got 5.0. Give a small positive number such as 1e-10.", 2),
    Case("bigpanel fit depots.parquet $FIT --write-effects .",
         "Option --write-effects names '.', which holds the source file 'depots.parquet'. bigpanel never writes among its sources: give a folder of its own.", 2),
    Case("bigpanel fit depots.parquet $FIT --write-residuals depots.csv",
         "Option --write-residuals names 'depots.csv', which is a file, not a folder. Give a folder you can write to.", 2),
    Case("bigpanel fit depots.parquet $FIT --estimator first-difference --write-effects out",
         "Option 'write_effects' needs the within estimator: first-difference fits estimate no unit effects to write. Use --estimator within, or leave out --write-effects.", 2),
    Case("bigpanel fit depots.parquet $FIT --estimator pooled --write-residuals out",
         "Option 'write_residuals' applies to within and first-difference fits, not pooled ones. Use --estimator within or first-difference, or leave out --write-residuals.", 2),
    Case("bigpanel fit depots.parquet $FIT --period-step 0",
         "Option 'period_step' must be a whole number from 1 to 2**53 (9,007,199,254,740,992), got 0. Give the distance between consecutive periods.", 2),
    Case("bigpanel fit depots.parquet $FIT --period-step 99999999999999999999",
         "Option 'period_step' must be a whole number from 1 to 2**53 (9,007,199,254,740,992), got 99999999999999999999. Give the distance between consecutive periods.", 2),
    Case("bigpanel fit depots.parquet $FIT --period-step abc",
         "Error: Invalid value for '--period-step': … integer", 2, usage=True),
    Case("bigpanel fit depots.parquet $FIT --weights depot_kind",
         "Option 'weights' names column 'depot_kind' in depots.parquet, which has type VARCHAR, not a number; give a numeric column of non-negative weights.", 2),
    Case("bigpanel fit depots.parquet $FIT --endogenous promo",
         "Option 'endogenous' is given without 'instruments'. Two-stage least squares needs both: --endogenous \"T1, T2\" --instruments \"Z1, Z2\".", 2),
    Case("bigpanel fit depots.parquet $FIT --endogenous promo,month --instruments depot",
         "Option 'instruments' gives 1 excluded instrument for 2 endogenous terms, so the model is not identified (under-identified); give at least as many instruments as endogenous terms.", 2),
    Case("bigpanel fit depots.parquet $FIT --threads 0",
         "Option --threads must be a whole number from 1 to …, got 0. Give a count up to the machine's cores, or leave it out to use all cores.", 2),
    # DuckDB aborts the whole process (std::bad_alloc) on such a count if it gets it: isolated in a subprocess
    Case("bigpanel fit depots.parquet $FIT --threads 999999999999",
         "Option --threads must be a whole number from 1 to …, got 999999999999. Give a count up to the machine's cores, or leave it out to use all cores.", 2, isolated=True),
    Case("bigpanel fit depots.parquet $FIT --memory-limit lots",
         "Option --memory-limit must be a positive size such as 500MB, 4GB or 2GiB, got 'lots'. Give a number with a unit (KB, MB, GB, TB or KiB, MiB, GiB, TiB), or leave the option out for no limit.", 2),
    Case("bigpanel fit depots.parquet $FIT --memory-limit -1GB",
         "Option --memory-limit must be a positive size such as 500MB, 4GB or 2GiB, got '-1GB'. Give a number with a unit (KB, MB, GB, TB or KiB, MiB, GiB, TiB), or leave the option out for no limit.", 2),
    Case("bigpanel fit depots.parquet $FIT --temp-directory /proc/bigpanel-spill",
         "Option --temp-directory names '/proc/bigpanel-spill', which cannot be made (…). Give a folder you can write to, or leave the option out to use the system's temporary folder.", 2),
    Case("bigpanel checkup --query \"SELECT * FROM read_parquet('https://example.invalid/depots.parquet')\" $KEYS",
         "Option --query reads the remote URL 'https://example.invalid/depots.parquet'; bigpanel reads local files only. Download the data and read the local copy.", 2),
    Case("bigpanel fit depots.parquet $FIT --regressors staff_hours,staff_hours",
         "Option 'regressors' lists 'staff_hours' twice. Give each term once.", 2),
    Case('bigpanel fit depots.parquet $FIT --regressors ""',
         "Option 'regressors' is empty. Give at least one term, separated by commas.", 2),
    Case('bigpanel fit depots.parquet $FIT --outcome ""',
         "Option 'outcome' is empty. Name the outcome column or expression.", 2),
    Case("bigpanel fit depots.parquet $FIT --regressors depot_kind",
         "Column 'depot_kind' in depots.parquet has type VARCHAR, not a number. Use levels(depot_kind) for a categorical column, or convert it in an expression.", 2),
    Case("bigpanel fit depots.parquet $FIT --outcome depot_kind",
         "Column 'depot_kind' in depots.parquet has type VARCHAR, not a number. Give a numeric outcome, or convert it in an expression.", 2),
    Case("bigpanel fit depots.parquet $FIT --regressors \"levels(depot_kind, 'depot')\"",
         "Term 'levels(depot_kind, 'depot')': base level 'depot' does not occur in column 'depot_kind'; name one of its levels (city, hub, rural) as the base.", 2),
    Case('bigpanel fit depots.parquet $FIT --regressors "levels(nosuch)"',
         "Column 'nosuch' not found in depots.parquet. Available: depot, month, parcels, staff_hours, promo, depot_kind, note.", 2),
    Case("bigpanel fit depots.parquet $FIT --regressors depot",
         "No term can be estimated: depot: no variation within units. Give terms that change within units and are not combinations of each other.", 1),
    Case("bigpanel fit depots.parquet $FIT --estimator first-difference --period-step 2",
         "No usable rows in depots.parquet: every row was filtered out or lacks a value of the unit 'depot' or of a term, or (differences and lags) lacks the unit's period 2 before it. Check the filter, the columns and the period step.", 1),
    Case('bigpanel fit depots.parquet $FIT --where "promo"',
         "Filter 'promo' has type DOUBLE, not a yes/no condition. Write a comparison, for example \"region = 'north'\" or \"promo > 0\".", 2),
    Case('bigpanel fit depots.parquet $FIT --where "month + 1"',
         "Filter 'month + 1' has type BIGINT, not a yes/no condition. Write a comparison, for example \"region = 'north'\" or \"promo > 0\".", 2),
    Case('bigpanel fit depots.parquet $FIT --regressors "lag(staff_hours, 99999999999999999999)"',
         "Term 'lag(staff_hours, 99999999999999999999)' has lag order '99999999999999999999', more than 100,000 periods. Give a smaller order.", 2),
    Case("bigpanel fit depots.parquet $FIT --regressors \"staff_hours, sum(staff_hours) + 0 * length('LONG500')\"",
         "Term 'sum(staff_hours) + 0 * length('depot_xxx… ... (533 characters) ... …xxx')' is refused: it calls the aggregate function sum(). Give one scalar SQL expression over the source's columns.", 2),
    Case('bigpanel fit depots.parquet $FIT --where "month > 100"',
         "No usable rows in depots.parquet after the filter 'month > 100': every row was filtered out or lacks a value of the unit 'depot' or of a term. Check the filter and the columns.", 1),
    Case("bigpanel fit depots.parquet $FIT --table depots",
         "Option --table applies to DuckDB files, but the source is 'depots.parquet'. Leave --table out, or give a .duckdb file.", 2),
    Case('bigpanel fit depots.parquet $FIT --query "SELECT 1"',
         "Option --query applies to a DuckDB file or stands alone, but the source is 'depots.parquet'. Leave the source out and read the files in the query, or drop --query.", 2),
    Case("bigpanel fit depots.parquet $FIT --csv-types month=BIGINT",
         "Option --csv-types applies to CSV sources, but the source is 'depots.parquet'. Leave it out.", 2),
    Case('bigpanel fit depots.duckdb $FIT --table depots --query "SELECT * FROM depots"',
         "Options --table and --query are both given. Give one of them.", 2),
    Case('bigpanel fit depots.csv $FIT --csv-types "month=(SELECT 1)"',
         "Option --csv-types (month=(SELECT 1)) was refused by DuckDB for depots.csv (…). Name columns the CSV file has, with DuckDB type names such as BIGINT, DOUBLE, DATE or VARCHAR.", 2),
    Case("bigpanel fit depots.csv $FIT --csv-types month=NOTATYPE",
         "Option --csv-types (month=NOTATYPE) was refused by DuckDB for depots.csv (…). Name columns the CSV file has, with DuckDB type names such as BIGINT, DOUBLE, DATE or VARCHAR.", 2),
    Case("bigpanel fit depots.csv $FIT --csv-types nosuch=INTEGER",
         "Option --csv-types (nosuch=INTEGER) was refused by DuckDB for depots.csv (…). Name columns the CSV file has, with DuckDB type names such as BIGINT, DOUBLE, DATE or VARCHAR.", 2),
    Case("bigpanel fit depots.csv $FIT --csv-types month",
         "Option --csv-types has an item 'month' that is not col=TYPE. Write pairs like \"month=DATE,depot=VARCHAR\".", 2),
    # ---- sources
    Case("bigpanel checkup $KEYS",
         "No source given. Pass a file, folder, glob, DuckDB file or a query.", 2),
    Case("bigpanel checkup nosuch.parquet $KEYS",
         "Source 'nosuch.parquet' does not exist. Check the path.", 2),
    Case("bigpanel checkup nosuch.csv $KEYS",
         "Source 'nosuch.csv' does not exist. Check the path.", 2),
    Case("bigpanel checkup nosuch.duckdb --table depots $KEYS",
         "DuckDB file 'nosuch.duckdb' does not exist. Check the path.", 2),
    Case('bigpanel checkup "nosuch*.parquet" $KEYS',
         "No files match 'nosuch*.parquet'. Check the pattern (brace lists like {a,b} are not supported).", 2),
    Case("bigpanel checkup no_parquet $KEYS",
         "Folder 'no_parquet' holds no Parquet files (searched its subfolders for *.parquet). Point at the folder that holds the data.", 2),
    Case("bigpanel checkup locked $KEYS",
         "Folder 'locked' cannot be read (Permission denied). Check its permissions, or point at a folder you can read.", 2,
         isolated=True),
    Case("bigpanel checkup locked_file.parquet $KEYS",
         "File 'locked_file.parquet' cannot be read (Permission denied). Check its permissions.", 2, isolated=True),
    Case("bigpanel checkup not_parquet.parquet $KEYS",
         "File 'not_parquet.parquet' is not a readable Parquet file (…). Re-export it or move it out of the source.", 2),
    Case("bigpanel fit corrupt_pages.parquet $FIT",
         "File 'corrupt_pages.parquet' is not a readable Parquet file (…). Re-export it or move it out of the source.", 2),
    Case("bigpanel checkup corrupt_pages.parquet $KEYS",
         "File 'corrupt_pages.parquet' is not a readable Parquet file (…). Re-export it or move it out of the source.", 2),
    Case("bigpanel fit extra_fields.csv $FIT",
         "CSV file 'extra_fields.csv' line 6 has 8 fields where the header has 6. Fix or remove that line (a stray delimiter or an unquoted one inside a value).", 2),
    Case("bigpanel checkup empty.csv $KEYS",
         "CSV file 'empty.csv' is empty. Give a file with a header line and rows.", 2),
    Case("bigpanel checkup header_only.csv $KEYS",
         "CSV file 'header_only.csv' has a header line but no rows. Give a file with rows.", 2),
    Case("bigpanel checkup parquet_named.csv $KEYS",
         "CSV file parquet_named.csv could not be read as CSV (…). Check that it is a CSV text file with a header line.", 2),
    Case("bigpanel checkup no_rows.parquet $KEYS",
         "Source no_rows.parquet has no rows. Loosen the filter or check the source.", 2),
    Case("bigpanel fit no_rows.parquet $FIT",
         "No usable rows in no_rows.parquet: every row was filtered out or lacks a value of the unit 'depot' or of a term. Check the filter and the columns.", 1),
    Case("bigpanel checkup not_duckdb.duckdb --table depots $KEYS",
         "DuckDB file 'not_duckdb.duckdb' could not be opened read-only (…). Check that it is a DuckDB database written by a compatible version.", 2),
    Case("bigpanel checkup depots.duckdb --table nosuch $KEYS",
         "Table 'nosuch' not found in DuckDB file 'depots.duckdb' (…). Check the table name, or pass --query.", 2),
    Case("bigpanel checkup depots.duckdb $KEYS",
         "DuckDB file 'depots.duckdb' needs a table name or a query. Pass --table NAME or --query SQL.", 2),
    Case('bigpanel fit depots.duckdb $FIT --query "SELECT * FROM nosuch"',
         "SQL on depots.duckdb was refused (…). Check the filter, terms and query.", 2),
    Case("bigpanel checkup --query \"SELECT * FROM 'depots.parquet'; SELECT 1\" $KEYS",
         "Option 'query' holds 2 statements (SELECT, SELECT). Give a single SELECT query.", 2),
    Case("bigpanel checkup --query \"SELECT * FROM 'depots.parquet' WHERE depot_kind <> ';'\" $KEYS",
         "Panel checkup of query", 0),
    Case("bigpanel checkup mixed_kinds $KEYS",
         "Column 'staff_hours' is double in 'mixed_kinds/a.parquet' but string in 'mixed_kinds/b.parquet'. Give it one type in every file (re-export the odd ones), or read the files with a --query that casts it.", 2),
    Case("bigpanel checkup mixed $KEYS",
         "Not in every file (their rows count as missing): staff (absent from 1 file, first mixed/a.parquet), staff_hours (absent from 1 file, first mixed/b.parquet).", 0),
    Case("bigpanel fit mixed $FIT",
         "Rows left out: 48 missing or not finite", 0),
    # ---- columns and keys
    Case("bigpanel checkup depots.parquet --unit depot --period depot",
         "Unit and period are the same column 'depot'. Give two different columns.", 2),
    Case("bigpanel checkup depots.parquet --unit LONG500 --period month",
         "Column 'depot_xxx… ... (500 characters) ... …xxx' not found in depots.parquet. Available: depot, month, parcels, staff_hours, promo, depot_kind, note.", 2),
    Case("bigpanel checkup depots.parquet $KEYS --columns depot_kind",
         "Column 'depot_kind' in depots.parquet has type VARCHAR, not a number. Choose a numeric column, or convert it in an expression (for example CAST(col AS DOUBLE)).", 2),
    Case('bigpanel checkup depots.parquet $KEYS --columns ""',
         "Option --columns is empty. Give column names separated by commas, or leave it out.", 2),
    Case("bigpanel checkup text_month.parquet $KEYS",
         "Column 'month' in text_month.parquet has type VARCHAR, which cannot be a period. Use an integer, DATE or TIMESTAMP column, or convert it in a query (for example CAST(... AS DATE)).", 2),
    Case("bigpanel fit text_month.parquet $FIT --estimator first-difference",
         "Column 'month' in text_month.parquet has type VARCHAR; first differences and lags need whole-number, DATE or TIMESTAMP periods. Use a period index column (for example months since a start date).", 2),
    Case("bigpanel checkup no_units.parquet $KEYS",
         "No row of no_units.parquet has both a unit ('depot') and a period ('month'). Check the key columns.", 2),
    Case("bigpanel fit no_units.parquet $FIT",
         "No usable rows in no_units.parquet: every row was filtered out or lacks a value of the unit 'depot' or of a term. Check the filter and the columns.", 1),
    Case("bigpanel checkup doubled.parquet $KEYS",
         "Source doubled.parquet has 3 duplicate (depot, month) keys, first (1, 1), (1, 2), (1, 3); keep one row per unit and period (filter or aggregate the source with a query) before estimating.", 1),
    Case("bigpanel fit doubled.parquet $FIT --estimator first-difference",
         "Columns 'depot' and 'month' in doubled.parquet have duplicate keys, for example (1, 1), (1, 2), (1, 3). First differences and lags need one row per unit and period: filter or aggregate the duplicates.", 2),
    # ---- values
    Case("bigpanel checkup not_finite.parquet $KEYS",
         "Not finite (NaN or infinite; left out like missing values, and so are their rows in a fit): staff_hours (3).", 0),
    Case("bigpanel fit not_finite.parquet $FIT",
         "Rows left out: 3 missing or not finite", 0),
    Case("bigpanel fit out_of_range.parquet $FIT",
         "Values of 'staff_hours' are out of a double's reach for this fit (its estimate or standard error is beyond a double's range). Rescale the term or the outcome by a power of ten in the term or a query, and scale the estimate back.", 2),
    # ---- batch runs (spec files)
    Case("bigpanel run nosuch.toml --out results",
         "Spec file 'nosuch.toml' cannot be read (No such file or directory). Check the path.", 2),
    Case("bigpanel run not_toml.toml --out results",
         "Spec file not_toml.toml is not valid TOML (Expected ']' at the end of a table declaration (at line 7, column 13)). Fix the syntax.", 2),
    Case("bigpanel run no_models.toml --out results",
         'no_models.toml: no models. Add one table per model, e.g. [models.baseline] with outcome and regressors.', 2),
    Case("bigpanel run misspelled.toml --out results",
         "misspelled.toml, model 'base' has an unknown key 'regresors'. Did you mean 'regressors'? Known keys: …", 2),
    Case("bigpanel run column_typo.toml --out results",
         "column_typo.toml, model 'base', key 'regressors': Column 'staff_hour' not found in depots.parquet. Did you mean 'staff_hours'? Available: depot, month, parcels, staff_hours, promo, depot_kind, note.", 2),
    Case("bigpanel run good.toml --out depots.parquet",
         "Run folder 'depots.parquet' cannot be written (Not a directory). Give a folder you can write to.", 2),
]  # fmt: skip

@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    root = make_files(tmp_path_factory.mktemp("bad_input"))
    yield root
    os.chmod(root / "locked", 0o755)  # let pytest clean up
    os.chmod(root / "locked_file.parquet", 0o644)


def _argv(line: str) -> list[str]:
    words = shlex.split(line)
    assert words[0] == "bigpanel"
    out = []
    for word in words[1:]:
        if word in ("$FIT", "$KEYS"):
            out += shlex.split(ABBREVIATIONS[word])
        else:
            out.append(word.replace("LONG500", LONG500))
    return out


def _drop_file_override() -> None:
    """In the child, before exec: drop CAP_DAC_OVERRIDE and CAP_DAC_READ_SEARCH from the
    capability bounding set (prctl PR_CAPBSET_DROP), so that even root meets permissions.
    Fails quietly for a user without them, who meets permissions anyway."""
    libc = ctypes.CDLL(None, use_errno=True)
    for capability in (1, 2):
        libc.prctl(24, capability, 0, 0, 0)


def _run(case: Case, folder: Path, monkeypatch) -> tuple[int, str, str, list]:
    argv = _argv(case.line)
    if case.isolated:
        env = dict(os.environ, PYTHONPATH=str(REPO))
        done = subprocess.run([sys.executable, "-m", "bigpanel", *argv], cwd=folder, capture_output=True, text=True,
                              env=env, preexec_fn=_drop_file_override, timeout=300)
        return done.returncode, done.stdout, done.stderr, []
    monkeypatch.chdir(folder)
    out, err = io.StringIO(), io.StringIO()
    with warnings.catch_warnings(record=True) as caught, contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        warnings.simplefilter("always")
        code = main(argv)
    return code, out.getvalue(), err.getvalue(), [w for w in caught if not issubclass(w.category, ResourceWarning)]


def _pieces(message: str) -> list[str]:
    return [p.strip() for p in message.split("…") if p.strip()]


def _contains_in_order(text: str, pieces: list[str]) -> bool:
    at = 0
    for piece in pieces:
        at = text.find(piece, at)
        if at < 0:
            return False
        at += len(piece)
    return True


def _snapshot(folder: Path) -> dict[str, tuple[int, int]]:
    out = {}
    for root, _dirs, names in os.walk(folder):
        for name in names:
            stat = os.stat(os.path.join(root, name))
            out[os.path.join(root, name)] = (stat.st_size, stat.st_mtime_ns)
    return out


def _check(case: Case, folder: Path, monkeypatch) -> None:
    before = _snapshot(folder)
    code, out, err, caught = _run(case, folder, monkeypatch)
    assert code == case.exit, (code, out[-500:], err)
    assert "Traceback" not in err and "Warning" not in err, err
    assert not caught, [str(w.message) for w in caught]
    assert _snapshot(folder) == before, "a file was written or changed"
    lines = [line for line in err.strip().splitlines() if not line.startswith("note:")]
    if case.exit == 0:
        assert _contains_in_order(out + err, _pieces(case.message)), (out[-800:], err)
        return
    if case.usage:
        assert lines and lines[0].startswith("Usage: bigpanel"), err
        said = lines[-1]
    else:
        assert len(lines) == 1, err
        said = lines[0]
        assert said.endswith("."), said
    assert _contains_in_order(said, _pieces(case.message)), (said, case.message)
    assert len(said) < 600, said  # echoed user text is cut to about 200 characters


@pytest.mark.parametrize("case", CASES, ids=[c.line.removeprefix("bigpanel ") for c in CASES])
def test_catalogue(case: Case, folder: Path, monkeypatch):
    _check(case, folder, monkeypatch)


def test_catalogue_is_large_enough():
    """Issue 7 asks for at least 40 cases."""
    assert len(CASES) >= 40


def readme_rows() -> list[tuple[str, str, int]]:
    """(command line, message, exit code) of every row of README's catalogue table."""
    text = (REPO / "README.md").read_text()
    section = text.split("## When the input is wrong", 1)[1].split("\n## ", 1)[0]
    rows = []
    for line in section.splitlines():
        m = re.match(r"^\| `(.+)` \| (.+) \| (\d) \|$", line)
        if m:
            rows.append((m.group(1), m.group(2).replace("\\|", "|"), int(m.group(3))))
    return rows


def test_readme_matches_cases():
    """README's table and CASES hold the same rows in the same order: neither can drift."""
    assert readme_rows() == [(c.line, c.message, c.exit) for c in CASES]


def readme_row(case: Case) -> str:
    """README's table row for a case: ``python -c "import test_bad_input as t;
    print(t.readme_row(t.CASES[-1]))"`` from tests/ prints the row for a new case."""
    return f"| `{case.line}` | {case.message} | {case.exit} |"


def test_echo_keeps_messages_short_and_on_one_line():
    # common practice: a message repeats the start and end of long user text, not all of it
    from bigpanel.errors import ECHO_LIMIT, echo

    text = "staff_hours + " + "1 + " * 400 + "promo"
    shown = echo(text)
    assert len(shown) <= ECHO_LIMIT
    assert shown.startswith("staff_hours + 1") and shown.endswith("+ promo")
    assert f"({len(text):,} characters)" in shown
    assert echo("a\nb\t\x0fc") == "a\\nb\\t\\x0fc"  # escaped: one line, a smuggled newline stays visible
    assert echo("depot") == "depot"
