"""The ``bigpanel`` command line: thin commands over the Python API.

Results go to stdout, diagnostics to stderr. Exit codes: 0 done; 1 the run failed or found
a problem that blocks estimation (such as duplicate keys); 2 bad usage or bad input, with
one sentence on stderr and no traceback.
"""

from __future__ import annotations

import json
import os
import re
import sys
import warnings
from enum import Enum
from typing import TYPE_CHECKING, Annotated, Optional

import typer

from . import interrupts
from .errors import BigpanelError, BigpanelWarning, InputError, echo
from .params import PARAMETERS, SOURCE_PARAMETERS

if TYPE_CHECKING:  # the source module imports DuckDB: only the commands that read data load it
    from .source import Source

app = typer.Typer(
    name="bigpanel",
    help="Panel regressions with fixed effects (within, first differences, between, random effects) run as SQL where the data lives: Parquet, CSV and DuckDB files, or a PostgreSQL warehouse.",
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)


# ---------------------------------------------------------------- shared source options
# Every command that reads a panel takes these; build the Source with _source_from_options.

SourceArg = Annotated[
    Optional[str],
    typer.Argument(help="Parquet file, folder or glob; CSV file or glob; a DuckDB file, or a PostgreSQL URI "
                   "(postgresql://... or env:NAME; with --table or --query).",
                   show_default=False),
]
TableOpt = Annotated[Optional[str], typer.Option("--table", help="Table or view in the DuckDB file or PostgreSQL database (schema.name).")]
QueryOpt = Annotated[Optional[str], typer.Option("--query", help="A SQL query giving the rows (inside the DuckDB file or PostgreSQL database, or on its own).")]
WhereOpt = Annotated[Optional[str], typer.Option("--where", help="SQL predicate keeping rows, e.g. \"region = 'north'\".")]
CsvTypesOpt = Annotated[Optional[str], typer.Option("--csv-types", help="Override detected CSV column types: \"col=TYPE,col2=TYPE\".")]
CsvNullOpt = Annotated[Optional[list[str]], typer.Option("--csv-null", metavar="TOKEN", help="Extra CSV token read as a missing value, e.g. NA or \".\" "
                                                          "(repeat the option, or separate tokens by commas: --csv-null NA,.); "
                                                          "empty fields are always missing.")]
ThreadsOpt = Annotated[Optional[int], typer.Option("--threads", help="DuckDB worker threads (default: all cores).")]
MemoryLimitOpt = Annotated[Optional[str], typer.Option("--memory-limit", help="DuckDB memory limit, e.g. 2GB; past it DuckDB spills to disk.")]
TempDirectoryOpt = Annotated[Optional[str], typer.Option("--temp-directory", help="Folder for DuckDB's spill files.")]
JsonOpt = Annotated[bool, typer.Option("--json", help="Print the result as JSON instead of text.")]


def _source_from_options(
    source: str | None,
    *,
    table: str | None = None,
    query: str | None = None,
    where: str | None = None,
    csv_types: str | None = None,
    csv_nulls: list[str] | None = None,
    threads: int | None = None,
    memory_limit: str | None = None,
    temp_directory: str | None = None,
    engine_name: str | None = None,
    spark_master: str | None = None,
) -> Source:
    """Build the Source described by the shared command-line options."""
    from .source import Engine, open_source

    engine = Engine(threads=threads, memory_limit=memory_limit, temp_directory=temp_directory,
                    name=engine_name or SOURCE_PARAMETERS["engine"].default, spark_master=spark_master)
    nulls = [token for item in csv_nulls or () for token in item.split(",")] or None
    return open_source(source, table=table, query=query, where=where, csv_types=_parse_csv_types(csv_types), engine=engine,
                       csv_nulls=nulls)


_TYPE_SEPARATOR = re.compile(r",(?![^()]*\))")  # commas outside parentheses: DECIMAL(10,2) stays whole


def _parse_csv_types(text: str | None) -> dict[str, str] | None:
    if not text:
        return None
    out = {}
    for item in _TYPE_SEPARATOR.split(text):
        name, sep, duck_type = item.partition("=")
        if not sep or not name.strip() or not duck_type.strip():
            raise InputError(f"Option --csv-types has an item '{echo(item.strip())}' that is not col=TYPE. "
                             "Write pairs like \"month=DATE,depot=VARCHAR\".")
        out[name.strip()] = duck_type.strip()
    return out


def _split_names(text: str | None) -> list[str] | None:
    if text is None:
        return None
    names = [n.strip() for n in text.split(",") if n.strip()]
    if not names:
        raise InputError("Option --columns is empty. Give column names separated by commas, or leave it out.")
    return names


def _print_json(payload: dict) -> None:
    typer.echo(json.dumps(payload, indent=2, ensure_ascii=False))


def _use_color() -> bool:
    return sys.stdout.isatty() and "NO_COLOR" not in os.environ


# ---------------------------------------------------------------- commands


@app.callback()
def _group() -> None:
    """Panel regressions with fixed effects (within, first differences, between, random effects) run as SQL where the data lives: Parquet, CSV and DuckDB files, or a PostgreSQL warehouse."""


@app.command("checkup")
def checkup_command(
    source: SourceArg = None,
    unit: Annotated[str, typer.Option("--unit", help="Column identifying the unit (depot, store, worker, ...).")] = ...,
    period: Annotated[str, typer.Option("--period", help="Column identifying the period (integer, DATE or TIMESTAMP).")] = ...,
    columns: Annotated[Optional[str], typer.Option("--columns", help="Numeric columns to check, comma-separated (default: all other columns).")] = None,
    table: TableOpt = None,
    query: QueryOpt = None,
    where: WhereOpt = None,
    csv_types: CsvTypesOpt = None,
    csv_null: CsvNullOpt = None,
    threads: ThreadsOpt = None,
    memory_limit: MemoryLimitOpt = None,
    temp_directory: TempDirectoryOpt = None,
    engine: EngineOpt = None,
    spark_master: SparkMasterOpt = None,
    as_json: JsonOpt = False,
) -> None:
    """Check a panel: keys, period grid, balance, gaps, duplicate keys, missing values, and
    how much each numeric column varies within units. Exits 1 when keys are duplicated."""
    from .panel import inspect_panel

    src = _source_from_options(source, table=table, query=query, where=where, csv_types=csv_types, csv_nulls=csv_null,
                               threads=threads, memory_limit=memory_limit, temp_directory=temp_directory,
                               engine_name=engine.value if engine else None, spark_master=spark_master)
    report = inspect_panel(src, unit, period, _split_names(columns))
    if as_json:
        _print_json(report.to_dict())
    else:
        typer.echo(report.render(color=_use_color()))
    problem = report.duplicate_problem()
    if problem:
        typer.echo(problem, err=True)
        raise typer.Exit(1)


# The model options come from the one parameter table (bigpanel.params): names, help and
# choices are declared there, so renaming an option is one line in that table.
Estimator = Enum("Estimator", {v.replace("-", "_"): v for v in PARAMETERS["estimator"].choices}, type=str)
VarianceKind = Enum("VarianceKind", {v: v for v in PARAMETERS["variance"].choices}, type=str)
LevelCount = Enum("LevelCount", {v.replace("-", "_"): v for v in PARAMETERS["absorbed_levels"].choices}, type=str)
EngineName = Enum("EngineName", {v: v for v in SOURCE_PARAMETERS["engine"].choices}, type=str)
EngineOpt = Annotated[Optional[EngineName], typer.Option(SOURCE_PARAMETERS["engine"].option, help=SOURCE_PARAMETERS["engine"].help)]
SparkMasterOpt = Annotated[Optional[str], typer.Option(SOURCE_PARAMETERS["spark_master"].option,
                                                       help=SOURCE_PARAMETERS["spark_master"].help)]


def _model_option(name: str):
    p = PARAMETERS[name]
    return typer.Option(p.option, help=p.help)


@app.command("fit")
def fit_command(
    source: SourceArg = None,
    outcome: Annotated[str, _model_option("outcome")] = ...,
    regressors: Annotated[str, _model_option("regressors")] = ...,
    unit: Annotated[str, _model_option("unit")] = ...,
    period: Annotated[str, _model_option("period")] = ...,
    estimator: Annotated[Estimator, _model_option("estimator")] = Estimator(PARAMETERS["estimator"].default),
    effects: Annotated[Optional[str], _model_option("effects")] = None,
    variance: Annotated[Optional[VarianceKind], _model_option("variance")] = None,
    cluster: Annotated[Optional[str], _model_option("cluster")] = None,
    no_intercept: Annotated[bool, _model_option("intercept")] = False,
    period_step: Annotated[Optional[int], _model_option("period_step")] = None,
    absorbed_levels: Annotated[LevelCount, _model_option("absorbed_levels")] = LevelCount(
        PARAMETERS["absorbed_levels"].default),
    effects_tolerance: Annotated[Optional[float], _model_option("effects_tolerance")] = None,
    effects_iterations: Annotated[Optional[int], _model_option("effects_iterations")] = None,
    write_effects: Annotated[Optional[str], _model_option("write_effects")] = None,
    write_residuals: Annotated[Optional[str], _model_option("write_residuals")] = None,
    weights: Annotated[Optional[str], _model_option("weights")] = None,
    endogenous: Annotated[Optional[str], _model_option("endogenous")] = None,
    instruments: Annotated[Optional[str], _model_option("instruments")] = None,
    test: Annotated[Optional[list[str]], typer.Option(PARAMETERS["test"].option, metavar="RESTRICTIONS",
                                                       help=PARAMETERS["test"].help)] = None,
    serial_test: Annotated[bool, _model_option("serial_test")] = False,
    table: TableOpt = None,
    query: QueryOpt = None,
    where: WhereOpt = None,
    csv_types: CsvTypesOpt = None,
    csv_null: CsvNullOpt = None,
    threads: ThreadsOpt = None,
    memory_limit: MemoryLimitOpt = None,
    temp_directory: TempDirectoryOpt = None,
    engine: EngineOpt = None,
    spark_master: SparkMasterOpt = None,
    as_json: JsonOpt = False,
) -> None:
    """Estimate a pooled, within, first-difference, between or random-effects regression with cluster-robust inference."""
    from .fit import fit

    src = _source_from_options(source, table=table, query=query, where=where, csv_types=csv_types, csv_nulls=csv_null,
                               threads=threads, memory_limit=memory_limit, temp_directory=temp_directory,
                               engine_name=engine.value if engine else None, spark_master=spark_master)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", BigpanelWarning)
        result = fit(src, outcome, regressors, unit, period, estimator=estimator.value, effects=effects,
                     variance=variance.value if variance else None, cluster=cluster, intercept=False if no_intercept else None,
                     period_step=period_step, absorbed_levels=absorbed_levels.value,
                     effects_tolerance=effects_tolerance, effects_iterations=effects_iterations,
                     write_effects=write_effects, write_residuals=write_residuals, weights=weights,
                     endogenous=endogenous, instruments=instruments, test=test or None,
                     serial_test=serial_test)
    for w in caught:  # each note once, on stderr (the table below leaves them out)
        if issubclass(w.category, BigpanelWarning):
            typer.echo(f"note: {w.message}", err=True)
    typer.echo(result.to_json() if as_json else result.table(notes=False))


@app.command("run")
def run_command(
    spec: Annotated[str, typer.Argument(help="The TOML spec file: sources, defaults and one table per model.",
                                        show_default=False)],
    out: Annotated[Optional[str], typer.Option("--out", help="The run folder: models/NAME.json, comparison tables, "
                                               "manifest.json (made if missing).")] = None,
    dry_run: Annotated[bool, typer.Option("--dry-run", help="Check the spec and print the plan (models, scans, SQL) "
                                          "without reading rows or writing anything.")] = False,
    resume: Annotated[bool, typer.Option("--resume", help="Skip models whose spec entry, inputs and tool version are "
                                         "unchanged since they were done in this folder.")] = False,
    models: Annotated[Optional[str], typer.Option("--models", help="Run these models only, comma-separated.")] = None,
    fingerprint: Annotated[bool, typer.Option("--fingerprint", help="Record each input file's SHA-256 in the manifest "
                                              "(reads every byte once).")] = False,
    log_json: Annotated[bool, typer.Option("--log-json", help="Write the log to stderr as JSON lines.")] = False,
    threads: ThreadsOpt = None,
    memory_limit: MemoryLimitOpt = None,
    temp_directory: TempDirectoryOpt = None,
) -> None:
    """Run every model of a spec file into a folder: shared scans, one JSON per model, comparison
    tables and a manifest. Exits 0 when every model is done, 1 when some failed (the others are
    written), 2 for a bad spec or a folder in use."""
    from .batch import events, run_spec

    if out is None and not dry_run:
        raise InputError("Option --out is missing. Give the run folder, e.g. --out results/, or use --dry-run.")
    handler = events.log_handler(json_lines=log_json)
    try:
        result = run_spec(spec, out, models=models, resume=resume, dry_run=dry_run, fingerprint=fingerprint,
                          threads=threads, memory_limit=memory_limit, temp_directory=temp_directory,
                          progress=not log_json, command=["bigpanel", *sys.argv[1:]])
    finally:
        events.remove_handler(handler)
    if dry_run:
        typer.echo(result.text())
        return
    raise typer.Exit(result.exit_code)


@app.command("compare")
def compare_command(
    results: Annotated[list[str], typer.Argument(help="JSON files written by 'bigpanel fit --json' (one model each).",
                                                 show_default=False)],
    out: Annotated[Optional[str], typer.Option("--out", help="Folder for comparison.md, .tex, .html and .csv "
                                                             "(default: print the Markdown table).")] = None,
) -> None:
    """Put fitted models side by side: terms as rows, models as columns (named after their files)."""
    from .compare import compare_results

    files = compare_results(results, out=out)
    if out is None:
        typer.echo(files["comparison.md"], nl=False)


# ---------------------------------------------------------------- entry point


def main(argv: list[str] | None = None) -> int:
    """Run the command line and return its exit code (the console script exits with it).

    Stop signals are handled by :mod:`bigpanel.interrupts`, whose entry calls this; any
    error seen after a stop signal is its consequence and re-raised as the interruption.
    """
    command = typer.main.get_command(app)
    try:
        command.main(args=argv, prog_name="bigpanel", standalone_mode=True)
    except SystemExit as exc:  # usage errors (2), --help (0) and typer.Exit(code)
        interrupts.raise_if_received()
        code = exc.code
        return code if isinstance(code, int) else (0 if code is None else 1)
    except InputError as exc:
        interrupts.raise_if_received()
        _say(exc)
        return 2
    except BigpanelError as exc:
        interrupts.raise_if_received()
        _say(exc)
        return 1
    except KeyboardInterrupt:
        _say("Interrupted.")
        return 130
    except Exception as exc:  # noqa: BLE001 - a bug must still end with one sentence, not a traceback
        interrupts.raise_if_received()
        if os.environ.get("BIGPANEL_TRACEBACK"):
            raise
        _say(f"bigpanel stopped on an unexpected {type(exc).__name__}: {exc}. "
             "Rerun with BIGPANEL_TRACEBACK=1 to see where, and report it.")
        return 1
    return 0


def _say(message: object) -> None:
    print(str(message).strip(), file=sys.stderr)
