"""Files of a run folder: written whole or not at all, a lock, input fingerprints.

Every output is written under a temporary name in its own folder (``.NAME.tmp-PID-RANDOM``),
flushed to disk and renamed over the old one (``os.replace``, atomic on one file system),
so a run killed at any moment leaves each file complete or absent, and an earlier output
stays intact until replaced.

The lock is a file ``.bigpanel-run.lock`` in the folder holding the owner's pid, host,
process start time and the run's start time. It is made with its content in one step (a
hard link of a complete temporary file, which fails when the lock exists), so it is never
seen half-written. A lock whose pid no longer runs on this host (or runs as another
process: its start time differs) is stale and is taken over.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import secrets
import socket
from pathlib import Path

from ..errors import InputError, echo

LOCK_NAME = ".bigpanel-run.lock"
TEMP_MARK = ".tmp-"


def temp_name(path: Path) -> Path:
    return path.with_name(f".{path.name}{TEMP_MARK}{os.getpid()}-{secrets.token_hex(4)}")


def write_atomic(path, text: str) -> None:
    """Write ``text`` to ``path`` through a temporary name and a rename."""
    path = Path(path)
    tmp = temp_name(path)
    try:
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    _sync_folder(path.parent)


def _sync_folder(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def remove_temporaries(folder: Path, pid: int | None = None) -> int:
    """Remove temporary files left in ``folder`` (by ``pid`` only, or by any run: call
    that while holding the lock). Returns how many were removed."""
    n = 0
    if not folder.is_dir():
        return 0
    mark = TEMP_MARK + (f"{pid}-" if pid is not None else "")
    for entry in folder.iterdir():
        if entry.name.startswith(".") and mark in entry.name and entry.is_file():
            entry.unlink(missing_ok=True)
            n += 1
    return n


# ---------------------------------------------------------------- the lock


def process_start(pid: int) -> str | None:
    """The start time of process ``pid`` in clock ticks since boot (Linux), or None."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as fh:
            stat = fh.read().decode("ascii", "replace")
        return stat.rsplit(")", 1)[1].split()[19]
    except (OSError, IndexError):
        return None


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class RunLock:
    """The lock of one run folder. ``acquire`` refuses a live owner (exit 2) and takes over
    a stale lock; ``took_over`` holds the stale owner's record then."""

    def __init__(self, folder: Path):
        self.folder = Path(folder)
        self.path = self.folder / LOCK_NAME
        self.record = {"pid": os.getpid(), "host": socket.gethostname(), "process_start": process_start(os.getpid()),
                       "started": now()}
        self.took_over: dict | None = None
        self.held = False

    def acquire(self) -> None:
        for _ in range(5):
            if self._create():
                self.held = True
                return
            owner = self._read()
            if owner is None:  # vanished between our two steps, or unreadable: look again
                if self.path.exists() and self._unreadable_for_long():
                    self._take_over(None)
                continue
            if not self._stale(owner):
                raise InputError(
                    f"Folder '{echo(self.folder)}' is in use by another run (pid {owner.get('pid')} on "
                    f"{echo(owner.get('host'), 80)}, started {owner.get('started')}; lock file {LOCK_NAME}). "
                    "Wait for it to finish, or give another --out folder.")
            self._take_over(owner)
        raise InputError(f"Folder '{echo(self.folder)}': the lock file {LOCK_NAME} kept changing while taking it. "
                         "Another run is starting there; try again or give another --out folder.")

    def _create(self) -> bool:
        tmp = temp_name(self.path)
        tmp.write_text(json.dumps(self.record) + "\n")
        try:
            os.link(tmp, self.path)
            return True
        except FileExistsError:
            return False
        finally:
            tmp.unlink(missing_ok=True)

    def _read(self) -> dict | None:
        try:
            owner = json.loads(self.path.read_text())
            return owner if isinstance(owner, dict) else None
        except (OSError, ValueError):
            return None

    def _unreadable_for_long(self) -> bool:
        try:
            age = dt.datetime.now().timestamp() - self.path.stat().st_mtime
        except OSError:
            return False
        return age > 60  # a lock is written whole; one unreadable for a minute is debris

    def _stale(self, owner: dict) -> bool:
        if owner.get("host") != socket.gethostname():
            return False  # another machine's process cannot be checked from here
        pid = owner.get("pid")
        if not isinstance(pid, int) or not _alive(pid):
            return True
        started = owner.get("process_start")
        return started is not None and process_start(pid) not in (None, started)

    def _take_over(self, owner: dict | None) -> None:
        """Move the stale lock aside (only one contender's rename succeeds) and check that
        what was moved is the lock judged stale, not a newer one."""
        aside = temp_name(self.path)
        try:
            os.rename(self.path, aside)
        except FileNotFoundError:
            return
        try:
            moved = json.loads(aside.read_text())
        except (OSError, ValueError):
            moved = None
        if owner is not None and moved != owner:  # someone else took it over meanwhile: put theirs back
            try:
                os.link(aside, self.path)
            except FileExistsError:
                pass
        else:
            self.took_over = owner or {}
        aside.unlink(missing_ok=True)

    def release(self) -> None:
        if not self.held:
            return
        self.held = False
        if self._read() == self.record:
            self.path.unlink(missing_ok=True)

    def __enter__(self) -> "RunLock":
        self.acquire()
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()


def now() -> str:
    """The current UTC time in ISO 8601, to the millisecond."""
    return dt.datetime.now(dt.timezone.utc).isoformat(timespec="milliseconds").replace("+00:00", "Z")


# ---------------------------------------------------------------- input fingerprints


def input_files(src) -> list[str]:
    """The files a source reads: its Parquet or CSV files, its DuckDB file, or the files
    its query names (globs expanded); none for a PostgreSQL source (a table has no file)."""
    if src.kind == "postgres" or src.remote:
        return []  # a table, or a URL only the engine reads (Spark): no local file to describe
    if src.files:
        return [os.path.abspath(f) for f in src.files]
    if src.database:
        return [os.path.abspath(src.database)]
    if src.query_sql:
        import glob

        from ..lockdown import query_reads
        from ..source import parse_tree

        out = []
        for read in query_reads(parse_tree(src.query_sql)):
            out += sorted(glob.glob(read, recursive=True)) if any(c in read for c in "*?[") else [read]
        return [os.path.abspath(f) for f in out if os.path.isfile(f)]
    return []


def fingerprint(path: str, content: bool) -> dict:
    """Path, size and modification time of a file, and its SHA-256 when ``content``."""
    st = os.stat(path)
    out = {"path": path, "size": st.st_size,
           "modified": dt.datetime.fromtimestamp(st.st_mtime, dt.timezone.utc).isoformat(timespec="microseconds")
           .replace("+00:00", "Z"), "modified_ns": st.st_mtime_ns}
    if content:
        digest = hashlib.sha256()
        with open(path, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                digest.update(block)
        out["sha256"] = digest.hexdigest()
    return out
