"""Synthetic delivery-depot panels for bigpanel's demo, tests and benchmarks.

Depots observed by month, with a known true model (see `datagen.model`), written as
Parquet files plus a truth.json. Use `generate` to write a folder, `ensure` to reuse
one made with the same options, `load_truth` to read its truth.json. A second scenario,
couriers working for depots by year with courier, depot and year effects
(`datagen.couriers`), has `generate_couriers` and `ensure_couriers`.
"""

from .build import ensure, generate, load_truth
from .couriers import ensure_couriers, generate_couriers
from .errors import DatagenError

__all__ = ["DatagenError", "ensure", "ensure_couriers", "generate", "generate_couriers", "load_truth"]
