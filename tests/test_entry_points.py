"""Every public entry point (fit, fit_many, inspect_panel) takes every source kind fit takes:
a path, a Source, a pyarrow Table, a polars DataFrame or LazyFrame, a pandas frame with
the keys as columns or in a (Multi)Index.

Failed before (issue 9, item 6): a polars LazyFrame raised AttributeError 'to_arrow';
inspect_panel on a path or a frame raised AttributeError 'connect'; a pandas frame with
its keys in a MultiIndex lost them (column not found).

References: statsmodels OLS with unit dummies (within estimates); pandas group-bys (rows,
units, periods of the checkup).
"""

from __future__ import annotations

import gc
import os

import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pytest
import statsmodels.api as sm

import bigpanel
from bigpanel.source import Engine, open_source

KINDS = ("path", "source", "arrow", "polars", "lazy", "pandas", "pandas-multiindex", "pandas-index")


@pytest.fixture(scope="module")
def panel(tmp_path_factory):
    rng = np.random.default_rng(6)
    n_units, n_periods = 25, 7
    df = pd.DataFrame({"unit": np.repeat(np.arange(n_units), n_periods), "period": np.tile(np.arange(1, n_periods + 1), n_units)})
    df["x1"] = rng.normal(size=len(df))
    df["x2"] = rng.normal(size=len(df))
    df["y"] = 0.4 * df["x1"] + 0.2 * df["x2"] + 0.1 * df["unit"] + rng.normal(size=len(df))
    df = df.sample(frac=0.9, random_state=3).sort_values(["unit", "period"]).reset_index(drop=True)
    path = tmp_path_factory.mktemp("entry") / "panel.parquet"
    df.to_parquet(path, index=False)
    return df, str(path)


def _source(kind: str, df: pd.DataFrame, path: str):
    return {
        "path": lambda: path,
        "source": lambda: open_source(path),
        "arrow": lambda: pa.Table.from_pandas(df, preserve_index=False),
        "polars": lambda: pl.from_pandas(df),
        "lazy": lambda: pl.scan_parquet(path).with_columns(pl.col("y") * 1.0),
        "pandas": lambda: df,
        "pandas-multiindex": lambda: df.set_index(["unit", "period"]),
        "pandas-index": lambda: df.set_index("unit"),
    }[kind]()


def _lsdv(df):
    x = pd.concat([df[["x1", "x2"]], pd.get_dummies(df["unit"], dtype=float)], axis=1).to_numpy()
    return sm.OLS(df["y"].to_numpy(), x).fit()


@pytest.mark.parametrize("kind", KINDS)
def test_fit_takes_every_source_kind(panel, kind):
    # Source: statsmodels OLS with unit dummies (within estimates and homoskedastic errors).
    df, path = panel
    ref = _lsdv(df)
    res = bigpanel.fit(_source(kind, df, path), "y", ["x1", "x2"], "unit", "period", variance="homoskedastic")
    assert res.n_obs == len(df)
    np.testing.assert_allclose([res.coef("x1").estimate, res.coef("x2").estimate], ref.params[:2], rtol=1e-9)
    np.testing.assert_allclose([res.coef("x1").std_error, res.coef("x2").std_error], ref.bse[:2], rtol=1e-9)


@pytest.mark.parametrize("kind", KINDS)
def test_fit_many_takes_every_source_kind(panel, kind):
    # Source: statsmodels OLS with unit dummies; the second model on x1 only.
    df, path = panel
    models = [dict(outcome="y", regressors=["x1", "x2"], variance="homoskedastic"),
              dict(outcome="y", regressors=["x1"], variance="homoskedastic")]
    got = bigpanel.fit_many(_source(kind, df, path), models, unit="unit", period="period")
    np.testing.assert_allclose(got[0].coef("x2").estimate, _lsdv(df).params[1], rtol=1e-9)
    one = sm.OLS(df["y"].to_numpy(), pd.concat([df[["x1"]], pd.get_dummies(df["unit"], dtype=float)], axis=1).to_numpy()).fit()
    np.testing.assert_allclose(got[1].coef("x1").estimate, one.params[0], rtol=1e-9)


@pytest.mark.parametrize("kind", KINDS)
def test_inspect_panel_takes_every_source_kind(panel, kind):
    # Source: pandas counts of rows, distinct units and periods.
    df, path = panel
    report = bigpanel.inspect_panel(_source(kind, df, path), unit="unit", period="period")
    assert (report.n_rows, report.n_units, report.n_periods) == (len(df), df["unit"].nunique(), df["period"].nunique())
    x1 = next(c for c in report.columns if c.name == "x1")
    assert x1.mean == pytest.approx(df["x1"].mean(), rel=1e-12)


def test_inspect_panel_takes_source_options(panel):
    # Source: pandas counts after the same filter.
    df, path = panel
    report = bigpanel.inspect_panel(path, unit="unit", period="period", where="x1 > 0")
    assert report.n_rows == int((df["x1"] > 0).sum())


def test_lazy_frame_is_streamed_to_a_temporary_file_removed_after(panel, tmp_path):
    # Source: common practice (temporary files do not outlive their use). A LazyFrame is
    # sunk to Parquet by polars' streaming engine, not collected whole.
    df, path = panel
    folder = tmp_path / "spill"
    folder.mkdir()
    lazy = pl.scan_parquet(path).filter(pl.col("x1") > -1)
    res = bigpanel.fit(lazy, "y", ["x1", "x2"], "unit", "period", engine=Engine(temp_directory=str(folder)))
    assert res.n_obs + res.singletons_dropped == int((df["x1"] > -1).sum())  # pandas count
    assert res.source == "polars LazyFrame"
    del res
    gc.collect()
    assert [n for n in os.listdir(folder) if n.startswith("bigpanel-lazy-")] == []


def test_index_level_clashing_with_a_column_is_refused(panel):
    # Source: common practice (one name, one column).
    df, _ = panel
    clash = df.set_index("unit", drop=False)
    with pytest.raises(bigpanel.InputError, match="both as an index level and as a column"):
        bigpanel.fit(clash, "y", ["x1"], "unit", "period")
