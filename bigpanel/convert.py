"""The one conversion of results to JSON-ready values, shared by the checkup and the fit.

Dates and timestamps become ISO 8601 text; non-finite floats become None (JSON has no
NaN); tuples become lists; numpy scalars become Python numbers; anything else its text.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
from typing import Any


def json_ready(value: Any) -> Any:
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return json_ready(dataclasses.asdict(value))
    if isinstance(value, dict):
        return {str(k): json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_ready(v) for v in value]
    if isinstance(value, (dt.date, dt.datetime)):
        return value.isoformat()
    if hasattr(value, "item") and not isinstance(value, (str, bytes)):  # numpy scalars
        value = value.item()
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, (str, int, bool)) or value is None:
        return value
    return str(value)
