"""Synthetic delivery-depot panels for bigpanel's demo, tests and benchmarks.

Depots observed by month, with a known true model (see `datagen.model`), written as
Parquet files plus a truth.json. Use `generate` to write a folder, `ensure` to reuse
one made with the same options, `load_truth` to read its truth.json.
"""

from .build import ensure, generate, load_truth
from .errors import DatagenError

__all__ = ["DatagenError", "ensure", "generate", "load_truth"]
