"""``bigpanel run``: every model of a spec file, shared scans, outputs that are never
half-written, a manifest of what ran, and reruns that skip finished work.

A run folder holds ``models/NAME.json`` (what ``fit --json`` prints for the model), the
comparison tables (:mod:`bigpanel.compare`, when present), and ``manifest.json``: versions,
the spec's SHA-256, the inputs, the SQL executed, the scans per source and per model its
status, seconds, rows used and error. The manifest is rewritten after each model, so a run
killed at any moment leaves a parseable record of what finished.

Models are grouped by source, own filter and keys; each group runs on one session as
:func:`bigpanel.fit_many` does (shared scans), but a model that fails is recorded and the
others go on: a failing shared scan is rerun model by model to find which one failed.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import platform
import socket
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

from .. import __version__
from ..errors import BigpanelError, InputError, echo
from . import events
from .events import log
from .files import RunLock, fingerprint, input_files, now, remove_temporaries, write_atomic
from .specfile import ModelEntry, RunSpec, SpecError, column_problems, combined_where, open_entry, read_spec

MANIFEST = "manifest.json"
MODELS_FOLDER = "models"
MANIFEST_FORMAT = "bigpanel-run-manifest/1"
EXIT_DONE, EXIT_FAILED = 0, 1
LIBRARIES = ("duckdb", "pyarrow", "numpy", "scipy", "polars")


@dataclass
class RunReport:
    """What a run did: the folder, the manifest written there, and the exit code a
    scheduler should see (0 every model done or skipped, 1 some failed)."""

    folder: Path
    manifest: dict
    exit_code: int

    @property
    def models(self) -> dict:
        return self.manifest["models"]

    @property
    def scans(self) -> dict:
        return self.manifest["scans"]


def run_spec(path, out=None, *, models=None, resume: bool = False, dry_run: bool = False, fingerprint: bool = False,
             threads: int | None = None, memory_limit: str | None = None, temp_directory: str | None = None,
             progress: bool = False, command: list[str] | None = None):
    """Run the models of a spec file into folder ``out``.

    Parameters
    ----------
    path : str or Path
        The TOML spec file (paths in it are relative to it).
    out : str or Path
        The run folder (made if missing). Needed unless ``dry_run``.
    models : str or list of str, optional
        Run these models only (names, or one comma-separated text).
    resume : bool
        Skip models whose resolved spec entry, input fingerprints and tool version are
        those of a finished model in the folder's manifest, and whose JSON is there.
    dry_run : bool
        Check the spec and print the plan (models, the scans serving them, their SQL)
        without reading rows or writing anything; returns a :class:`RunPlan`.
    fingerprint : bool
        Also record each input file's content SHA-256 (reads every byte once).
    threads, memory_limit, temp_directory
        Engine settings for every source (over the spec's own).
    progress : bool
        Draw a progress line on stderr when it is a terminal.

    Returns
    -------
    RunReport, or RunPlan for a dry run.

    Raises
    ------
    InputError
        A bad spec (every problem listed), unknown model names, or a folder in use by
        another run; raised before any row is read and before anything is written.
    """
    spec, problems = read_spec(path)
    chosen = _chosen(spec, models)
    overrides = {"threads": threads, "memory_limit": memory_limit, "temp_directory": temp_directory}
    problems += column_problems(_subset(spec, [n for n in chosen if n in spec.models]), overrides)
    if problems:
        raise SpecError(spec.label, problems)
    if dry_run:
        return plan_run(spec, chosen, overrides)
    if out is None:
        raise InputError("No run folder given. Pass --out FOLDER (out= in Python).")
    return _Run(spec, Path(out), chosen, resume, fingerprint, overrides, progress, command).execute()


def _chosen(spec: RunSpec, models) -> list[str]:
    every = [*spec.models, *sorted(spec.broken)]
    if models is None:
        return every
    names = [n.strip() for n in (models.split(",") if isinstance(models, str) else models) if n.strip()]
    if not names:
        raise InputError("Option --models is empty. Give model names separated by commas, or leave it out.")
    import difflib

    for n in names:
        if n not in every:
            close = difflib.get_close_matches(n, every, n=2, cutoff=0.6)
            hint = f" Did you mean {', '.join(map(repr, close))}?" if close else ""
            raise InputError(f"Option --models names '{echo(n, 60)}', which is not a model of {spec.label}.{hint} "
                             f"Models: {', '.join(every)}.")
    return [n for n in every if n in names]


def _subset(spec: RunSpec, names: list[str]) -> RunSpec:
    return RunSpec(spec.path, spec.sha256, spec.sources, {n: spec.models[n] for n in names})


def _groups(spec: RunSpec, names: list[str]) -> list[list[ModelEntry]]:
    groups: dict[tuple, list[ModelEntry]] = {}
    for n in names:
        m = spec.models[n]
        groups.setdefault(m.group, []).append(m)
    return list(groups.values())


def library_versions() -> dict:
    from importlib import metadata

    out = {"python": platform.python_version()}
    for name in LIBRARIES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = None
    return out


def model_key(entry: dict, inputs: list[dict]) -> str:
    """The resume key: the model's resolved entry, its inputs' fingerprints, the tool version."""
    blob = json.dumps({"entry": entry, "inputs": inputs, "version": __version__}, sort_keys=True, default=str)
    return hashlib.sha256(blob.encode()).hexdigest()


# ---------------------------------------------------------------- recording the SQL


class Recorder:
    """The SQL a source's sessions ran (each distinct text once, with its run count)."""

    def __init__(self) -> None:
        self.texts: dict[str, int] = {}

    def add(self, sql: str, runs: int = 1) -> None:
        self.texts[sql] = self.texts.get(sql, 0) + runs

    def listing(self) -> list[dict]:
        return [{"sql": s, "runs": n} for s, n in self.texts.items()]


class RecordingEngine:
    """An engine adapter that records the SQL it is given and drives the progress line,
    then passes each call to the engine it wraps."""

    def __init__(self, inner, recorder: Recorder, title: str):
        self._inner = inner
        self._recorder = recorder
        self._title = title
        self._scan = 0

    def __getattr__(self, name):
        return getattr(self._inner, name)

    def run(self, sql, params=None):
        self._recorder.add(sql)
        return self._inner.run(sql, params)

    def run_alone(self, sql, params=None):
        self._recorder.add(sql)
        self._begin(1)
        return self._inner.run_alone(sql, params)

    def _begin(self, n_chunks: int) -> None:
        self._scan += 1
        events.PROGRESS.begin(f"{self._title} query {self._scan}", n_chunks, self._inner.row_count())

    def _recorded(self, make_sql):
        def make(chunk):
            sql = make_sql(chunk)
            self._recorder.add(sql)
            events.PROGRESS.chunk_started()
            return sql
        return make

    def run_chunks(self, chunks, make_sql, params):
        self._begin(len(chunks))
        return self._inner.run_chunks(chunks, self._recorded(make_sql), params)

    def fold_chunks(self, chunks, make_sql, params, fold):
        self._begin(len(chunks))
        return self._inner.fold_chunks(chunks, self._recorded(make_sql), params, fold)


# ---------------------------------------------------------------- one run


class _Run:
    def __init__(self, spec: RunSpec, folder: Path, chosen: list[str], resume: bool, fingerprint: bool,
                 overrides: dict, progress: bool, command: list[str] | None):
        self.spec, self.folder, self.chosen = spec, folder, chosen
        self.resume, self.fingerprint, self.overrides = resume, fingerprint, overrides
        self.progress = progress
        self.command = command
        self.models_folder = folder / MODELS_FOLDER
        self.recorders: dict[str, Recorder] = {}
        self.scans: dict[str, int] = {}
        self.inputs: dict[str, list[dict]] = {}

    # ---- set-up
    def _make_folder(self) -> None:
        try:
            self.models_folder.mkdir(parents=True, exist_ok=True)
            probe = self.folder / f".probe{os.getpid()}"
            probe.write_text("")
            probe.unlink()
        except OSError as exc:
            raise InputError(f"Run folder '{echo(self.folder)}' cannot be written ({exc.strerror or exc}). "
                             "Give a folder you can write to.") from None

    def _previous(self) -> dict:
        """The models of the folder's earlier manifest (empty if none or unreadable)."""
        try:
            old = json.loads((self.folder / MANIFEST).read_text())
            return old.get("models", {}) if isinstance(old, dict) and isinstance(old.get("models"), dict) else {}
        except FileNotFoundError:
            return {}
        except (OSError, ValueError):
            log(logging.WARNING, "manifest_unreadable", f"The earlier {MANIFEST} cannot be read; every model runs again.")
            return {}

    def _fingerprints(self) -> None:
        for name in {self.spec.models[n].source for n in self.chosen}:
            src = open_entry(self.spec.sources[name], None, self.overrides)
            files = input_files(src)
            started = time.perf_counter()
            self.inputs[name] = [fingerprint(f, self.fingerprint) for f in files]
            if self.fingerprint:
                log(logging.INFO, "fingerprinted", f"Source '{name}': {len(files)} file(s) hashed in "
                    f"{time.perf_counter() - started:.1f} s.", source=name, files=len(files))

    def _manifest(self) -> dict:
        return {
            "format": MANIFEST_FORMAT,
            "status": "running",
            "tool": {"name": "bigpanel", "version": __version__},
            "libraries": library_versions(),
            "spec": {"path": str(self.spec.path.absolute()), "sha256": self.spec.sha256},
            "command": self.command,
            "host": socket.gethostname(),
            "pid": os.getpid(),
            "started": now(),
            "finished": None,
            "exit_code": None,
            "options": {"models": self.chosen if len(self.chosen) < len(self.spec.models) else None,
                        "resume": self.resume, "fingerprint": self.fingerprint},
            "inputs": self.inputs,
            "scans": self.scans,
            "sql": {name: r.listing() for name, r in self.recorders.items()},
            "models": {},
        }

    def _write_manifest(self) -> None:
        self.manifest["sql"] = {name: r.listing() for name, r in self.recorders.items()}
        self.manifest["scans"] = dict(self.scans)
        write_atomic(self.folder / MANIFEST, json.dumps(self.manifest, indent=2, ensure_ascii=False, default=str) + "\n")

    # ---- the run
    def execute(self) -> RunReport:
        self._make_folder()
        lock = RunLock(self.folder)
        lock.acquire()
        try:
            if lock.took_over is not None:
                log(logging.WARNING, "stale_lock", f"Took over the lock of a run that no longer runs (pid "
                    f"{lock.took_over.get('pid')} on {lock.took_over.get('host')}, started "
                    f"{lock.took_over.get('started')}).", previous=lock.took_over)
            removed = remove_temporaries(self.folder) + remove_temporaries(self.models_folder)
            if removed:
                log(logging.INFO, "cleaned", f"Removed {removed} partial file(s) left by an earlier run.")
            return self._execute()
        finally:
            lock.release()

    def _execute(self) -> RunReport:
        log(logging.INFO, "run_started", f"Running {len(self.chosen)} of {len(self.spec.models)} models of "
            f"{self.spec.label} into {self.folder}.", spec=str(self.spec.path), folder=str(self.folder),
            models=self.chosen)
        previous = self._previous() if self.resume else {}
        self._fingerprints()
        self.manifest = self._manifest()
        entries = self.manifest["models"]
        for name, m in self.spec.models.items():
            key = model_key(m.resolved(self.spec.sources[m.source]), self.inputs.get(m.source, []))
            entries[name] = {"status": "pending", "source": m.source, "key": key, "file": None,
                             "seconds": None, "rows_used": None, "error": None}
            if name not in self.chosen:
                entries[name].update(status="skipped", reason="not chosen by --models")
        todo = []
        for name in self.chosen:
            old = previous.get(name, {})
            file = self.models_folder / f"{name}.json"
            if old.get("status") in ("done", "skipped") and old.get("key") == entries[name]["key"] and old.get("file") \
                    and _parses(file):
                entries[name].update(status="skipped", reason="unchanged since an earlier run (--resume)",
                                     file=f"{MODELS_FOLDER}/{name}.json", rows_used=old.get("rows_used"),
                                     seconds=0.0, finished=old.get("finished"))
                log(logging.INFO, "model_skipped", f"Model {name}: unchanged, result kept (--resume).", model=name)
            else:
                todo.append(name)
        self._write_manifest()
        progress_on = self.progress and events.PROGRESS.enable(sys.stderr)
        try:
            for group in _groups(self.spec, todo):
                self._run_group(group)
        except BaseException as exc:
            status = "interrupted" if not isinstance(exc, Exception) else "stopped"
            for e in entries.values():
                if e["status"] == "pending":
                    e.update(status="not run", reason=f"the run was {status}")
            self.manifest.update(status=status, finished=now(), exit_code=getattr(exc, "exit_code", None))
            self._write_manifest()
            raise
        finally:
            if progress_on:
                events.PROGRESS.disable()
        self._comparison()
        failed = [n for n, e in entries.items() if e["status"] == "failed"]
        code = EXIT_FAILED if failed else EXIT_DONE
        self.manifest.update(status="failed" if failed else "done", finished=now(), exit_code=code)
        self._write_manifest()
        level = logging.ERROR if failed else logging.INFO
        done = sum(e["status"] == "done" for e in entries.values())
        skipped = sum(e["status"] == "skipped" and n in self.chosen for n, e in entries.items())
        log(level, "run_finished", f"{done} done, {skipped} skipped, {len(failed)} failed"
            + (f" ({', '.join(failed)})" if failed else "") + f"; scans: "
            + ", ".join(f"{s} {n}" for s, n in self.scans.items()) + ".", done=done, skipped=skipped, failed=failed,
            scans=self.scans, exit_code=code)
        return RunReport(self.folder, self.manifest, code)

    def _run_group(self, group: list[ModelEntry]) -> None:
        """One session for models sharing a source, filter and keys: shared scans first,
        then the models that run alone; each model's result or error recorded as it comes."""
        from ..engine import adapter, open_session
        from ..execute import Executor, Keys
        from ..fit import _run_shared, estimate, prepare
        from ..inference import Notes
        from ..plan import ScanPlan

        first = group[0]
        source = self.spec.sources[first.source]
        recorder = self.recorders.setdefault(first.source, Recorder())
        names = [m.name for m in group]
        log(logging.INFO, "group_started", f"Source '{first.source}'" + (f" where {first.where}" if first.where else "")
            + f": models {', '.join(names)}.", source=first.source, where=first.where, models=names)
        try:
            src = open_entry(source, first.where, self.overrides)
            session = open_session(src)
        except BigpanelError as exc:
            for m in group:
                self._failed(m, exc, 0.0)
            return
        notes = {m.name: Notes([]) for m in group}
        with session:
            engine = RecordingEngine(adapter(session), recorder, f"source '{first.source}'")
            spec = first.spec
            executor = Executor(engine, Keys(spec.unit, spec.period, spec.period_step))
            try:
                prepared = []
                for m in group:
                    started = time.perf_counter()
                    try:
                        prepared.append((m, prepare(executor, m.spec, notes[m.name])))
                    except Exception as exc:  # noqa: BLE001 - one model's failure must not stop the others
                        self._failed(m, exc, time.perf_counter() - started, notes[m.name])
                plan = ScanPlan.build([p for _, p in prepared])
                alone = list(plan.alone)
                for scan in plan.shared:
                    members = [prepared[mm.index][0] for mm in scan.members]
                    started = time.perf_counter()
                    results: list = [None] * len(prepared)
                    try:
                        alone += _run_shared(executor, scan, [notes[m.name] for m, _ in prepared], results)
                    except Exception as exc:  # noqa: BLE001
                        executor.collecting = None
                        log(logging.WARNING, "shared_scan_failed", f"A shared scan of models "
                            f"{', '.join(m.name for m in members)} failed ({_message(exc)}); they run one by one "
                            "to find which.", models=[m.name for m in members])
                        alone += [mm.index for mm in scan.members]
                        continue
                    seconds = time.perf_counter() - started
                    for mm in scan.members:
                        if results[mm.index] is not None:
                            m = prepared[mm.index][0]
                            self._done(m, results[mm.index], seconds, notes[m.name],
                                       shared=[x.name for x in members])
                for i in sorted(set(alone)):
                    m = prepared[i][0]
                    started = time.perf_counter()
                    try:
                        result = estimate(executor, m.spec, notes[m.name])
                    except Exception as exc:  # noqa: BLE001
                        self._failed(m, exc, time.perf_counter() - started, notes[m.name])
                        continue
                    self._done(m, result, time.perf_counter() - started, notes[m.name])
            finally:
                self.scans[first.source] = self.scans.get(first.source, 0) + executor.scans

    # ---- one model's outcome
    def _notes(self, m: ModelEntry, notes) -> list[str]:
        texts = [msg for _, msg in notes.items] if notes is not None else []
        for text in texts:
            log(logging.WARNING, "model_note", f"Model {m.name}: {text}", model=m.name)
        return texts

    def _done(self, m: ModelEntry, result, seconds: float, notes, shared: list[str] | None = None) -> None:
        path = self.models_folder / f"{m.name}.json"
        write_atomic(path, result.to_json() + "\n")
        entry = self.manifest["models"][m.name]
        entry.update(status="done", file=f"{MODELS_FOLDER}/{m.name}.json", seconds=round(seconds, 3),
                     rows_used=result.n_obs, error=None, finished=now(), notes=self._notes(m, notes))
        if shared:
            entry["shared_scan_with"] = shared
        self._write_manifest()
        log(logging.INFO, "model_done", f"Model {m.name}: done in {seconds:.1f} s, {result.n_obs:,} rows used.",
            model=m.name, seconds=round(seconds, 3), rows_used=result.n_obs)

    def _failed(self, m: ModelEntry, exc: BaseException, seconds: float, notes=None) -> None:
        message = _message(exc)
        entry = self.manifest["models"][m.name]
        entry.update(status="failed", seconds=round(seconds, 3), error=message, finished=now(),
                     notes=self._notes(m, notes))
        self._write_manifest()
        log(logging.ERROR, "model_failed", f"Model {m.name}: failed: {message}", model=m.name, error=message)

    # ---- comparison tables
    def _comparison(self) -> None:
        try:
            from ..compare import comparison_files
        except ImportError:
            log(logging.INFO, "comparison_unavailable", "Comparison tables are not written: this build has no "
                "bigpanel.compare.")
            return
        pairs = []
        for name, entry in self.manifest["models"].items():
            if entry["status"] in ("done", "skipped") and entry.get("file"):
                try:
                    pairs.append((name, json.loads((self.folder / entry["file"]).read_text())))
                except (OSError, ValueError):
                    continue
        files = comparison_files(pairs)
        for filename, text in files.items():
            write_atomic(self.folder / filename, text)
        self.manifest["comparison"] = sorted(files)
        log(logging.INFO, "comparison_written", f"Comparison tables of {len(pairs)} models written.", models=len(pairs))


def _message(exc: BaseException) -> str:
    if isinstance(exc, BigpanelError):
        return " ".join(str(exc).split())
    return f"unexpected {type(exc).__name__}: {' '.join(str(exc).split())}"


def _parses(path: Path) -> bool:
    try:
        json.loads(path.read_text())
        return True
    except (OSError, ValueError):
        return False


# ---------------------------------------------------------------- the dry run


@dataclass
class RunPlan:
    """What a run would do, found without reading rows: per group of models sharing a
    session, the scans that serve them and the SQL of their first pass."""

    spec: str
    groups: list[dict] = field(default_factory=list)

    def to_dict(self) -> dict:
        return {"spec": self.spec, "groups": self.groups}

    def text(self) -> str:
        lines = [f"Plan for {self.spec} (dry run: schemas read, no rows):"]
        for i, g in enumerate(self.groups, 1):
            lines.append("")
            lines.append(f"Group {i}: source '{g['source']}' ({g['label']}, {g['files']} file(s))"
                         + (f", filter {g['where']}" if g["where"] else "") + f", unit {g['unit']}, period {g['period']}")
            for m in g["models"]:
                lines.append(f"  model {m['name']}: {m['estimator']}, variance {m['variance']}"
                             + (f" by {', '.join(m['cluster'])}" if m["cluster"] else "") + f"; {m['served_by']}")
            for s in g["scans"]:
                lines.append(f"  shared scan {s['scan']} ({s['rows']}, {s['chunks']} chunk(s)): models "
                             f"{', '.join(s['models'])}; pass 1 sums cross-products, pass 2 the variances' scores "
                             "at the estimates. Pass 1 SQL (per chunk; $unit_low/$unit_high bound the chunk):")
                lines += ["    " + line for line in s["sql"].splitlines()]
        return "\n".join(lines)


def plan_run(spec: RunSpec, chosen: list[str], overrides: dict) -> RunPlan:
    """The dry run: the models, the scans that will serve them and their SQL."""
    from ..engine import adapter, open_session
    from ..errors import BigpanelError as Problem
    from ..execute import Executor, Keys
    from ..fit import prepare
    from ..inference import Notes
    from ..plan import ScanPlan

    plan = RunPlan(spec.label)
    for group in _groups(spec, chosen):
        first = group[0]
        src = open_entry(spec.sources[first.source], first.where, overrides)
        with open_session(src) as session:
            executor = _SchemaOnly(adapter(session), Keys(first.spec.unit, first.spec.period, first.spec.period_step))
            prepared, described = [], []
            for m in group:
                s = m.spec
                row = {"name": m.name, "estimator": s.estimator, "variance": s.variance, "cluster": list(s.cluster),
                       "effects": list(s.effects)}
                try:
                    prepared.append((m, prepare(executor, s, Notes([]))))
                    row["served_by"] = "own passes"
                except _NeedsRows as need:
                    row["served_by"] = f"planned when the run reads {need}"
                except Problem as exc:
                    row["served_by"] = f"cannot be planned: {_message(exc)}"
                described.append(row)
            scan_plan = ScanPlan.build([p for _, p in prepared])
            scans = []
            for k, scan in enumerate(scan_plan.shared, 1):
                names = [prepared[mm.index][0].name for mm in scan.members]
                for row in described:
                    if row["name"] in names:
                        row["served_by"] = f"shared scan {k}"
                chunks = executor.chunks()
                scans.append({"scan": k, "rows": "first differences" if scan.differenced else "levels",
                              "chunks": len(chunks), "models": names,
                              "sql": executor.shared_moments_sql(scan, chunks[0])})
            for i in scan_plan.alone:
                name = prepared[i][0].name
                for row in described:
                    if row["name"] == name:
                        row["served_by"] = "own passes (" + ("period effects" if prepared[i][0].spec.period_effects
                                                             else "not shareable") + ")"
            plan.groups.append({"source": first.source, "label": src.label, "files": len(input_files(src)),
                                "where": combined_where(spec.sources[first.source], first.where),
                                "unit": first.spec.unit, "period": first.spec.period,
                                "models": described, "scans": scans})
    return plan


class _NeedsRows(Exception):
    def __str__(self) -> str:
        return self.args[0]


def _schema_only_executor():
    from ..execute import Executor

    class SchemaOnly(Executor):
        """An executor that answers from the schema only: the period grid is left for the
        run, duplicate keys unchecked, and anything that must read rows stops planning."""

        def period_grid(self):
            from ..panel import _period_kind

            return _period_kind(self.engine.columns()[self.keys.period]), None

        def duplicate_note(self):
            return None

        def duplicates(self, *args, **kwargs):
            return None

        def distinct(self, expression, limit):
            raise _NeedsRows(f"the levels of {expression}")

        def run_once(self, sql, params=None, scan=True):
            raise _NeedsRows("rows")

        def run_chunked(self, make_sql, params, chunks=None):
            raise _NeedsRows("rows")

    return SchemaOnly


def _SchemaOnly(engine, keys):
    return _schema_only_executor()(engine, keys)
