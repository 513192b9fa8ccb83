"""Tests of hypotheses on a fit, from its estimates and covariance (no rows are read here).

- **Joint tests of linear restrictions** (``--test "grant = 0, lag(grant) = 0"``): each
  restriction is parsed by DuckDB's parser (:func:`bigpanel.expressions.expression_trees`,
  never evaluated) and read as a linear form in the model's terms: numbers, term names
  (a term's label as written, or in double quotes), ``+ - * /`` with a number on one side
  of each product and below each division. A part of the tree that equals the tree of a
  term's label is that term, so ``ln(parcels)`` or ``lag(grant)`` are read whole.
  The statistic is W = (Rb - r)' (R V R')^-1 (Rb - r) with the fit's own variance V;
  the result gives F = W/q with q and the variance's degrees of freedom (the residual df,
  or G-1 with clusters: the same reference as the t tests) and, beside it, the
  chi-square form W with q df. No statistic is given from a singular R V R' (a
  cluster-robust V has rank at most G-1, ESTIMATION.md): the test says why instead.
- **Random effects against within** (:func:`compare_with_within`): the Hausman statistic
  on the common time-varying terms, and the test of the unit means' coefficients in the
  correlated-random-effects regression, with the fit's cluster variance.
- **Serial correlation** of the within or first-difference errors (:func:`serial_result`):
  differenced residuals regressed on their own lag within units.

The JSON keys under ``tests`` are documented in README ("Tests reported with a fit").
"""

from __future__ import annotations

import json
from dataclasses import dataclass

import numpy as np
import scipy.special

from .errors import InputError, echo, shown
from .expressions import _arguments, expression_trees, label_tree

_NUMBER_KINDS = ("INTEGER", "BIGINT", "HUGEINT", "NUMERIC", "DECIMAL", "DOUBLE", "FLOAT", "UBIGINT")
SINGULAR = 1e-12  # smallest eigenvalue ratio of a variance block still used for a statistic


@dataclass(frozen=True)
class Restriction:
    """sum_j weights[j] * b[term_j] = value."""

    weights: tuple[tuple[str, float], ...]
    value: float


def check_syntax(text: str) -> None:
    """Refuse a test that is not a comma-separated list of equations (spec time: the
    terms' names are checked once the design is known, :func:`restrictions`)."""
    for item in expression_trees(text, "Test"):
        if item.get("class") != "COMPARISON" or item.get("type") != "COMPARE_EQUAL":
            raise InputError(f"Test {shown(text)} has a part that is not an equation. Write restrictions as "
                             "\"term = number\" or \"2*x = z + 1\", separated by commas.")


def _key(node: dict) -> str:
    return json.dumps({k: v for k, v in node.items() if k != "alias"}, sort_keys=True)


def _atoms(labels: list[str]) -> tuple[dict[str, str], dict[str, str]]:
    """Trees of the labels (as keys) and the labels by name (for quoted names)."""
    trees, names = {}, {}
    for label in labels:
        tree = label_tree(label)
        if tree is not None:
            trees.setdefault(_key(tree), label)
        names[label] = label
    return trees, names


def _part_text(node: dict) -> str:
    if node.get("class") == "COLUMN_REF":
        return ".".join(node.get("column_names", []))
    if node.get("class") == "FUNCTION":
        return str(node.get("function_name", "")) + "(...)"
    return str(node.get("class", "part")).lower()


def _linear(node: dict, trees: dict, names: dict, text: str, known: list[str]) -> tuple[dict[str, float], float]:
    """(weights by term, constant) of a linear expression tree."""
    label = trees.get(_key(node))
    if label is None and node.get("class") == "COLUMN_REF" and len(node.get("column_names", [])) == 1:
        name = node["column_names"][0]
        label = names.get(name) or next((v for k, v in names.items() if k.lower() == name.lower()), None)
    if label is not None:
        return {label: 1.0}, 0.0
    cls = node.get("class")
    if cls == "CONSTANT":
        literal = node.get("literal", {})
        if literal.get("kind") in _NUMBER_KINDS:
            return {}, float(literal.get("text"))
    if cls == "FUNCTION" and node.get("is_operator") and node.get("function_name") in ("+", "-", "*", "/"):
        op = node["function_name"]
        parts = [_linear(a, trees, names, text, known) for a in _arguments(node)]
        if len(parts) == 1 and op in "+-":
            w, c = parts[0]
            sign = -1.0 if op == "-" else 1.0
            return {t: sign * v for t, v in w.items()}, sign * c
        if len(parts) == 2:
            (wa, ca), (wb, cb) = parts
            if op in "+-":
                sign = -1.0 if op == "-" else 1.0
                out = dict(wa)
                for t, v in wb.items():
                    out[t] = out.get(t, 0.0) + sign * v
                return out, ca + sign * cb
            if op == "*" and (not wa or not wb):
                (w, c), f = ((wb, cb), ca) if not wa else ((wa, ca), cb)
                return {t: f * v for t, v in w.items()}, f * c
            if op == "/" and not wb:
                if cb == 0:
                    raise InputError(f"Test {shown(text)} divides by zero. Write the restriction with other numbers.")
                return {t: v / cb for t, v in wa.items()}, ca / cb
            raise InputError(f"Test {shown(text)} is not linear in the terms: a product or quotient of two terms. "
                             "Put a number on one side of each * and below each /, and parentheses around a term "
                             "that is itself a product, like 2*(x*z).")
    raise InputError(f"Test {shown(text)} names {shown(_part_text(node))}, which is neither a number nor a term of the model. "
                     f"Terms: {echo(', '.join(known), 300)} (write a name that is not an expression in double quotes).")


def restrictions(text: str, labels: list[str]) -> list[Restriction]:
    """The restrictions of one test over the terms ``labels``; one InputError naming
    the test when a part is not a number or a term, or a restriction has no term."""
    out = []
    trees, names = _atoms(labels)
    for item in expression_trees(text, "Test"):
        if item.get("class") != "COMPARISON" or item.get("type") != "COMPARE_EQUAL":
            raise InputError(f"Test {shown(text)} has a part that is not an equation. Write restrictions as "
                             "\"term = number\" or \"2*x = z + 1\", separated by commas.")
        wl, cl = _linear(item["left"], trees, names, text, labels)
        wr, cr = _linear(item["right"], trees, names, text, labels)
        weights = dict(wl)
        for t, v in wr.items():
            weights[t] = weights.get(t, 0.0) - v
        weights = {t: v for t, v in weights.items() if v != 0.0}
        if not weights:
            raise InputError(f"Test {shown(text)} has a restriction without a term (it says a number equals a number). "
                             "Name at least one term in each restriction.")
        out.append(Restriction(tuple(weights.items()), cr - cl))
    return out


def wald(text: str, rows: list[Restriction], terms: list[str], estimate: np.ndarray, covariance: np.ndarray,
         df: float, n_clusters, dropped: dict) -> dict:
    """The joint Wald test of ``rows`` on the reported coefficients (``terms``, in the order
    of ``estimate`` and ``covariance``). Returns the JSON-ready entry (see README)."""
    q = len(rows)
    out = {"hypothesis": text, "restrictions": q, "f": None, "df": [q, df], "p_value": None,
           "chi_square": None, "p_value_chi_square": None, "unavailable": ""}
    missing = sorted({t for r in rows for t, _ in r.weights if t not in terms})
    if missing:
        why = "; ".join(f"{t} ({dropped.get(t, 'not estimated')})" for t in missing)
        out["unavailable"] = f"terms left out of the fit: {why}"
        return out
    big_r = np.zeros((q, len(terms)))
    for i, r in enumerate(rows):
        for t, v in r.weights:
            big_r[i, terms.index(t)] = v
    if np.linalg.matrix_rank(big_r) < q:
        out["unavailable"] = "the restrictions repeat or contradict one another (some are combinations of others)"
        return out
    value = np.array([r.value for r in rows])
    return _f_and_chi_square(out, big_r @ estimate - value, big_r @ covariance @ big_r.T, df, n_clusters, "restrictions")


def _f_and_chi_square(out: dict, d: np.ndarray, m: np.ndarray, df: float, n_clusters, what: str) -> dict:
    """Fill ``out`` with W = d' m^-1 d as F = W/q (q and ``df`` df) and as chi-square (q df),
    or with why there is no statistic (one-way clusters fewer than q + 1; m singular)."""
    q = len(d)
    if isinstance(n_clusters, (int, np.integer)) and n_clusters - 1 < q:
        out["unavailable"] = f"{int(n_clusters)} clusters give a variance of rank at most {int(n_clusters) - 1}, below the {q} {what}"
        return out
    stat = quadratic_form(d, m)
    if isinstance(stat, str):
        out["unavailable"] = stat
        return out
    out.update(chi_square=stat, p_value_chi_square=float(scipy.special.chdtrc(q, stat)), f=stat / q,
               p_value=float(scipy.special.fdtrc(q, df, stat / q)) if df > 0 else None)
    return out


def quadratic_form(d: np.ndarray, m: np.ndarray) -> float | str:
    """d' m^-1 d, or why it is not available (m singular or not finite)."""
    if not (np.isfinite(m).all() and np.isfinite(d).all()):
        return "the variance of the restrictions is not finite"
    scale = np.sqrt(np.abs(np.diag(m)))
    if not (scale > 0).all():
        return "the variance of the restrictions is singular"
    ms = m / np.outer(scale, scale)  # the statistic does not change under this rescaling
    eig = np.linalg.eigvalsh(ms)
    if eig[0] <= SINGULAR * max(eig[-1], 0.0) or eig[-1] <= 0:
        return "the variance of the restrictions is singular"
    ds = d / scale
    stat = float(ds @ np.linalg.solve(ms, ds))
    return stat if np.isfinite(stat) and stat >= 0 else "the variance of the restrictions is too close to singular"


def _chi_square_entry(stat: float | str, df: int) -> dict:
    if isinstance(stat, str):
        return {"statistic": None, "df": df, "p_value": None, "unavailable": stat}
    return {"statistic": stat, "df": df, "p_value": float(scipy.special.chdtrc(df, stat)), "unavailable": ""}


def hausman(b_within: np.ndarray, v_within: np.ndarray, b_random: np.ndarray, v_random: np.ndarray) -> dict:
    """H = (b_W - b_RE)' (V_W - V_RE)^-1 (b_W - b_RE), chi-square with as many df as
    common terms. Valid when random effects is efficient (homoskedastic errors, no serial
    correlation) and consistent under the null; with another variance, read the unit-means
    test (:func:`zero_block` on the correlated random-effects regression)."""
    df = len(b_within)
    if df == 0:
        return _chi_square_entry("no time-varying term is common to both fits", 0) | {"variance": "homoskedastic"}
    stat = quadratic_form(b_within - b_random, v_within - v_random)
    if isinstance(stat, str):
        stat = stat.replace("variance of the restrictions", "difference of the two variances") + \
            " (common in small samples; read the unit-means test)"
    return _chi_square_entry(stat, df) | {"variance": "homoskedastic"}


def zero_block(coef: np.ndarray, covariance: np.ndarray, block, kept: np.ndarray, df: float, n_clusters) -> dict:
    """The joint Wald test that the coefficients ``block`` are zero (F and chi-square forms,
    as :func:`wald`); a block column left out of the fit makes it unavailable."""
    block = [int(j) for j in block]
    q = len(block)
    out = {"restrictions": q, "f": None, "df": [q, df], "p_value": None, "chi_square": None,
           "p_value_chi_square": None, "unavailable": ""}
    if q == 0:
        out["unavailable"] = "no time-varying terms"
        return out
    if not all(kept[j] for j in block):
        out["unavailable"] = "a unit mean is collinear with the other terms"
        return out
    return _f_and_chi_square(out, coef[block], covariance[np.ix_(block, block)], df, n_clusters, "means tested")


# ---------------------------------------------------------------- serial correlation
NO_SERIAL = -0.5  # the coefficient under serially uncorrelated level errors (Wooldridge 2010, section 10.6)
LEVEL = 0.05  # the level at which the text reads the test


def serial_correlation(est, executor, design, rows, params: dict, eq, sol) -> dict:
    """Regress the differenced residuals e_t on their lag e_{t-1} within units (pairs of
    consecutive periods, so each unit needs three in a row) with an intercept. The level
    residual y - x'b is formed per row and differenced in one window per unit: for first
    differences its difference is the differenced equation's residual (less its intercept).
    With serially uncorrelated level errors the slope is -0.5 (Wooldridge, Econometric
    Analysis of Cross Section and Panel Data, section 10.6). The t statistic of slope + 0.5 uses a
    variance clustered by unit (CR1, G - 1 df). One scan (``serial_pass.sql``)."""
    from .requests import Rows

    k = rows.q - 1
    test_rows = Rows(rows.columns, (), differenced=False)  # levels: the residual is differenced in the pass
    values = {key: v for key, v in params.items() if key[0] in "sd"} | {f"b{j}": float(sol.coef[j]) for j in range(k)}
    n_periods = 0
    if eq.effect_rows is not None:
        e = eq.effect_rows.shape[1]
        gamma = eq.effect_rows @ sol.coef[k:k + e]
        n_periods = len(eq.effect_values)
        values |= {f"t{i}": v for i, v in enumerate(eq.effect_values)} | {f"g{i}": float(g) for i, g in enumerate(gamma)}
    intercept = est.constant and not n_periods
    if intercept:
        values["b_one"] = float(sol.coef[k])
    sums = executor.serial_sums(test_rows, k, intercept, n_periods, est.name == "within", values)
    return serial_result(sums)


def serial_result(sums: dict) -> dict:
    """The test from the sums of :func:`bigpanel.sqlbuild.serial_pass_sql` (also used by
    the tests on sums computed elsewhere)."""
    out = {"coefficient": None, "std_error": None, "t_stat": None, "df": None, "p_value": None,
           "null_value": NO_SERIAL, "pairs": int(sums.get("t_n") or 0), "units": int(sums.get("n_groups") or 0),
           "variance": "cluster by unit", "reading": "", "unavailable": ""}
    g, n = out["units"], out["pairs"]
    if g < 2 or n < 3:
        out["unavailable"] = "fewer than two units with three consecutive periods"
        return out
    h = np.array([[sums["t_n"], sums["t_a"]], [sums["t_a"], sums["t_b"]]], dtype=float)
    rhs = np.array([sums["t_c"], sums["t_d"]], dtype=float)
    if not np.isfinite(h).all() or np.linalg.det(h) <= 1e-12 * h[0, 0] * max(h[1, 1], 1e-300):
        out["unavailable"] = "the lagged residuals do not vary"
        return out
    beta = np.linalg.solve(h, rhs)
    b0, b1 = beta

    def x(a: str, b: str) -> float:
        return float(sums.get(f"x_{a}_{b}", sums.get(f"x_{b}_{a}", 0.0)))

    # unit score s_i = (c - n b0 - a b1, d - a b0 - b b1); the meat is sum_i s_i s_i'
    first = {"c": 1.0, "n": -b0, "a": -b1}
    second = {"d": 1.0, "a": -b0, "b": -b1}
    meat = np.zeros((2, 2))
    for i, u in enumerate((first, second)):
        for j, v in enumerate((first, second)):
            meat[i, j] = sum(cu * cv * x(a, b) for a, cu in u.items() for b, cv in v.items())
    inverse = np.linalg.inv(h)
    factor = g / (g - 1) * (n - 1) / (n - 2) if n > 2 else float("nan")
    v = factor * inverse @ meat @ inverse
    se = float(np.sqrt(v[1, 1])) if v[1, 1] > 0 else float("nan")
    t = (b1 - NO_SERIAL) / se if se > 0 else float("nan")
    p = 2 * float(scipy.special.stdtr(g - 1, -abs(t))) if np.isfinite(t) else float("nan")
    out.update(coefficient=float(b1), std_error=se, t_stat=float(t), df=float(g - 1), p_value=p,
               reading=serial_reading(float(b1), p))
    return out


def serial_reading(coefficient: float, p: float) -> str:
    """What the test suggests for choosing between within and first differences."""
    if not p < LEVEL:
        return (f"No evidence at the {LEVEL:.0%} level against serially uncorrelated level errors: within is then the "
                "more efficient of the two estimators.")
    if coefficient > NO_SERIAL:
        return (f"At the {LEVEL:.0%} level the level errors look positively correlated over time; the nearer the "
                "coefficient is to 0 (errors close to a random walk), the more efficient first differences are than "
                "within. Keep cluster-robust errors with either.")
    return (f"At the {LEVEL:.0%} level the differenced errors are more negatively correlated than -0.5 (the level errors "
            "alternate in sign); within is then the more efficient of the two. Keep cluster-robust errors with either.")
