"""Shared test settings.

OpenBLAS starts one thread per core by default; on the shared, loaded 2-core
machine those threads stall the small dense solves the tests make, so the
reference computations run on one thread.
"""

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
