"""Errors and warnings raised by bigpanel.

Every message is one sentence naming the file, column or option at fault and what to
do about it. The CLI maps :class:`InputError` to exit code 2 and any other
:class:`BigpanelError` to exit code 1.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable


class BigpanelError(Exception):
    """Base class for every error bigpanel raises on purpose."""


class InputError(BigpanelError, ValueError):
    """The user's input (source, column, option, expression) cannot be used."""


class EstimationError(BigpanelError):
    """The model cannot be estimated on this data (for example, no rows survive)."""


class BigpanelWarning(UserWarning):
    """Base class for warnings about dropped rows, dropped terms and weak inference."""


class DroppedRowsWarning(BigpanelWarning):
    """Rows were left out of the estimation (missing values, lost differences, ...)."""


class DroppedTermsWarning(BigpanelWarning):
    """Terms were left out (collinear, or without variation within units)."""


class FewClustersWarning(BigpanelWarning):
    """Too few clusters for cluster-robust inference to be reliable."""


def unknown_column(column: str, where: str, available: Iterable[str]) -> InputError:
    """Build the error for a column that the source does not have.

    Parameters
    ----------
    column : str
        The name the user gave.
    where : str
        Label of the source (file name, table name, ``query``).
    available : iterable of str
        The columns the source does have.
    """
    names = list(available)
    close = difflib.get_close_matches(column, names, n=3, cutoff=0.5) if len(column) <= ECHO_LIMIT else []
    hint = f" Did you mean {', '.join(repr(echo(c)) for c in close)}?" if close else ""
    shown = ", ".join(names[:20]) + (", ..." if len(names) > 20 else "")
    return InputError(f"Column '{echo(column)}' not found in {where}.{hint} Available: {echo(shown, 2 * ECHO_LIMIT)}.")


ECHO_LIMIT = 200
"""Longest piece of the user's own text (a term, filter, query, option value) repeated in
a message; longer text is cut in the middle, so both its start and its end stay visible."""

_ESCAPES = {"\\": "\\\\", "\n": "\\n", "\r": "\\r", "\t": "\\t"}


def echo(text: object, limit: int = ECHO_LIMIT) -> str:
    """The user's text as a message may repeat it: on one line, at most about ``limit``
    characters. Every message that repeats user text goes through here (or :func:`shown`).

    Backslashes, newlines, tabs and other control characters are written as escapes
    (``\\n``, ``\\x0f``), so a message is one line and a smuggled newline stays visible;
    text longer than ``limit`` keeps its first and last characters around
    `` ... (N characters) ... ``.
    """
    raw = str(text)
    flat = raw if raw.isprintable() and "\\" not in raw else "".join(
        _ESCAPES.get(ch) or (ch if ch.isprintable() else f"\\x{ord(ch):02x}" if ord(ch) < 256 else f"\\u{ord(ch):04x}")
        for ch in raw)
    if len(flat) <= limit:
        return flat
    marker = f" ... ({len(raw):,} characters) ... "
    keep = max(limit - len(marker), 20)
    head = keep - keep // 3
    return flat[:head] + marker + flat[len(flat) - (keep - head):]


def shown(text: object, limit: int = ECHO_LIMIT) -> str:
    """:func:`echo` in single quotes: the user's text quoted for a message."""
    return f"'{echo(text, limit)}'"
