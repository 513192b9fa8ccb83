"""The interface's own names and look: the --variance option and its values, the text
report's layout (header block, low/high columns, statistics in words, no wrapped rows)
and indicator labels written column=level.

Each test below failed before the change it covers (issue 9, item 9): the option was
--se with the value iid, the table had a bracketed interval column and an F(df1, df2)
header, and indicators were labelled column[level].
"""

from __future__ import annotations

import json
import re

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import bigpanel
from bigpanel.cli import main
from bigpanel.errors import InputError
from bigpanel.results import TERM_WIDTH, WIDTH


@pytest.fixture(scope="module")
def panel(tmp_path_factory):
    rng = np.random.default_rng(91)
    n_units, n_periods = 40, 6
    df = pd.DataFrame({"unit": np.repeat(np.arange(n_units), n_periods), "period": np.tile(np.arange(1, n_periods + 1), n_units)})
    df["x1"] = rng.normal(size=len(df))
    df["x2"] = rng.normal(size=len(df)) + 0.3 * df["x1"]
    df["kind"] = rng.choice(["hub", "kiosk", "van"], size=len(df))
    df["y"] = 1.0 + 0.5 * df["x1"] - 0.25 * df["x2"] + 0.2 * (df["kind"] == "van") + rng.normal(size=len(df))
    path = tmp_path_factory.mktemp("look") / "panel.parquet"
    df.to_parquet(path)
    return df, str(path)


def _ols(df):
    x = sm.add_constant(df[["x1", "x2"]].to_numpy())
    return sm.OLS(df["y"].to_numpy(), x).fit()


def test_variance_option_and_values(panel, capsys):
    # Failed before: '--variance' was not an option and 'homoskedastic' not a value.
    # Source: statsmodels OLS with a constant, nonrobust (homoskedastic) standard errors.
    df, path = panel
    code = main(["fit", path, "--outcome", "y", "--regressors", "x1,x2", "--unit", "unit", "--period", "period",
                 "--estimator", "pooled", "--variance", "homoskedastic", "--json"])
    out = capsys.readouterr().out
    assert code == 0
    doc = json.loads(out)
    assert doc["variance"]["type"] == "homoskedastic"
    ref = _ols(df)
    got = [c["std_error"] for c in doc["coefficients"]]
    np.testing.assert_allclose(got, [ref.bse[1], ref.bse[2], ref.bse[0]], rtol=1e-9)  # statsmodels OLS bse
    for kind in ("hc1", "cluster"):
        res = bigpanel.fit(path, "y", ["x1", "x2"], "unit", "period", estimator="pooled", variance=kind)
        assert res.variance.type == kind


def test_old_variance_names_are_gone(panel, capsys):
    # Failed before: --se and iid were the interface. Source: common practice (an
    # unknown option or value is a usage error, exit 2).
    _, path = panel
    keys = ["--outcome", "y", "--regressors", "x1", "--unit", "unit", "--period", "period"]
    assert main(["fit", path, *keys, "--se", "hc1"]) == 2
    assert main(["fit", path, *keys, "--variance", "iid"]) == 2
    capsys.readouterr()
    with pytest.raises(InputError, match="Option 'variance' must be one of homoskedastic, hc1, cluster"):
        bigpanel.fit(path, "y", ["x1"], "unit", "period", variance="iid")
    with pytest.raises(TypeError):
        bigpanel.fit(path, "y", ["x1"], "unit", "period", se="hc1")
    two_way = bigpanel.fit(path, "y", ["x1"], "unit", "period", cluster=["unit", "period"])
    assert two_way.to_dict()["variance"]["type"] == "cluster"  # was cluster-two-way


def test_help_shows_the_new_names(capsys):
    # Failed before: --help listed --se with iid. Source: common practice.
    assert main(["fit", "--help"]) == 0
    text = capsys.readouterr().out
    assert "--variance" in text and "homoskedastic" in text
    assert "--se " not in text and "iid" not in text


def test_table_layout_in_words(panel):
    # Failed before: the table had 'Wald F(2, 237)' and a bracketed '[low, high]' column.
    # Source: statsmodels OLS (estimates, 95% intervals, F of all slopes, R-squared).
    df, path = panel
    res = bigpanel.fit(path, "y", ["x1", "x2"], "unit", "period", estimator="pooled", variance="homoskedastic")
    ref = _ols(df)
    text = res.table()
    lines = text.splitlines()
    assert lines[0] == "Pooled least squares of y"
    assert re.match(r"  data +panel\.parquet$", lines[1])
    assert re.match(r"  sample +240 rows, 40 units, 6 periods \(1 to 6\), step 1 \(detected\)$", lines[2])
    assert re.match(r"  variance +homoskedastic .*; t tests with 237 df$", lines[3])
    head = next(line for line in lines if line.lstrip().startswith("term"))
    assert head.split() == ["term", "estimate", "std.", "error", "t", "p", "low", "high"]
    assert "[" not in text and "F(" not in text and "Wald" not in text
    row = next(line for line in lines if line.lstrip().startswith("x1 "))
    cells = row.split()
    low, high = ref.conf_int()[1]  # statsmodels OLS conf_int, 95%
    assert float(cells[1]) == pytest.approx(ref.params[1], rel=1e-5)
    assert float(cells[5]) == pytest.approx(low, rel=1e-5) and float(cells[6]) == pytest.approx(high, rel=1e-5)
    joint = next(line for line in lines if "slopes jointly zero" in line)
    m = re.fullmatch(r"  slopes jointly zero: F = ([\d,.]+) on 2 and 237 df, p (< 0\.0001|= [\d.]+)", joint)
    assert m, joint
    assert float(m.group(1).replace(",", "")) == pytest.approx(ref.fvalue, abs=0.006)  # statsmodels OLS fvalue
    assert f"R-squared): {ref.rsquared:.4f}" in text  # statsmodels OLS rsquared
    start = lines.index("  Read these estimates as causal effects only if:")
    tail = lines[start + 1:]
    assert sum(line.startswith("  - ") for line in tail) == 4  # the four cautions, last
    assert all(line.startswith(("  - ", "    ")) for line in tail)
    assert max(len(line) for line in lines) <= WIDTH


def test_long_term_labels_never_wrap(panel):
    # Failed before: a long label widened every row past 100 columns. Decision: a label
    # longer than its column is cut and tagged ~N; its full text follows the table.
    # Source: common practice (a fixed-width terminal of 100 columns).
    _, path = panel
    long = "x1 * x2 + x1 * x1 * 0.5 + x2 * x2 * 0.25 + x1 * x2 * x2 * 0.125 + 1"
    assert len(long) > TERM_WIDTH
    res = bigpanel.fit(path, "y", ["x1", long, "x2"], "unit", "period", effects="unit,period", cluster="unit")
    lines = res.table().splitlines()
    assert max(len(line) for line in lines) <= WIDTH
    start = next(i for i, line in enumerate(lines) if line.lstrip().startswith("term")) + 2
    rows = lines[start:start + 3]
    assert [r.split()[0] for r in rows][::2] == ["x1", "x2"]
    assert rows[1].startswith("  " + long[:TERM_WIDTH - 2]) and rows[1][2:2 + TERM_WIDTH].endswith("~1")
    assert len(rows[1].split()) >= 7  # the label's start and six numbers, on one line
    assert f"  ~1        {long}" in lines
    assert res.coef(long).term == long  # the JSON keeps the full label


def test_indicator_labels_are_column_equals_level(panel):
    # Failed before: labels were kind[van] and period[3]. Source: statsmodels OLS on
    # pandas dummies (estimates of the indicators, base 'hub').
    df, path = panel
    res = bigpanel.fit(path, "y", ["x1", "levels(kind)"], "unit", "period", estimator="pooled", variance="hc1")
    dummies = pd.get_dummies(df["kind"], dtype=float)[["kiosk", "van"]]
    ref = sm.OLS(df["y"], sm.add_constant(pd.concat([df[["x1"]], dummies], axis=1))).fit()
    assert [c.term for c in res.coefficients] == ["x1", "kind=kiosk", "kind=van", "(intercept)"]
    assert res.coef("kind=van").estimate == pytest.approx(ref.params["van"], rel=1e-9)
    doc = json.loads(res.to_json())
    assert [c["term"] for c in doc["coefficients"]][1:3] == ["kind=kiosk", "kind=van"]
    # period indicators use the same form; a slope collinear with them is the term left
    # out, never an indicator (effects before slopes)
    collinear = bigpanel.fit(path, "y", ["x1", "period * 1.0"], "unit", "period", estimator="pooled", effects="period")
    assert collinear.terms_dropped == {"period * 1.0": "collinear with the period effects"}
    assert not any("[" in c["term"] for c in json.loads(collinear.to_json())["coefficients"])
    periods = bigpanel.fit(path, "y", ["x1", "levels(period)"], "unit", "period", estimator="pooled")
    assert [c.term for c in periods.coefficients][1:3] == ["period=2", "period=3"]
