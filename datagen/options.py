"""The generator's options: one table of constraints and one validator."""

from dataclasses import asdict, dataclass
import math
import numbers

from .errors import DatagenError

ORDERS = ("unit", "period")
COMPRESSIONS = ("snappy", "zstd", "none")

# name: (CLI flag, test, what the value must be)
_RULES = {
    "n_units": ("--units", lambda v: _is_int(v) and v >= 1, "an integer >= 1"),
    "n_periods": ("--periods", lambda v: _is_int(v) and v >= 1, "an integer >= 1"),
    "seed": ("--seed", lambda v: _is_int(v) and v >= 0, "an integer >= 0"),
    "unbalanced": ("--unbalanced", lambda v: _is_share(v), "a share in [0, 1]"),
    "gaps": ("--gaps", lambda v: _is_share(v), "a share in [0, 1]"),
    "order": ("--order", lambda v: v in ORDERS, "one of 'unit', 'period'"),
    "rows_per_file": ("--rows-per-file", lambda v: _is_int(v) and v >= 1, "an integer >= 1"),
    "row_group_size": ("--row-group-size", lambda v: _is_int(v) and v >= 1, "an integer >= 1"),
    "compression": ("--compression", lambda v: v in COMPRESSIONS, "one of 'snappy', 'zstd', 'none'"),
}


def check_rules(options, rules):
    """Raise DatagenError for the first option that breaks its rule (name: (flag, test, expected))."""
    for name, (flag, test, expected) in rules.items():
        value = getattr(options, name)
        if not test(value):
            raise DatagenError(f"The {name} option ({flag}) must be {expected}; got {value!r}.")


def _is_int(value):
    return isinstance(value, numbers.Integral) and not isinstance(value, bool)


def _is_share(value):
    return (isinstance(value, numbers.Real) and not isinstance(value, bool)
            and math.isfinite(value) and 0 <= value <= 1)


@dataclass(frozen=True)
class Options:
    """Validated generator options (see `datagen.generate` for their meaning)."""

    n_units: int
    n_periods: int
    seed: int = 0
    unbalanced: float = 0.0
    gaps: float = 0.0
    order: str = "unit"
    rows_per_file: int = 2_000_000
    row_group_size: int = 100_000
    compression: str = "snappy"

    def __post_init__(self):
        check_rules(self, _RULES)
        if self.unbalanced > 0 and self.n_periods < 2:
            raise DatagenError("The unbalanced option (--unbalanced) needs n_periods >= 2, so that a "
                               f"depot can enter late or leave early; got n_periods={self.n_periods}.")
        if self.gaps > 0 and self.n_periods < 3:
            raise DatagenError("The gaps option (--gaps) needs n_periods >= 3, so that a month can be "
                               f"missing inside a depot's span; got n_periods={self.n_periods}.")
        for name in ("n_units", "n_periods", "seed", "rows_per_file", "row_group_size"):
            object.__setattr__(self, name, int(getattr(self, name)))
        for name in ("unbalanced", "gaps"):
            object.__setattr__(self, name, float(getattr(self, name)))

    def as_dict(self):
        """Return the options as a JSON-ready dict."""
        return asdict(self)
