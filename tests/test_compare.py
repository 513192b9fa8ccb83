"""Comparison tables (bigpanel.compare): models side by side in Markdown, LaTeX, HTML, CSV.

References: each model's own JSON (what ``bigpanel fit --json`` prints, the table's input
contract), read back from the tables with Python's csv module and a Markdown table split
written here; the HTML checked with the standard library's html.parser; the significance
marks recomputed from each coefficient's p-value against the thresholds the notes state.
The fits themselves are checked elsewhere (test_fit_lsdv.py, test_fit_many.py).
"""

from __future__ import annotations

import csv
import io
import json
import re
from html.parser import HTMLParser

import pytest

import bigpanel
from bigpanel.cli import main as cli_main
from bigpanel.compare import CSV_COLUMNS, FILES, LEFT_OUT, SE_LABEL, comparison_files, tex_escape
from bigpanel.errors import InputError
from panel_cases import unbalanced_panel, write_parquet

pytestmark = pytest.mark.filterwarnings("ignore::bigpanel.errors.BigpanelWarning")

ODD = "cost_%&#{x}$~^\\"  # a column name holding every LaTeX special character


@pytest.fixture(scope="module")
def panel(tmp_path_factory):
    df = unbalanced_panel(17, 50, 8)
    df[ODD] = 0.5 * df["x2"] + df["x1"] ** 2
    return write_parquet(df, tmp_path_factory.mktemp("compare") / "panel.parquet")


@pytest.fixture(scope="module")
def models(panel):
    """Four estimators side by side, with terms some models lack and a term one drops."""
    many = bigpanel.fit_many(panel, [
        dict(outcome="y", regressors=["x1", "x2"]),
        dict(outcome="y", regressors=["x1", ODD], estimator="pooled", variance="hc1"),
        dict(outcome="y", regressors=["x2"], estimator="first-difference", cluster="region"),
    ], unit="unit", period="period")
    two_way = bigpanel.fit(panel, "y", ["x1", "x2", "x2 * 2"], "unit", "period", effects=["unit", "period"],
                           cluster=["unit", "period"])
    assert "x2 * 2" in two_way.terms_dropped  # the collinear copy is left out by name
    results = [*many, two_way]
    return [(name, json.loads(r.to_json())) for name, r in zip(["base", "pooled_odd", "diff", "two way"], results)]


def expected_mark(p):
    """The thresholds the table's legend states (common practice)."""
    if p is None:
        return ""
    return "***" if p < 0.001 else "**" if p < 0.01 else "*" if p < 0.05 else ""


def shown(x):
    return "n/a" if x is None else f"{x:.5g}"


def markdown_rows(text):
    """The Markdown table as (label, cells) rows: cells split at unescaped bars, escapes undone."""
    rows = []
    for line in text.splitlines():
        if not line.startswith("|") or line.startswith("| ---"):
            continue
        cells = [re.sub(r"\\(.)", r"\1", c.strip()).replace("&lt;", "<")
                 for c in re.split(r"(?<!\\)\|", line.strip()[1:-1])]
        rows.append((cells[0], cells[1:]))
    return rows


def test_markdown_numbers_equal_each_models_json(models):
    rows = markdown_rows(comparison_files(models)["comparison.md"])
    header, body = rows[0], rows[1:]
    assert header[1] == [name for name, _ in models]
    terms = [label[2:-2] for label, _ in body if label.startswith("**")]
    for j, (_, result) in enumerate(models):
        coefs = {c["term"]: c for c in result["coefficients"]}
        for i, (label, cells) in enumerate(body):
            if not label.startswith("**"):
                continue
            term = label[2:-2]
            if term in coefs:
                c = coefs[term]
                value, _, marks = cells[j].partition(" ")
                assert float(value) == float(shown(c["estimate"]))
                assert marks == expected_mark(c["p_value"])
                assert body[i + 1][0] == SE_LABEL
                assert float(body[i + 1][1][j]) == float(shown(c["std_error"]))
            elif term in result["terms_dropped"]:
                assert cells[j] == LEFT_OUT
            else:  # a model missing a term shows blank, its error too
                assert cells[j] == ""
                assert body[i + 1][0] != SE_LABEL or body[i + 1][1][j] == ""
        assert set(coefs) | set(result["terms_dropped"]) <= set(terms)
        stats = dict(body)
        assert int(stats["rows used"][j].replace(",", "")) == result["n_obs"]
        assert int(stats["units"][j].replace(",", "")) == result["n_units"]
        assert float(stats["R²"][j]) == float(shown(result["r_squared"]))
        assert stats["R² kind"][j] == result["r_squared_kind"]
        assert stats["estimator"][j] == result["estimator"]
        assert stats["variance"][j] == result["variance"]["type"]
        assert stats["effects"][j] == (", ".join(result["effects"]) or "none")
        v = result["variance"]
        for name, n in zip(v["cluster_columns"], v["n_clusters"]):
            assert f"{n:,} by {name}" in stats["clusters"][j]


def test_estimators_side_by_side(models):
    rows = dict(markdown_rows(comparison_files(models)["comparison.md"]))
    assert rows["estimator"] == ["within", "pooled", "first-difference", "within"]
    assert rows["effects"][3] == "unit, period" and rows["effects"][1] == "none"
    intercept = rows["**(intercept)**"]  # pooled and first differences keep one; within has none
    assert intercept[1] and intercept[2] and not intercept[0] and not intercept[3]


def test_csv_is_long_form_with_every_digit(models):
    text = comparison_files(models)["comparison.csv"]
    table = list(csv.DictReader(io.StringIO(text)))
    assert tuple(table[0]) == CSV_COLUMNS
    expected = [(name, c["term"]) for name, r in models for c in r["coefficients"]]
    expected += [(name, t) for name, r in models for t in r["terms_dropped"]]
    assert sorted((row["model"], row["term"]) for row in table) == sorted(expected)
    for row in table:
        result = dict(models)[row["model"]]
        assert int(row["rows_used"]) == result["n_obs"] and int(row["units"]) == result["n_units"]
        assert float(row["r_squared"]) == result["r_squared"]
        if row["status"] != "estimated":
            assert row["term"] in result["terms_dropped"] and row["estimate"] == ""
            continue
        c = next(c for c in result["coefficients"] if c["term"] == row["term"])
        for key in ("estimate", "std_error", "t_stat", "p_value", "ci_lower", "ci_upper"):
            assert float(row[key]) == c[key]  # exact: the CSV keeps every digit of the JSON
        assert row["mark"] == expected_mark(c["p_value"])


class _Balance(HTMLParser):
    """Every opened tag closed in order (void elements excepted)."""

    VOID = {"meta", "br", "hr", "img", "link", "input", "col"}

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack, self.errors, self.cells, self.tags = [], [], [], set()

    def handle_starttag(self, tag, attrs):
        self.tags.add(tag)
        for name, value in attrs:
            if name in ("src", "href") or (value or "").startswith(("http:", "https:", "//")):
                self.errors.append(f"external reference {name}={value}")
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if not self.stack or self.stack.pop() != tag:
            self.errors.append(f"unbalanced </{tag}>")

    def handle_data(self, data):
        if self.stack and self.stack[-1] in ("td", "th"):
            self.cells.append(data)


def test_html_is_well_formed_and_self_contained(models):
    page = comparison_files(models)["comparison.html"]
    parser = _Balance()
    parser.feed(page)
    parser.close()
    assert parser.errors == [] and parser.stack == []
    assert parser.tags.isdisjoint({"script", "link", "img", "iframe"})
    assert ODD in parser.cells  # the odd term name survives escaping
    for name, result in models:
        assert name in parser.cells
        for c in result["coefficients"]:
            assert shown(c["std_error"]) in parser.cells


def test_latex_escapes_special_characters(models):
    tex = comparison_files(models)["comparison.tex"]
    assert ODD not in tex
    row = next(line for line in tex.splitlines() if line.startswith(tex_escape(ODD) + " &"))
    assert tex_escape(ODD) == r"cost\_\%\&\#\{x\}\$\textasciitilde{}\textasciicircum{}\textbackslash{}"
    unescaped_ampersands = re.findall(r"(?<!\\)&", row)
    assert len(unescaped_ampersands) == len(models)  # one column separator per model, no more
    assert tex_escape("pooled_odd") in tex and "two way" in tex
    assert tex.count(r"\begin{") == tex.count(r"\end{")
    assert r"\usepackage{booktabs}" in tex and r"\toprule" in tex and r"\bottomrule" in tex


def test_compare_results_api_and_fit_list(panel, models, tmp_path):
    many = bigpanel.fit_many(panel, [dict(outcome="y", regressors=["x1"]), dict(outcome="y", regressors=["x2"])],
                             unit="unit", period="period")
    files = many.compare(names=["one", "two"], out=tmp_path / "out")
    assert sorted(files) == sorted(FILES)
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == sorted(FILES)  # no temporary names left
    for name in FILES:
        assert (tmp_path / "out" / name).read_text(encoding="utf-8") == files[name]
    by_dict = bigpanel.compare_results({"one": many[0].to_dict(), "two": many[1]})
    assert by_dict == files
    paths = []
    for name, result in models[:2]:
        paths.append(tmp_path / f"{name}.json")
        paths[-1].write_text(json.dumps(result), encoding="utf-8")
    assert bigpanel.compare_results(paths) == comparison_files(models[:2])


def test_bad_comparisons_are_input_errors(models, tmp_path):
    with pytest.raises(InputError, match="appears twice"):
        comparison_files([models[0], models[0]])
    with pytest.raises(InputError, match="lacks the key 'coefficients'"):
        comparison_files([("a", {"estimator": "within", "outcome": "y"})])
    with pytest.raises(InputError, match="no models"):
        comparison_files([])
    with pytest.raises(InputError, match="2 models but 1 names"):
        bigpanel.compare_results([models[0][1], models[1][1]], names=["a"])


def test_compare_command(models, tmp_path, capsys):
    paths = []
    for name, result in models[:2]:
        paths.append(str(tmp_path / f"{name}.json"))
        (tmp_path / f"{name}.json").write_text(json.dumps(result), encoding="utf-8")
    assert cli_main(["compare", *paths]) == 0
    assert capsys.readouterr().out == comparison_files(models[:2])["comparison.md"]
    assert cli_main(["compare", *paths, "--out", str(tmp_path / "tables")]) == 0
    assert sorted(p.name for p in (tmp_path / "tables").iterdir()) == sorted(FILES)
    (tmp_path / "broken.json").write_text("{", encoding="utf-8")
    assert cli_main(["compare", paths[0], str(tmp_path / "broken.json")]) == 2
    assert "is not readable JSON" in capsys.readouterr().err
    assert cli_main(["compare", paths[0], str(tmp_path / "absent.json")]) == 2
    assert "does not exist" in capsys.readouterr().err
