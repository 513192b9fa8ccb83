"""The chunked path on file layouts it must not trust blindly.

Chunked first differences are formed in the files' own row order (no sort). When files
are split by unit but rows inside a unit are not in period order, pairs are missed; the
fit must notice and redo the pass with sorting, and agree with the one-file result.
Reference: the one-file fit, itself checked against statsmodels in test_fit_lsdv.py.
"""

from __future__ import annotations

import warnings
from unittest import mock

import numpy as np
import pytest

import bigpanel
import bigpanel.moments
from panel_cases import unbalanced_panel, write_parquet

EPS = np.finfo(float).eps


def _fit(path, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return bigpanel.fit(path, "y", ["x1", "x2"], "unit", "period", estimator="first-difference", **kwargs)


def _write_parts(df, folder, n_files, shuffle_within_unit):
    folder.mkdir()
    ordered = df.sort_values(["unit", "period"], kind="stable")
    if shuffle_within_unit:  # same units per file, periods reversed inside each unit
        ordered = ordered.sort_values(["unit", "period"], ascending=[True, False], kind="stable")
    units = ordered["unit"].unique()
    for j, block in enumerate(np.array_split(units, n_files)):
        write_parquet(ordered[ordered["unit"].isin(block)], folder / f"part-{j}.parquet")
    return str(folder)


@pytest.mark.parametrize("shuffle_within_unit", [False, True], ids=["sorted", "periods reversed"])
def test_chunked_differences_match_one_file(tmp_path, shuffle_within_unit):
    df = unbalanced_panel(11, 40, 8, n_full=5)
    one = _fit(write_parquet(df, tmp_path / "one.parquet"))
    with mock.patch.object(bigpanel.moments, "CHUNK_ROWS", 1):
        many = _fit(_write_parts(df, tmp_path / "parts", 4, shuffle_within_unit))
    # Sums in another order differ only by rounding: 2^6 * cond * eps (common practice).
    tol = max(1e-12, 2**6 * one.condition_number * EPS)
    for a, b in zip(one.coefficients, many.coefficients):
        assert a.term == b.term
        np.testing.assert_allclose(b.estimate, a.estimate, rtol=tol)
        np.testing.assert_allclose(b.std_error, a.std_error, rtol=tol)
    assert (many.n_obs, many.rows_dropped) == (one.n_obs, one.rows_dropped)
    noted = any("not sorted" in w for w in many.warnings)
    assert noted == shuffle_within_unit


@pytest.mark.parametrize("effects", [None, "period"])
def test_first_difference_counts_units_with_a_difference(tmp_path, effects):
    # Reference: pandas, units with at least one pair of consecutive periods (the rows a
    # first-difference fit uses); period effects must not change the count.
    df = unbalanced_panel(5, 30, 7, n_full=3)
    ordered = df.sort_values(["unit", "period"])
    consecutive = ordered.groupby("unit")["period"].diff() == 1
    expected_units = ordered.loc[consecutive, "unit"].nunique()
    result = _fit(write_parquet(df, tmp_path / "panel.parquet"), effects=effects)
    assert result.n_obs == int(consecutive.sum())
    assert result.n_units == expected_units
