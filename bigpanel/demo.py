"""``python -m bigpanel.demo`` (``make demo``): the checkup and the main job on an
invented panel of delivery depots observed by month, about 2 million rows: pooled least
squares, within and first differences side by side against the generator's true
coefficients.

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
PANEL_OPTIONS = {"n_units": N_DEPOTS, "n_periods": N_MONTHS, "unbalanced": 0.15, "gaps": 0.05, "seed": 1}


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
    print(f"\n(checkup of {report.n_rows:,} rows in {time.perf_counter() - started:.1f} s)\n")
    print(compare_estimators(folder))
    return 0


def compare_estimators(folder: Path) -> str:
    """Pooled, within and first differences on the demo panel, beside the true values."""
    import warnings

    import datagen

    from .fit import fit

    truth = datagen.load_truth(folder)["coefficients"]
    terms = list(truth)
    regressors = ", ".join(terms)
    # Regions share monthly shocks (and fuel prices), so errors are correlated within a
    # region across depots: clustering by region, not by depot, gives honest intervals.
    runs = [
        ("pooled", dict(estimator="pooled", effects="month")),
        ("within", dict(estimator="within", effects="depot,month")),
        ("first diff.", dict(estimator="first-difference", effects="month")),
    ]
    results, seconds = {}, {}
    for name, options in runs:
        started = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            results[name] = fit(folder, "parcels", regressors, unit="depot", period="month", variance="cluster",
                                cluster="region", **options)
        seconds[name] = time.perf_counter() - started
    n_regions = results["within"].variance.n_clusters[0]
    lines = [f"Estimates of the parcels equation (month effects in all three; standard errors clustered by "
             f"region, {n_regions} regions):", ""]
    head = f"  {'term':<12} {'true':>7}" + "".join(f"  {name:>24}" for name, _ in runs)
    lines += [head, "  " + "-" * (len(head) - 2)]
    for term in terms:
        cells = []
        for name, _ in runs:
            c = results[name].coef(term)
            covered = c.ci_lower <= truth[term] <= c.ci_upper
            cells.append(f"{c.estimate:>10.4f} ({c.std_error:.4f}) {'covers' if covered else 'misses'}")
        lines.append(f"  {term:<12} {truth[term]:>7.2f}" + "".join(f"  {cell:>24}" for cell in cells))
    lines.append("")
    lines.append("  " + "; ".join(f"{name}: {results[name].n_obs:,} rows in {seconds[name]:.1f} s" for name, _ in runs))
    bias = results["pooled"].coef("staff_hours").estimate - truth["staff_hours"]
    lines.append(f"  Pooled staff_hours is off by {bias:+.3f}: busier depots have larger unobserved effects, which")
    lines.append("  within and first differences remove. ('covers': the 95% interval holds the true value;")
    lines.append("  by design it misses about one time in twenty.)")
    lines.append("  These are causal only under strict exogeneity, a depot effect constant over time, enough")
    lines.append("  variation within depots and independent clusters.")
    return "\n".join(lines)


if __name__ == "__main__":
    sys.exit(main())
