"""Models side by side: one comparison table in Markdown, LaTeX, HTML and long-form CSV.

The input is a list of ``(name, fit JSON)`` pairs, the JSON exactly as ``bigpanel fit
--json`` prints it (:meth:`bigpanel.FitResult.to_dict`). The layout is ours:

- a header block: each model's outcome and estimator;
- one row per term (in the order the terms first appear across the models), the estimate
  followed by its significance mark, and directly beneath it a row labelled
  ``std. error`` with the estimate's standard error as a plain number;
- a blank cell where a model does not have the term, ``left out`` where the model had the
  term but dropped it (collinear or without variation within units: its JSON's
  ``terms_dropped``);
- the model rows: rows used, units, R² and which R² it is, effects, variance, clusters;
- notes: the marks' legend, what blank and ``left out`` mean, and the usual cautions.

Marks (common practice: thresholds on the two-sided p-value of each estimate's t test,
with the model's own degrees of freedom): ``*`` below 0.05, ``**`` below 0.01, ``***``
below 0.001. Numbers show 5 significant digits; the CSV keeps every digit of the JSON.

The CSV is long form: one row per model and term, with the model's rows repeated on each
(columns: :data:`CSV_COLUMNS`).
"""

from __future__ import annotations

import csv
import html
import io
import json
import math
import os
import tempfile
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

from .errors import InputError, echo

FILES = ("comparison.md", "comparison.tex", "comparison.html", "comparison.csv")
MARKS = ((0.001, "***"), (0.01, "**"), (0.05, "*"))  # (p below, mark), strictest first
LEGEND = "Marks after an estimate: *** p < 0.001, ** p < 0.01, * p < 0.05 (two-sided t test, each model's own df)."
SE_LABEL = "std. error"
LEFT_OUT = "left out"
MISSING = "n/a"  # a value the JSON holds as null (not finite)
NOTES = (
    LEGEND,
    f"The row '{SE_LABEL}' under a term gives the standard error of the estimate above it.",
    f"A blank cell: the model has no such term. '{LEFT_OUT}': the model asked for the term and dropped it (see its JSON, terms_dropped).",
)
CSV_COLUMNS = ("model", "outcome", "estimator", "term", "status", "estimate", "std_error", "t_stat", "p_value", "ci_lower",
               "ci_upper", "mark", "rows_used", "units", "r_squared", "r_squared_kind", "effects", "variance", "clusters")
_COEFFICIENT_KEYS = ("term", "estimate", "std_error", "t_stat", "p_value", "ci_lower", "ci_upper")
_MODEL_KEYS = ("estimator", "outcome", "coefficients", "n_obs", "n_units", "effects", "variance", "r_squared",
               "r_squared_kind")


# ---------------------------------------------------------------- the table as plain values


def mark(p: float | None) -> str:
    """The significance mark of a p-value ('' when above 0.05 or not finite)."""
    if p is None or not math.isfinite(p):
        return ""
    for limit, symbol in MARKS:
        if p < limit:
            return symbol
    return ""


def number(x: float | None) -> str:
    """A number as the tables show it: 5 significant digits."""
    if x is None or not math.isfinite(x):
        return MISSING
    return f"{x:.5g}"


def count(n: int | None) -> str:
    return MISSING if n is None else f"{int(n):,}"


def _check(models: Sequence[tuple[str, Mapping]]) -> None:
    if not models:
        raise InputError("The comparison has no models. Give at least one (name, fit JSON) pair.")
    seen = set()
    for i, pair in enumerate(models):
        if not (isinstance(pair, (tuple, list)) and len(pair) == 2 and isinstance(pair[0], str)):
            raise InputError(f"Model {i + 1} of the comparison is not a (name, fit JSON) pair. Give the model's name and "
                             "the dict that 'bigpanel fit --json' prints.")
        name, result = pair
        if not name.strip():
            raise InputError(f"Model {i + 1} of the comparison has an empty name. Give each model a name.")
        if name in seen:
            raise InputError(f"Model name '{echo(name)}' appears twice in the comparison. Give each model its own name.")
        seen.add(name)
        if not isinstance(result, Mapping):
            raise InputError(f"Model '{echo(name)}' of the comparison is a {type(result).__name__}, not a fit's JSON "
                             "object. Give the dict that 'bigpanel fit --json' prints.")
        missing = [k for k in _MODEL_KEYS if k not in result]
        if missing:
            raise InputError(f"Model '{echo(name)}' of the comparison lacks the key '{missing[0]}' of a fit's JSON. "
                             "Give the dict that 'bigpanel fit --json' prints.")
        for c in result["coefficients"]:
            if not isinstance(c, Mapping) or any(k not in c for k in _COEFFICIENT_KEYS):
                raise InputError(f"Model '{echo(name)}' of the comparison has a coefficient without "
                                 f"{', '.join(_COEFFICIENT_KEYS)}. Give the dict that 'bigpanel fit --json' prints.")


def terms(models: Sequence[tuple[str, Mapping]]) -> list[str]:
    """Every term of any model (estimated or left out), in order of first appearance."""
    out: dict[str, None] = {}
    for _, result in models:
        for c in result["coefficients"]:
            out.setdefault(c["term"], None)
        for term in result.get("terms_dropped") or {}:
            out.setdefault(term, None)
    return list(out)


def clusters_text(variance: Mapping) -> str:
    """'60 by unit; 9 by period' (one-way or two-way clusters), 'none' without clusters."""
    names, counts = list(variance.get("cluster_columns") or ()), list(variance.get("n_clusters") or ())
    if not names:
        return "none"
    return "; ".join(f"{count(n)} by {name}" for name, n in zip(names, counts))


def model_rows(result: Mapping) -> dict[str, str]:
    """The rows under the terms, as shown for one model (label: text)."""
    variance = result["variance"] or {}
    return {
        "rows used": count(result["n_obs"]),
        "units": count(result["n_units"]),
        "R²": number(result["r_squared"]),
        "R² kind": str(result["r_squared_kind"]),
        "effects": ", ".join(result["effects"]) or "none",
        "variance": str(variance.get("type", "")),
        "clusters": clusters_text(variance),
    }


def cell(result: Mapping, term: str) -> tuple[str, str, str]:
    """(estimate, its mark, standard error) as shown; ('', '', '') when the model has no
    such term; (LEFT_OUT, '', '') when it dropped it."""
    for c in result["coefficients"]:
        if c["term"] == term:
            return number(c["estimate"]), mark(c["p_value"]), number(c["std_error"])
    if term in (result.get("terms_dropped") or {}):
        return LEFT_OUT, "", ""
    return "", "", ""


def grid(models: Sequence[tuple[str, Mapping]]) -> list[tuple[str, str, list[str]]]:
    """The table as rows of (kind, label, cells): kind is 'head', 'term', 'se' or 'model'."""
    rows = [("head", "outcome", [str(r["outcome"]) for _, r in models]),
            ("head", "estimator", [str(r["estimator"]) for _, r in models])]
    for term in terms(models):
        cells = [cell(r, term) for _, r in models]
        rows.append(("term", term, [est + (" " + m if m else "") for est, m, _ in cells]))
        if any(se for _, _, se in cells):  # a term every model left out has no error row
            rows.append(("se", SE_LABEL, [se for _, _, se in cells]))
    per_model = [model_rows(r) for _, r in models]
    for label in per_model[0]:
        rows.append(("model", label, [m[label] for m in per_model]))
    return rows


def cautions(models: Sequence[tuple[str, Mapping]]) -> list[str]:
    for _, result in models:
        if result.get("cautions"):
            return [str(c) for c in result["cautions"]]
    from .results import CAUTIONS

    return list(CAUTIONS)


# ---------------------------------------------------------------- renderings


_MD = {"\\": "\\\\", "|": "\\|", "*": "\\*", "`": "\\`", "<": "&lt;", "[": "\\["}


def md_escape(text: str, marks: bool = False) -> str:
    """Text shown literally in a Markdown table cell. ``marks``: a number's trailing
    significance mark stays as written (after a space at the cell's end it is never
    emphasis)."""
    value, sep, tail = text.partition(" ") if marks else (text, "", "")
    if marks and set(tail) <= {"*"}:
        return "".join(_MD.get(ch, ch) for ch in value) + sep + tail
    return "".join(_MD.get(ch, ch) for ch in text)


def markdown(models: Sequence[tuple[str, Mapping]]) -> str:
    def line(cells: Iterable[str]) -> str:
        return "| " + " | ".join(cells) + " |"

    out = ["# Models compared", "", line(["", *(md_escape(n) for n, _ in models)]), "| --- |" + " ---: |" * len(models)]
    for kind, label, cells in grid(models):
        label = md_escape(label)
        out.append(line([f"**{label}**" if kind == "term" else label, *(md_escape(c, marks=True) for c in cells)]))
    out += ["", *NOTES, "", "Read these estimates as causal effects only if:", ""]
    out += [f"- {c}" for c in cautions(models)]
    return "\n".join(out) + "\n"


_TEX = {"\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#", "_": r"\_", "{": r"\{", "}": r"\}",
        "~": r"\textasciitilde{}", "^": r"\textasciicircum{}", "<": r"\textless{}", ">": r"\textgreater{}"}


def tex_escape(text: str) -> str:
    """Text safe in LaTeX's text mode (the ten special characters, and < > of old encodings)."""
    return "".join(_TEX.get(ch, ch) for ch in text).replace("²", r"\textsuperscript{2}")


def _tex_number(text: str) -> str:
    """A shown number or mark in LaTeX: a real minus sign, marks raised."""
    value, _, marks = text.partition(" ")
    sign = "$-$" if value.startswith("-") else ""
    return sign + tex_escape(value.removeprefix("-")) + (f"\\textsuperscript{{{marks}}}" if marks else "")


def latex(models: Sequence[tuple[str, Mapping]]) -> str:
    """A complete document (article, booktabs) holding the table and its notes."""
    names = [tex_escape(n) for n, _ in models]
    body = [r"\begin{tabular}{l" + "r" * len(models) + "}", r"\toprule",
            " & ".join(["", *names]) + r" \\", r"\midrule"]
    previous = "head"
    for kind, label, cells in grid(models):
        if kind != previous and kind in ("term", "model"):
            body.append(r"\midrule")
        previous = kind if kind != "se" else "term"
        if kind in ("term", "se"):
            shown = [_tex_number(c) if c and c != LEFT_OUT else tex_escape(c) for c in cells]
        else:
            shown = [tex_escape(c) for c in cells]
        name = r"\quad\textit{" + tex_escape(label) + "}" if kind == "se" else tex_escape(label)
        body.append(" & ".join([name, *shown]) + r" \\")
    body += [r"\bottomrule", r"\end{tabular}"]
    notes = [tex_escape(n) for n in NOTES]
    notes.append("Read these estimates as causal effects only if: " + " ".join(tex_escape(c) for c in cautions(models)))
    return "\n".join([
        "% bigpanel comparison table: compile with pdflatex (packages: booktabs).",
        r"\documentclass{article}", r"\usepackage[T1]{fontenc}", r"\usepackage[utf8]{inputenc}", r"\usepackage{booktabs}",
        r"\begin{document}", r"\begin{table}[ht]", r"\centering", r"\small",
        *body,
        r"\par\medskip",
        r"\begin{minipage}{0.9\linewidth}\footnotesize",
        *[n + r"\par" for n in notes],
        r"\end{minipage}", r"\end{table}", r"\end{document}",
    ]) + "\n"


_CSS = """body { font-family: system-ui, sans-serif; margin: 2em; color: #222; }
table { border-collapse: collapse; }
th, td { padding: 0.2em 0.8em; }
thead th { border-bottom: 2px solid #444; text-align: right; }
thead th:first-child { text-align: left; }
td { text-align: right; font-variant-numeric: tabular-nums; }
td.label { text-align: left; }
tr.se td { color: #555; font-size: 0.9em; padding-bottom: 0.5em; }
tr.se td.label { padding-left: 1.6em; font-style: italic; }
tr.first td { border-top: 1px solid #444; }
tbody tr:last-child td { border-bottom: 2px solid #444; }
p.notes, ul { font-size: 0.9em; max-width: 50em; }"""


def html_page(models: Sequence[tuple[str, Mapping]]) -> str:
    """One self-contained page (inline CSS, no script, no link to anything)."""
    e = html.escape
    head = "".join(f"<th>{e(n)}</th>" for n, _ in models)
    rows, previous = [], "head"
    for kind, label, cells in grid(models):
        classes = [kind] + (["first"] if kind != previous and kind in ("term", "model") else [])
        previous = kind if kind != "se" else "term"
        tds = "".join(f"<td>{e(c)}</td>" for c in cells)
        rows.append(f'<tr class="{" ".join(classes)}"><td class="label">{e(label)}</td>{tds}</tr>')
    notes = "".join(f"<p class=\"notes\">{e(n)}</p>" for n in NOTES)
    warn = "".join(f"<li>{e(c)}</li>" for c in cautions(models))
    return "\n".join([
        "<!DOCTYPE html>", '<html lang="en">', "<head>", '<meta charset="utf-8">', "<title>Models compared</title>",
        f"<style>\n{_CSS}\n</style>", "</head>", "<body>", "<h1>Models compared</h1>", "<table>",
        f"<thead><tr><th></th>{head}</tr></thead>", "<tbody>", *rows, "</tbody>", "</table>", notes,
        "<p class=\"notes\">Read these estimates as causal effects only if:</p>", f"<ul>{warn}</ul>",
        "</body>", "</html>",
    ]) + "\n"


def long_rows(models: Sequence[tuple[str, Mapping]]) -> list[dict[str, Any]]:
    """One dict per model and term (:data:`CSV_COLUMNS`), numbers as in the JSON."""
    out = []
    for name, result in models:
        variance = result["variance"] or {}
        shared = {"rows_used": result["n_obs"], "units": result["n_units"], "r_squared": result["r_squared"],
                  "r_squared_kind": result["r_squared_kind"], "effects": ",".join(result["effects"]),
                  "variance": variance.get("type", ""), "clusters": ",".join(
                      f"{c}={n}" for c, n in zip(variance.get("cluster_columns") or (), variance.get("n_clusters") or ()))}
        head = {"model": name, "outcome": result["outcome"], "estimator": result["estimator"]}
        for c in result["coefficients"]:
            out.append({**head, "term": c["term"], "status": "estimated",
                        **{k: c[k] for k in _COEFFICIENT_KEYS[1:]}, "mark": mark(c["p_value"]), **shared})
        for term in result.get("terms_dropped") or {}:
            out.append({**head, "term": term, "status": LEFT_OUT.replace(" ", "_"),
                        **{k: None for k in _COEFFICIENT_KEYS[1:]}, "mark": "", **shared})
    return out


def csv_text(models: Sequence[tuple[str, Mapping]]) -> str:
    """Long form; numbers written with every digit (Python's repr), null as an empty field."""
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=CSV_COLUMNS, lineterminator="\n")
    writer.writeheader()
    for row in long_rows(models):
        writer.writerow({k: "" if v is None else (repr(v) if isinstance(v, float) else v) for k, v in row.items()})
    return buffer.getvalue()


def comparison_files(models: list[tuple[str, dict]]) -> dict[str, str]:
    """The four comparison files' texts, by file name (:data:`FILES`), from (model name,
    fit JSON) pairs in the order the columns take."""
    _check(models)
    models = [(name, result) for name, result in models]
    return {"comparison.md": markdown(models), "comparison.tex": latex(models), "comparison.html": html_page(models),
            "comparison.csv": csv_text(models)}


# ---------------------------------------------------------------- from Python and the command line


def _as_json(item: Any, where: str) -> dict:
    """A fit's JSON from a FitResult, a dict, or a JSON file's path."""
    if hasattr(item, "to_dict"):
        return item.to_dict()
    if isinstance(item, Mapping):
        return dict(item)
    if isinstance(item, (str, os.PathLike)):
        path = Path(item)
        try:
            return json.loads(path.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise InputError(f"File '{echo(path)}' ({where}) does not exist. Give the JSON file a fit wrote.") from None
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise InputError(f"File '{echo(path)}' ({where}) is not readable JSON ({echo(exc, 80)}). Give the JSON "
                             "that 'bigpanel fit --json' prints.") from None
    raise InputError(f"The comparison's {where} is a {type(item).__name__}. Give a FitResult, its to_dict(), or the "
                     "path of its JSON file.")


def _names_of_paths(paths: Sequence[Path]) -> list[str]:
    """File names without '.json'; with the parent folder where two would be equal."""
    stems = [p.stem for p in paths]
    return [f"{p.parent.name}/{p.stem}" if stems.count(p.stem) > 1 else p.stem for p in paths]


def compare_results(results, names: Sequence[str] | None = None, out: str | os.PathLike | None = None) -> dict[str, str]:
    """Put fitted models side by side: the comparison table in Markdown, LaTeX, HTML and CSV.

    Parameters
    ----------
    results : sequence or mapping
        FitResults (e.g. a :class:`FitList`), their ``to_dict()``, or paths of JSON files
        written by ``bigpanel fit --json``; a mapping gives each model's name.
    names : sequence of str, optional
        The models' names (columns). Default: the mapping's keys, a file's name without
        ``.json``, else "model 1", "model 2", ...
    out : folder, optional
        Also write ``comparison.md``, ``.tex``, ``.html`` and ``.csv`` there (created if
        needed; each file written under a temporary name, then renamed).

    Returns
    -------
    dict
        File name to text, as :func:`comparison_files`.
    """
    if isinstance(results, Mapping):
        names = list(results) if names is None else names
        results = list(results.values())
    results = list(results)
    if names is None:
        if results and all(isinstance(r, (str, os.PathLike)) for r in results):
            names = _names_of_paths([Path(r) for r in results])
        else:
            names = [f"model {i + 1}" for i in range(len(results))]
    names = list(names)
    if len(names) != len(results):
        raise InputError(f"The comparison has {len(results)} models but {len(names)} names. Give one name per model.")
    models = [(str(n), _as_json(r, f"model {i + 1}")) for i, (n, r) in enumerate(zip(names, results))]
    files = comparison_files(models)
    if out is not None:
        write_files(Path(out), files)
    return files


def write_files(folder: Path, files: Mapping[str, str]) -> None:
    """Write each text under a temporary name in ``folder`` and rename it into place, so a
    reader sees each file complete or not at all."""
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"Folder '{echo(folder)}' cannot be created ({exc.strerror}). Give a folder you can write.") from None
    for name, text in files.items():
        fd, temp = tempfile.mkstemp(prefix=f".{name}.", suffix=".tmp", dir=folder)
        try:
            with os.fdopen(fd, "w", encoding="utf-8", newline="") as handle:
                handle.write(text)
            os.replace(temp, folder / name)
        except BaseException:
            Path(temp).unlink(missing_ok=True)
            raise
