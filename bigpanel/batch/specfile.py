"""Spec files: a family of models in TOML, checked whole before any row is read.

Layout (keys come from the parameter tables in :mod:`bigpanel.params`, never from a list
here): ``[source]`` or ``[sources.NAME]`` hold the source options (``SOURCE_PARAMETERS``)
and the keys a source's models share (``SHARED_KEYS``: unit, period, period_step);
``[defaults]`` holds model keys applied to every model; ``[models.NAME]`` one table per
model (``PARAMETERS`` plus ``source = "NAME"`` and the model-scope source options such as
``where``). A model's value wins over its source's, which wins over the defaults.

Every problem found is reported at once, each naming the file, the model or source, the
key, what was expected and close matches for misspelled keys (:func:`load_spec`) and
columns (:func:`check_columns`, which reads each source's schema and binds the
expressions, reading no rows).
"""

from __future__ import annotations

import difflib
import hashlib
import os
import re
import tomllib
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from pathlib import Path

from .. import params
from ..errors import InputError, echo

TOP_KEYS = ("source", "sources", "defaults", "models")
DEFAULT_SOURCE = "source"  # the name of a spec's [source] table
MODEL_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.-]{0,99}")  # also a file name: models/NAME.json


class SpecError(InputError):
    """A spec file with problems; ``problems`` lists every one (the message shows them all)."""

    def __init__(self, path: str, problems: list[str]):
        self.problems = list(problems)
        if len(problems) == 1:
            text = problems[0]
        else:
            text = (f"Spec file {path} has {len(problems)} problems; nothing was run. Fix them and run again:\n"
                    + "\n".join(f"  - {p}" for p in problems))
        super().__init__(text)


@dataclass(frozen=True)
class SourceEntry:
    name: str
    options: dict  # checked source options; ``path`` absolute (relative to the spec file)
    shared: dict  # unit, period, period_step given in the source table
    folder: str | None = None  # the spec file's folder: a query's relative file paths are read from it


@dataclass(frozen=True)
class ModelEntry:
    name: str
    source: str
    values: dict  # every model key after defaults and the source's shared keys, as the spec gives them
    where: str | None  # the model's own filter (on top of the source's)
    spec: object  # the checked FitSpec

    @property
    def group(self) -> tuple:
        """Models with the same group key share one session and its scans."""
        return (self.source, self.where, self.spec.unit, self.spec.period, self.spec.period_step)

    def resolved(self, source: SourceEntry) -> dict:
        """The model's resolved entry: its keys and the source options that shape its
        numbers (engine settings left out), in a canonical form for hashing."""
        src = {k: v for k, v in source.options.items() if params.affects_result(k)}
        return {"model": dict(sorted(self.values.items())), "where": self.where, "source": dict(sorted(src.items()))}


@dataclass
class RunSpec:
    path: Path
    sha256: str
    sources: dict[str, SourceEntry]
    models: dict[str, ModelEntry] = field(default_factory=dict)
    broken: set[str] = field(default_factory=set)  # models with a problem (not in ``models``)

    @property
    def label(self) -> str:
        return self.path.name


def _where(kind: str, name: str) -> str:
    return f"{kind} '{echo(name, 60)}'"


def load_spec(path) -> RunSpec:
    """Read and check a spec file; raise :class:`SpecError` listing every problem.

    Nothing is opened but the spec file itself (the sources' files are listed, not read).
    """
    spec, problems = read_spec(path)
    if problems:
        raise SpecError(spec.label, problems)
    return spec


def read_spec(path) -> tuple[RunSpec, list[str]]:
    """The spec with its good models, and the problems found (models with a problem are
    left out of ``models`` and named in ``broken``)."""
    path = Path(path)
    label = path.name
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputError(f"Spec file '{echo(path)}' cannot be read ({exc.strerror or exc}). Check the path.") from None
    try:
        doc = tomllib.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise InputError(f"Spec file {label} is not valid TOML ({echo(exc)}). Fix the syntax.") from None
    problems: list[str] = []
    for key in doc:
        if key not in TOP_KEYS:
            problems.append(f"{label}: " + params.unknown_key(key, TOP_KEYS, "the top level"))
    sources = _sources(doc, path, problems)
    defaults = doc.get("defaults", {})
    model_keys = (*params.MODEL_KEYS, "source", *[k for k in params.SOURCE_PARAMETERS if params.source_scope(k) == "model"])
    if not isinstance(defaults, dict):
        problems.append(f"{label}: 'defaults' must be a table of model keys ([defaults]).")
        defaults = {}
    for key, value in defaults.items():
        if key not in model_keys:
            problems.append(f"{label}, " + params.unknown_key(key, model_keys, "[defaults]"))
    models = doc.get("models")
    if not isinstance(models, dict) or not models:
        problems.append(f"{label}: no models. Add one table per model, e.g. [models.baseline] with outcome and regressors.")
        models = {}
    out = RunSpec(path=path, sha256=hashlib.sha256(raw).hexdigest(), sources=sources)
    for name, table in models.items():
        out.broken.add(name)
        where = _where("model", name)
        if not MODEL_NAME.fullmatch(name):
            problems.append(f"{label}, {where}: the name must start with a letter or digit and hold only letters, "
                            "digits, '_', '-' and '.' (at most 100); it names the file models/NAME.json. Rename it.")
            continue
        if not isinstance(table, dict):
            problems.append(f"{label}, {where}: must be a table ([models.{name}]) of model keys.")
            continue
        entry = _model(path, name, table, defaults, sources, model_keys, problems)
        if entry is not None:
            folders = {k: _resolve(path, getattr(entry.spec, k)) for k in ("write_effects", "write_residuals")
                       if getattr(entry.spec, k)}  # written-back folders, like paths, relative to the spec file
            if folders:
                entry = replace(entry, spec=replace(entry.spec, **folders))
            out.models[name] = entry
            out.broken.discard(name)
    return out, problems


def _sources(doc: dict, path: Path, problems: list[str]) -> dict[str, SourceEntry]:
    label = path.name
    tables: dict[str, object] = {}
    if "source" in doc:
        tables[DEFAULT_SOURCE] = doc["source"]
    many = doc.get("sources", {})
    if not isinstance(many, dict):
        problems.append(f"{label}: 'sources' must hold one table per source ([sources.NAME]).")
        many = {}
    for name, table in many.items():
        if name in tables:
            problems.append(f"{label}: source '{echo(name, 60)}' is given twice ([source] is named '{DEFAULT_SOURCE}'). "
                            "Rename one.")
        tables[name] = table
    if not tables:
        problems.append(f"{label}: no source. Add a [source] table with path, unit and period.")
    known = (*params.SOURCE_PARAMETERS, *params.SHARED_KEYS)
    out = {}
    for name, table in tables.items():
        where = _where("source", name)
        if not isinstance(table, dict):
            problems.append(f"{label}, {where}: must be a table of source options.")
            continue
        options, shared = {}, {}
        for key, value in table.items():
            if key not in known:
                problems.append(f"{label}, " + params.unknown_key(key, known, where))
                continue
            try:
                if key in params.SHARED_KEYS:
                    shared[key] = params.check(key, value)
                else:
                    options[key] = params.check_source(key, value)
            except InputError as exc:
                problems.append(f"{label}, {where}, key '{key}': {exc}")
        if "path" not in options and "query" not in options and not any(f"{where}, key 'path'" in p for p in problems):
            problems.append(f"{label}, {where}: give 'path' (a Parquet or CSV file, folder or glob, or a DuckDB file "
                            "with 'table' or 'query') or a 'query'.")
        if "path" in options:
            options["path"] = _resolve(path, options["path"])
            if not _exists(options["path"]):
                problems.append(f"{label}, {where}, key 'path': '{echo(table['path'])}' does not exist "
                                f"(read relative to the spec file: {echo(options['path'])}). Check the path.")
        out[name] = SourceEntry(name, options, shared, folder=str(path.parent.resolve()))
    return out


def _resolve(spec_path: Path, given: str) -> str:
    if "://" in given or given.startswith("env:"):
        return given  # a PostgreSQL source (bigpanel.pg); other URLs are refused by name when opened
    return os.path.abspath(os.path.join(spec_path.parent, os.path.expanduser(given)))


def _exists(path: str) -> bool:
    if "://" in path or any(c in path for c in "*?["):
        return True  # globs and URLs are judged when the source is opened
    return os.path.exists(path)


def _model(spec_path: Path, name: str, table: dict, defaults: dict, sources: dict, model_keys: tuple,
           problems: list[str]) -> ModelEntry | None:
    from ..spec import FitSpec

    label = spec_path.name
    where = _where("model", name)
    before = len(problems)
    unknown = [key for key in table if key not in model_keys]
    for key in unknown:
        problems.append(f"{label}, " + params.unknown_key(key, model_keys, where))
    source_name = table.get("source", defaults.get("source"))
    if source_name is None:
        if len(sources) == 1:
            source_name = next(iter(sources))
        elif DEFAULT_SOURCE in sources:
            source_name = DEFAULT_SOURCE
        else:
            problems.append(f"{label}, {where}: names no source; give source = one of {', '.join(map(repr, sources))}.")
            return None
    if source_name not in sources:
        close = difflib.get_close_matches(str(source_name), list(sources), n=2, cutoff=0.6)
        hint = f" Did you mean {', '.join(map(repr, close))}?" if close else ""
        problems.append(f"{label}, {where}, key 'source': '{echo(source_name, 60)}' is not a source of this file.{hint} "
                        f"Sources: {', '.join(map(repr, sources)) or 'none'}.")
        return None
    source = sources[source_name]
    merged = {k: v for k, v in defaults.items() if k in params.PARAMETERS}
    merged.update(source.shared)
    merged.update({k: v for k, v in table.items() if k in params.PARAMETERS})
    values = {}
    for key in params.PARAMETERS:
        if key not in merged:
            misspelled = difflib.get_close_matches(key, unknown, n=1, cutoff=0.6)  # already named above
            if params.PARAMETERS[key].required and not misspelled:
                origin = "the model, [defaults] or the source" if key in params.SHARED_KEYS else "the model or [defaults]"
                problems.append(f"{label}, {where}, key '{key}': missing. Give it in {origin}. {params.PARAMETERS[key].help}")
            continue
        try:
            params.check(key, merged[key])
            if params.PARAMETERS[key].kind == "folder":  # a folder a fit writes: relative to the spec file too
                merged[key] = _resolve(spec_path, merged[key])
            values[key] = merged[key]
        except InputError as exc:
            origin = "" if key in table else (" (from the source)" if key in source.shared else " (from [defaults])")
            problems.append(f"{label}, {where}, key '{key}'{origin}: {exc}")
    own_where = table.get("where", defaults.get("where"))
    if own_where is not None:
        try:
            own_where = params.check_source("where", own_where)
        except InputError as exc:
            problems.append(f"{label}, {where}, key 'where': {exc}")
    if len(problems) > before:
        return None
    try:
        spec = FitSpec.build(values.pop("outcome"), values.pop("regressors"), **values)
    except InputError as exc:
        problems.append(f"{label}, {where}: {exc}")
        return None
    values = {k: merged[k] for k in params.PARAMETERS if k in merged}
    return ModelEntry(name, source_name, values, own_where, spec)


def combined_where(source: SourceEntry, model_where: str | None) -> str | None:
    """The source's filter and the model's own, both applied."""
    parts = [w for w in (source.options.get("where"), model_where) if w]
    return " AND ".join(f"({w})" for w in parts) if len(parts) > 1 else (parts[0] if parts else None)


def open_entry(source: SourceEntry, model_where: str | None = None, engine_overrides: dict | None = None):
    """The :class:`~bigpanel.source.Source` of a spec source with a model's filter (lists the
    files; reads no rows)."""
    from ..source import Engine, open_source

    o = source.options
    settings = {k: v for k, v in o.items() if not params.affects_result(k)}  # Engine's fields
    settings.update({k: v for k, v in (engine_overrides or {}).items() if v is not None})
    # every other source option is an argument of open_source by the same name
    given = {k: v for k, v in o.items() if params.affects_result(k) and k not in ("path", "engine")}
    given["where"] = combined_where(source, model_where)
    if "query" in o:
        given["relative_to"] = source.folder
    return open_source(o.get("path"), **given,
                       engine=Engine(**settings, name=o.get("engine") or params.SOURCE_PARAMETERS["engine"].default))


@contextmanager
def schema_engine(src) -> Iterator[object]:
    """An engine on ``src`` for schema checks (DESCRIBE and binding only)."""
    from ..engine import open_engine

    with open_engine(src) as engine:
        yield engine


def check_columns(spec: RunSpec, engine_overrides: dict | None = None) -> None:
    """Check every model's columns and expressions against its source's schema (no rows
    are read: DESCRIBE and binding only); raise :class:`SpecError` listing every problem."""
    problems = column_problems(spec, engine_overrides)
    if problems:
        raise SpecError(spec.label, problems)


def column_problems(spec: RunSpec, engine_overrides: dict | None = None) -> list[str]:
    """The problems :func:`check_columns` finds, as a list."""
    from ..design import numeric_expression

    label = spec.label
    problems: list[str] = []
    by_source: dict[tuple, list[ModelEntry]] = {}
    for m in spec.models.values():
        by_source.setdefault((m.source, m.where), []).append(m)
    broken_sources: set[str] = set()
    for (source_name, model_where), entries in by_source.items():
        source = spec.sources[source_name]
        if source_name in broken_sources:
            continue
        try:
            src = open_entry(source, model_where, engine_overrides)
        except InputError as exc:
            if model_where is None or source.options.get("where"):
                broken_sources.add(source_name)
                problems.append(f"{label}, {_where('source', source_name)}: {exc}")
            else:
                problems += [f"{label}, {_where('model', m.name)}, key 'where': {exc}" for m in entries]
            continue
        try:
            with schema_engine(src) as engine:
                engine.columns()
                try:
                    engine.check_filter()
                except InputError as exc:
                    problems.append(f"{label}, {_where('source', source_name)}, key 'where': {exc}" if model_where is None
                                    else f"{label}, {_where('model', entries[0].name)}, key 'where': {exc}")
                    continue
                for m in entries:
                    problems += _model_columns(label, m, engine, numeric_expression)
        except InputError as exc:
            broken_sources.add(source_name)
            problems.append(f"{label}, {_where('source', source_name)}: {exc}")
    return problems


def _model_columns(label: str, m: ModelEntry, engine, numeric_expression) -> list[str]:
    from ..errors import unknown_column

    spec, where, out = m.spec, _where("model", m.name), []
    cols = engine.columns()

    def column(key: str, name: str) -> None:
        if name not in cols:
            out.append(f"{label}, {where}, key '{key}': {unknown_column(name, engine.label, cols)}")

    column("unit", spec.unit)
    column("period", spec.period)
    for c in spec.cluster:
        column("cluster", c)
    for e in spec.effects:
        if e not in (spec.unit, spec.period):
            column("effects", e)
    for term in spec.terms:
        if term.kind == "levels":
            column("regressors", term.expr)
            continue
        try:
            numeric_expression(engine, term.text if term.kind == "expr" else term.expr, term.expr, "Term", [])
        except InputError as exc:
            out.append(f"{label}, {where}, key 'regressors': {exc}")
    for key, terms in (("endogenous", spec.endogenous), ("instruments", spec.instruments)):
        for term in terms:
            try:
                numeric_expression(engine, term.text if term.kind == "expr" else term.expr, term.expr, "Term", [])
            except InputError as exc:
                out.append(f"{label}, {where}, key '{key}': {exc}")
    if spec.weights:
        column("weights", spec.weights)
        if spec.weights in cols and not engine.is_numeric(cols[spec.weights]):
            out.append(f"{label}, {where}, key 'weights': column '{spec.weights}' of {engine.label} has type "
                       f"{cols[spec.weights]}, not a number; give a numeric column of non-negative weights.")
    try:
        numeric_expression(engine, spec.outcome, spec.outcome_sql, "Outcome", [])
    except InputError as exc:
        out.append(f"{label}, {where}, key 'outcome': {exc}")
    return out
