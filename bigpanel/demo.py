"""``python -m bigpanel.demo`` (``make demo``): the checkup on an invented panel of
delivery depots observed by month, about 2 million rows.

The panel is generated once with :func:`datagen.ensure` into ``.cache/demo-depots`` (or
the folder in ``BIGPANEL_DEMO_CACHE``) and reused on later runs.
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

N_DEPOTS = 42_000
N_MONTHS = 48
PANEL_OPTIONS = {"n_units": N_DEPOTS, "n_periods": N_MONTHS, "unbalanced": 0.15, "gaps": 0.05, "seed": 2024}


def demo_panel() -> Path:
    """The demo panel's folder, generated on first use."""
    import datagen

    folder = Path(os.environ.get("BIGPANEL_DEMO_CACHE", ".cache/demo-depots"))
    fresh = not folder.exists()
    if fresh:
        print(f"Generating the demo panel ({N_DEPOTS:,} depots x {N_MONTHS} months) in {folder} ...", file=sys.stderr)
    return Path(datagen.ensure(folder, **PANEL_OPTIONS))


def main() -> int:
    from .cli import _use_color
    from .panel import inspect_panel
    from .source import open_source

    folder = demo_panel()
    print("Invented scenario: delivery depots observed by month; parcels delivered, staff hours, vans, fuel price, "
          "rain, promotions.\n")
    started = time.perf_counter()
    report = inspect_panel(open_source(folder), "depot", "month")
    print(report.render(color=_use_color()))
    print(f"\n(checkup of {report.n_rows:,} rows in {time.perf_counter() - started:.1f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
