"""What a run says while it runs: one log record per event, and a progress line.

The run logs through Python's ``logging`` (logger ``bigpanel.batch``), each record with an
``event`` name and its fields, so a program calling :func:`bigpanel.run_spec` routes them
as it likes. The command line installs :func:`log_handler`: one line per event on stderr,
as text (time, level, event, message) or, with ``--log-json``, as JSON lines for log
collectors. The progress line (scan, chunks done, rows per second, time left) is drawn only
when stderr is a terminal, and is erased before any log line is written, so it never
reaches a log file.
"""

from __future__ import annotations

import json
import logging
import sys
import threading
import time
from typing import TextIO

LOGGER = logging.getLogger("bigpanel.batch")
_RESERVED = set(vars(logging.makeLogRecord({}))) | {"message", "asctime"}


def log(level: int, event: str, message: str, **fields) -> None:
    """Log one event: ``message`` in words, ``fields`` as data (JSON lines keep them)."""
    LOGGER.log(level, message, extra={"event": event, "fields": fields})


def _stamp(created: float) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(created)) + f".{int(created % 1 * 1000):03d}Z"


class TextFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        text = " ".join(record.getMessage().split())  # one line per event, whatever the message holds
        return f"{_stamp(record.created)} {record.levelname.lower():<7} {getattr(record, 'event', '-')}: {text}"


class JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        out = {"time": _stamp(record.created), "level": record.levelname.lower(),
               "event": getattr(record, "event", None), "message": record.getMessage()}
        out.update(getattr(record, "fields", {}) or {})
        return json.dumps(out, ensure_ascii=False, default=str)


class _Handler(logging.StreamHandler):
    def emit(self, record: logging.LogRecord) -> None:
        PROGRESS.clear()
        super().emit(record)


def log_handler(json_lines: bool = False, stream: TextIO | None = None, level: int = logging.INFO) -> logging.Handler:
    """Route the run's events to ``stream`` (stderr): text lines, or JSON lines."""
    handler = _Handler(stream or sys.stderr)
    handler.setFormatter(JsonFormatter() if json_lines else TextFormatter())
    LOGGER.addHandler(handler)
    LOGGER.setLevel(level)
    LOGGER.propagate = False
    return handler


def remove_handler(handler: logging.Handler) -> None:
    LOGGER.removeHandler(handler)
    LOGGER.propagate = True


class Progress:
    """A one-line progress display on a terminal (off unless :meth:`enable` was called
    with a terminal stream). Updated from worker threads; drawn at most 10 times a second."""

    def __init__(self) -> None:
        self.stream: TextIO | None = None
        self._lock = threading.Lock()
        self._shown = 0
        self._last = 0.0
        self.title = ""
        self.total_rows: int | None = None
        self.chunks = 0
        self.started_chunks = 0
        self.started = 0.0

    def enable(self, stream: TextIO) -> bool:
        self.stream = stream if hasattr(stream, "isatty") and stream.isatty() else None
        return self.stream is not None

    def disable(self) -> None:
        self.clear()
        self.stream = None

    def begin(self, title: str, chunks: int, total_rows: int | None) -> None:
        if self.stream is None:
            return
        with self._lock:
            self.title, self.chunks, self.total_rows = title, max(chunks, 1), total_rows
            self.started_chunks, self.started = 0, time.monotonic()
        self._draw(force=True)

    def chunk_started(self) -> None:
        if self.stream is None:
            return
        with self._lock:
            self.started_chunks += 1
        self._draw()

    def _draw(self, force: bool = False) -> None:
        stream = self.stream
        if stream is None:
            return
        with self._lock:
            t = time.monotonic()
            if not force and t - self._last < 0.1:
                return
            self._last = t
            elapsed = t - self.started
            # a chunk is counted as done when the next one starts (one per worker in flight)
            done = max(self.started_chunks - 1, 0) / self.chunks
            parts = [self.title, f"chunk {min(self.started_chunks, self.chunks)}/{self.chunks}", f"{elapsed:.0f} s"]
            if done > 0 and elapsed > 0:
                if self.total_rows:
                    parts.append(f"{self.total_rows * done / elapsed / 1e6:.1f}M rows/s")
                parts.append(f"about {elapsed * (1 - done) / done:.0f} s left")
            line = "  ".join(parts)[:120]
            stream.write("\r" + line.ljust(self._shown))
            stream.flush()
            self._shown = len(line)

    def clear(self) -> None:
        stream = self.stream
        if stream is None or not self._shown:
            return
        with self._lock:
            stream.write("\r" + " " * self._shown + "\r")
            stream.flush()
            self._shown = 0


PROGRESS = Progress()
