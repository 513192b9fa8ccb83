"""Stopping a run cleanly: stop signals, live DuckDB connections, private spill folders.

The console entry (:func:`main`, also behind ``python -m bigpanel``) installs handlers
for SIGINT and SIGTERM before anything heavy is imported, so a signal at any moment,
start-up included, ends the run with exit code 130 (SIGINT) or 143 (SIGTERM) and the
single line "Interrupted." on stderr.

A handler runs only in the main thread, and only between Python bytecodes: while DuckDB
runs a query it checks for signals but lets the query finish first. So the handler also
calls ``interrupt()`` on every live connection and cursor (the registry below, filled by
:mod:`bigpanel.source`), which stops running queries within milliseconds; a connection
opened after the signal is refused. Only the first signal raises :class:`Interrupted`,
and only until the command returns; later ones are ignored so that clean-up is not cut
short.

Private folders (DuckDB's spill files) are registered here too; the session that made one
removes it when it closes, and the console entry removes any left over, after a signal as
well. This module imports nothing beyond the standard library's light modules.
"""

from __future__ import annotations

import os
import signal
import sys
import threading
from typing import Any

STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM)

_lock = threading.RLock()  # re-entrant: the handler may run while the main thread holds it
_connections: dict[int, Any] = {}
_folders: set[str] = set()
_received: int | None = None
_closing = False  # the command has returned: a signal now is recorded, not raised


class Interrupted(BaseException):
    """A stop signal arrived. A BaseException, like KeyboardInterrupt, so that no
    ``except Exception`` on the way up turns it into an error message."""

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum

    @property
    def exit_code(self) -> int:
        return 128 + self.signum


def received() -> int | None:
    """The first stop signal received (None when there was none)."""
    return _received


def raise_if_received() -> None:
    """Raise :class:`Interrupted` when a stop signal arrived (an error seen after it,
    such as DuckDB's "Query interrupted", is a consequence of the signal)."""
    if _received is not None:
        raise Interrupted(_received)


# ---------------------------------------------------------------- live connections


def register(con: Any) -> None:
    """Track a connection or cursor so a stop signal can interrupt its query."""
    with _lock:
        if _received is not None:
            raise Interrupted(_received)
        _connections[id(con)] = con


def unregister(con: Any) -> None:
    with _lock:
        _connections.pop(id(con), None)


def interrupt_all() -> None:
    """Interrupt the running query of every live connection (they stay usable)."""
    with _lock:
        live = list(_connections.values())
    for con in live:
        try:
            con.interrupt()
        except Exception:  # noqa: BLE001 - a closed connection has nothing to interrupt
            pass


def close_all() -> None:
    """Close every connection still registered (the console entry's last step)."""
    with _lock:
        live = list(_connections.values())
        _connections.clear()
    for con in live:
        try:
            con.close()
        except Exception:  # noqa: BLE001 - closing what is already closed or broken
            pass


# ---------------------------------------------------------------- private folders


def private_folder(parent: str | None) -> str:
    """Make a private folder (mode 0700) for spill files under ``parent``, or under the
    system's temporary folder; it is removed by :func:`remove_folder` or at exit."""
    import tempfile

    base = parent or tempfile.gettempdir()
    os.makedirs(base, exist_ok=True)
    path = tempfile.mkdtemp(prefix="bigpanel-", dir=base)
    with _lock:
        if not _folders:
            import atexit

            atexit.register(remove_all_folders)
        _folders.add(path)
    return path


def remove_folder(path: str) -> None:
    import shutil

    shutil.rmtree(path, ignore_errors=True)
    with _lock:
        _folders.discard(path)


def remove_all_folders() -> None:
    with _lock:
        left = list(_folders)
    for path in left:
        remove_folder(path)


# ---------------------------------------------------------------- the console entry


def _on_signal(signum: int, frame: object) -> None:
    global _received
    if _received is not None:
        return
    _received = signum
    interrupt_all()
    if not _closing:
        raise Interrupted(signum)


def _unraisable(hook):
    """Python drops an exception raised where it cannot propagate (a weakref callback of the
    import machinery, a finaliser) and prints it: the stop is already recorded in
    ``_received`` and acted on at the next check, so our own :class:`Interrupted` is not printed."""

    def quiet(info):
        if not isinstance(info.exc_value, Interrupted):
            hook(info)

    return quiet


def install() -> None:
    """Install the stop-signal handlers (main thread only)."""
    for sig in STOP_SIGNALS:
        signal.signal(sig, _on_signal)
    sys.unraisablehook = _unraisable(sys.unraisablehook)


def run(argv: list[str] | None = None) -> int:
    """Run the command line with stop signals handled; return the exit code."""
    global _closing
    install()
    code = 1
    try:
        try:
            from .cli import main as cli_main  # the heavy imports happen here, handlers in place

            if _received is not None:  # a stop that landed where Python could not raise it
                raise Interrupted(_received)
            code = cli_main(argv)
        finally:
            _closing = True  # from here on clean-up runs to its end
    except Interrupted:
        pass
    close_all()
    remove_all_folders()
    if _received is not None:
        print("Interrupted.", file=sys.stderr, flush=True)
        return 128 + _received
    return code


def main() -> None:
    """The ``bigpanel`` console script."""
    code = run()
    sys.stdout.flush()
    if _received is not None:
        os._exit(code)  # nothing left to clean; skip waiting on threads at interpreter exit
    sys.exit(code)
