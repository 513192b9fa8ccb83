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
    close = difflib.get_close_matches(column, names, n=3, cutoff=0.5)
    hint = f" Did you mean {', '.join(repr(c) for c in close)}?" if close else ""
    shown = ", ".join(names[:20]) + (", ..." if len(names) > 20 else "")
    return InputError(f"Column '{column}' not found in {where}.{hint} Available: {shown}.")


ECHO_LIMIT = 200  # most characters of the user's own text repeated in a message


def shown(text: object, limit: int = ECHO_LIMIT) -> str:
    """The user's text quoted for a message: on one line, and cut after ``limit`` characters."""
    raw = str(text)
    flat = raw.replace("\\", "\\\\").replace("\n", "\\n").replace("\r", "\\r").replace("\t", "\\t")
    if len(flat) > limit:
        return f"'{flat[:limit]}...' ({len(raw):,} characters)"
    return f"'{flat}'"
