"""CSV as exported by common tools: extra missing-value tokens (``NA``, ``.``).

Failed before (issue 9, item 7): there was no option for them (csv_nulls / --csv-null),
a numeric column holding NA was read as text, and the checkup reported it as text with
0 missing and no word of why. References: Python's csv module (the tokens counted in the
file itself), pandas read_csv with na_values and statsmodels OLS with unit dummies.
"""

from __future__ import annotations

import csv
import json
import statistics

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import bigpanel
from bigpanel.cli import main

TOKENS = ("NA", ".")


@pytest.fixture(scope="module")
def exported(tmp_path_factory):
    rng = np.random.default_rng(12)
    lines = ["depot,month,parcels,staff_hours,note"]
    for depot in range(1, 31):
        for month in range(1, 13):
            hours = rng.normal(10, 2)
            parcels = 5 + 0.8 * hours + 0.3 * depot + rng.normal()
            u = rng.random()
            cell = "NA" if u < 0.08 else "." if u < 0.11 else f"{hours:.5f}"
            lines.append(f"{depot},{month},{parcels:.5f},{cell},free text {month}")
    path = tmp_path_factory.mktemp("export") / "depots.csv"
    path.write_text("\n".join(lines) + "\n")
    return str(path)


def _tokens_in_file(path):
    with open(path, newline="") as handle:  # Python's csv module, independent of DuckDB
        column = [row["staff_hours"] for row in csv.DictReader(handle)]
    numbers = [float(v) for v in column if v not in TOKENS]
    return sum(v in TOKENS for v in column), numbers


def test_checkup_flags_a_text_column_that_is_mostly_numbers(exported):
    # Source: the file itself read by Python's csv module (which tokens, how many).
    report = bigpanel.inspect_panel(exported, unit="depot", period="month")
    hours = next(c for c in report.columns if c.name == "staff_hours")
    assert hours.dtype == "VARCHAR" and set(hours.number_tokens) == set(TOKENS)
    note = next(c for c in report.columns if c.name == "note")
    assert note.number_tokens == ()  # free text is text
    assert "Text column staff_hours looks numeric except for tokens: 'NA', '.'" in report.render()
    assert report.to_dict()["columns"][1]["number_tokens"] == ["NA", "."]


def test_csv_nulls_read_the_tokens_as_missing(exported):
    # Source: Python's csv module (count of tokens; mean of the other values).
    n_tokens, numbers = _tokens_in_file(exported)
    report = bigpanel.inspect_panel(exported, unit="depot", period="month", csv_nulls=list(TOKENS))
    hours = next(c for c in report.columns if c.name == "staff_hours")
    assert hours.dtype == "DOUBLE" and hours.n_missing == n_tokens
    assert hours.mean == pytest.approx(statistics.fmean(numbers), rel=1e-12)


def test_fit_with_csv_nulls_matches_pandas_na_values(exported):
    # Source: pandas read_csv(na_values=...) and statsmodels OLS with unit dummies.
    df = pd.read_csv(exported, na_values=list(TOKENS), keep_default_na=False).dropna(subset=["staff_hours"])
    x = pd.concat([df[["staff_hours"]], pd.get_dummies(df["depot"], dtype=float)], axis=1).to_numpy()
    ref = sm.OLS(df["parcels"].to_numpy(), x).fit()
    with pytest.warns(bigpanel.errors.BigpanelWarning):
        res = bigpanel.fit(exported, "parcels", "staff_hours", "depot", "month", csv_nulls="NA,.", variance="homoskedastic")
    assert res.n_obs == len(df)
    assert res.coef("staff_hours").estimate == pytest.approx(ref.params[0], rel=1e-9)
    assert res.coef("staff_hours").std_error == pytest.approx(ref.bse[0], rel=1e-9)
    many = bigpanel.fit_many(exported, [dict(outcome="parcels", regressors="staff_hours")], unit="depot",
                             period="month", csv_nulls=["NA", "."])
    assert many[0].coef("staff_hours").estimate == pytest.approx(ref.params[0], rel=1e-9)


def test_cli_csv_null_repeated_or_comma_separated(exported, capsys):
    # Source: pandas read_csv(na_values=...) row count; common practice (a CSV option on a
    # Parquet source is a usage error).
    keys = ["--unit", "depot", "--period", "month", "--outcome", "parcels", "--regressors", "staff_hours", "--json"]
    assert main(["fit", exported, *keys, "--csv-null", "NA", "--csv-null", "."]) == 0
    repeated = json.loads(capsys.readouterr().out)
    assert main(["fit", exported, *keys, "--csv-null", "NA,."]) == 0
    joined = json.loads(capsys.readouterr().out)
    df = pd.read_csv(exported, na_values=list(TOKENS), keep_default_na=False)
    assert repeated["n_obs"] == joined["n_obs"] == int(df["staff_hours"].notna().sum())
    assert repeated["coefficients"] == joined["coefficients"]
    assert main(["fit", exported, *keys]) == 2  # text column: refused, with the hint
    assert "--csv-null" in capsys.readouterr().err
    df.to_parquet(exported + ".parquet")
    assert main(["checkup", exported + ".parquet", "--unit", "depot", "--period", "month", "--csv-null", "NA"]) == 2
    assert "Option --csv-null applies to CSV sources" in capsys.readouterr().err
