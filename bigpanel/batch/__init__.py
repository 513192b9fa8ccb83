"""Batch runs: many models from one spec file into a run folder (``bigpanel run``).

- :mod:`.specfile`: reading and checking the TOML spec (every problem at once);
- :mod:`.run`: :func:`run_spec`, the groups of models on shared scans, the manifest,
  resume, the dry-run plan;
- :mod:`.files`: atomic writes, the folder lock, input fingerprints;
- :mod:`.events`: log events (text or JSON lines) and the terminal progress line.
"""

from .run import RunPlan, RunReport, run_spec
from .specfile import SpecError, load_spec

__all__ = ["run_spec", "RunReport", "RunPlan", "SpecError", "load_spec"]
