"""Small seeded panels for the checkup tests, and the reference computation they are checked
against: pandas/numpy group-bys on the same rows (an independent path: no SQL, no DuckDB)."""

from __future__ import annotations

import datetime as dt
import math

import numpy as np
import pandas as pd
import pyarrow as pa

# The offset put under one column: with a spread of about 1 inside units, the one-pass
# formula sum(x^2) - n*mean^2 would lose about 2*log10(OFFSET) = 16 digits, all of them.
OFFSET = 1e8

CHECKED = ["parcels", "staff_hours", "region", "promo", "depot_kind"]


def make_panel(seed: int = 7, n_units: int = 30, n_months: int = 18, duplicates: bool = False,
               missing_keys: bool = False) -> pa.Table:
    """Depots by month (DATE, first of the month): unbalanced entry and exit, one-month gaps,
    one single-month depot, missing values, a column on a large offset, and columns that
    never change within a depot (region, depot_kind)."""
    rng = np.random.default_rng(seed)
    rows = []
    for depot in range(1, n_units + 1):
        start = int(rng.integers(0, 4)) if depot % 3 == 0 else 0
        stop = n_months - (int(rng.integers(0, 5)) if depot % 4 == 0 else 0)
        months = list(range(start, stop))
        if depot % 5 == 0 and len(months) > 3:
            months.remove(months[len(months) // 2])
        if depot == n_units:
            months = months[:1]
        region = depot % 4 + 1
        level = rng.normal(0, 3)
        for m in months:
            rows.append({
                "depot": depot,
                "month": dt.date(2021 + m // 12, m % 12 + 1, 1),
                "parcels": 400 + 50 * level + rng.normal(0, 20),
                "staff_hours": OFFSET + level + rng.normal(0, 1),
                "region": region,
                "promo": float(rng.random() < 0.3),
                "depot_kind": ["hub", "city", "rural"][depot % 3],
            })  # fmt: skip
    frame = pd.DataFrame(rows)
    frame.loc[frame.index % 11 == 4, "parcels"] = np.nan
    if duplicates:
        extra = frame.iloc[[5, 5, 40]].copy()
        extra["parcels"] = [1.0, 2.0, 3.0]
        frame = pd.concat([frame, extra], ignore_index=True)
    schema = pa.schema([
        ("depot", pa.int64()), ("month", pa.date32()), ("parcels", pa.float64()),
        ("staff_hours", pa.float64()), ("region", pa.int64()), ("promo", pa.float64()),
        ("depot_kind", pa.string()),
    ])  # fmt: skip
    table = pa.Table.from_pandas(frame, schema=schema, preserve_index=False)
    if missing_keys:
        depot = table.column("depot").to_pylist()
        month = table.column("month").to_pylist()
        depot[3] = None
        month[7] = None
        depot[9] = month[9] = None
        table = table.set_column(0, "depot", pa.array(depot, pa.int64())).set_column(1, "month", pa.array(month, pa.date32()))
    return table


def reference_checkup(frame: pd.DataFrame, unit: str, period: str, columns: list[str]) -> dict:
    """The checkup's figures computed with pandas group-bys and numpy two-pass sums."""
    n_rows = len(frame)
    keyed = frame.dropna(subset=[unit, period])
    months = pd.to_datetime(keyed[period])
    ordinal = (months.dt.year * 12 + months.dt.month - 1).astype(np.int64)
    distinct = np.unique(ordinal)
    step = int(np.gcd.reduce(np.diff(distinct))) if len(distinct) > 1 else 1
    slot = (ordinal - distinct[0]) // step
    per_unit = pd.DataFrame({"unit": keyed[unit], "slot": slot}).groupby("unit")["slot"].agg(["nunique", "size", "min", "max"])
    span = per_unit["max"] - per_unit["min"] + 1
    keys = pd.DataFrame({"unit": keyed[unit], "slot": slot}).value_counts()
    dup = keys[keys > 1].sort_index()
    out = {
        "n_rows": n_rows,
        "n_rows_missing_unit": int(frame[unit].isna().sum()),
        "n_rows_missing_period": int(frame[period].isna().sum()),
        "n_rows_used": len(keyed),
        "n_units": int(keyed[unit].nunique()),
        "n_periods": len(distinct),
        "first_period": pd.Timestamp(months.min()).date(),
        "last_period": pd.Timestamp(months.max()).date(),
        "n_grid_periods": int((distinct[-1] - distinct[0]) // step + 1),
        "n_balanced_units": int((per_unit["nunique"] == len(distinct)).sum()),
        "n_singleton_units": int((per_unit["nunique"] == 1).sum()),
        "periods_per_unit": tuple(int(v) for v in np.quantile(per_unit["nunique"], [0, 0.25, 0.5, 0.75, 1], method="lower")),
        "n_units_with_gaps": int((span > per_unit["nunique"]).sum()),
        "n_missing_unit_periods": int((span - per_unit["nunique"]).sum()),
        "n_duplicate_keys": len(dup),
        "n_duplicate_rows": int((per_unit["size"] - per_unit["nunique"]).sum()),
        "duplicate_units": [int(u) for u, _ in dup.index[:5]],
        "columns": {},
    }
    for name in columns:
        x = keyed[name]
        col = {"n_missing": int(x.isna().sum())}
        if pd.api.types.is_numeric_dtype(x):
            x = x.astype(float)
            ok = x.notna()
            values, units = x[ok].to_numpy(), keyed.loc[ok, unit]
            unit_mean = pd.Series(values, index=units.index).groupby(units).transform("mean").to_numpy()
            mean = values.mean()
            total = float(np.sum((values - mean) ** 2))
            within = float(np.sum((values - unit_mean) ** 2))
            varying = pd.Series(values, index=units.index).groupby(units).agg(lambda s: s.max() > s.min())
            col.update(mean=mean, std=math.sqrt(total / (len(values) - 1)), min=values.min(), max=values.max(),
                       within_share=within / total, units_varying=int(varying.sum()))
        out["columns"][name] = col
    return out
