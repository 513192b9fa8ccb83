"""The scan plan: the moment requests of many models on one source, served by shared scans.

Models whose first request is a per-unit or per-row fold over levels or first differences
(pooled, within, first differences, without period effects) are grouped by their row
transform. Within a group the design columns are merged (one copy of each expression, or
two when models without a constant need it unshifted), models with the same columns share a sample, and one scan sums every
sample's cross-products (``shared_moments.sql``); a second scan gives every model's score
meat at its coefficients (``shared_scores.sql``). Each model keeps its own sample: the
rows on which its own columns are finite. Other models (period effects) run alone.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .design import Design
from .estimators import Estimator
from .requests import Nesting, Rows, Scores


@dataclass
class Member:
    """One model of a shared scan: its position, union column indices (outcome last) and sample."""

    index: int
    est: Estimator
    design: Design
    columns: tuple[int, ...]
    sample: int

    @property
    def rows(self) -> Rows:
        return self.est.rows(self.design)


@dataclass
class SharedScan:
    """Models served by the same two scans."""

    differenced: bool
    columns: list[tuple[str, int]] = field(default_factory=list)
    shifted: list[bool] = field(default_factory=list)  # per column: summed around a shift
    clusters: list[str] = field(default_factory=list)
    samples: list[tuple[int, ...]] = field(default_factory=list)
    members: list[Member] = field(default_factory=list)

    def add(self, index: int, est: Estimator, design: Design) -> None:
        idx = []
        keys = list(zip(self.columns, self.shifted))
        for col in design.sql_columns:
            key = (col, est.shifted())  # a model without a constant sums its columns unshifted
            if key not in keys:
                keys.append(key)
                self.columns.append(col)
                self.shifted.append(key[1])
            idx.append(keys.index(key))
        for c in est.spec.cluster:
            if c not in self.clusters:
                self.clusters.append(c)
        sample = tuple(sorted(set(idx)))
        if sample not in self.samples:
            self.samples.append(sample)
        self.members.append(Member(index, est, design, tuple(idx), self.samples.index(sample)))

    @property
    def rows(self) -> Rows:
        return Rows(tuple(self.columns), tuple(self.clusters), self.differenced)

    def nesting_checks(self) -> list[tuple[int, int]]:
        """(sample, cluster position) pairs whose nesting in units a model needs to know."""
        out = []
        for m in self.members:
            spec = m.est.spec
            if spec.variance != "cluster":
                continue
            for c in spec.cluster:
                pair = (m.sample, self.clusters.index(c))
                if c != spec.unit and pair not in out:
                    out.append(pair)
        return out


@dataclass
class ScanPlan:
    shared: list[SharedScan]
    alone: list[int]  # models that run their own passes

    @classmethod
    def build(cls, prepared: list[tuple[Estimator, Design]]) -> "ScanPlan":
        groups: dict[bool, SharedScan] = {}
        alone = []
        for i, (est, design) in enumerate(prepared):
            if not est.shares:
                alone.append(i)
                continue
            groups.setdefault(est.differenced, SharedScan(est.differenced)).add(i, est, design)
        return cls(list(groups.values()), alone)


def member_params(member: Member, shifts: np.ndarray, scales: np.ndarray) -> tuple[np.ndarray, dict]:
    """The model's own shifts, and its shift and scale parameters (its columns' order)."""
    own, own_scales = shifts[list(member.columns)], scales[list(member.columns)]
    return own, {f"s{j}": float(v) for j, v in enumerate(own)} | {f"d{j}": float(v) for j, v in enumerate(own_scales)}


def prefill(executor, scan: SharedScan, totals: dict) -> None:
    """Record what the shared scan counted, so the models' own steps read no rows."""
    executor.set_totals(totals["n_rows"], (totals["lo"], totals["hi"]))
    for m in scan.members:
        rows = m.rows
        counts = {"n_rows": totals["n_rows"], "missing": totals[f"miss{m.sample}"]}
        if scan.differenced:
            counts.update({k: totals[k] for k in ("first_of_unit", "after_gap", "duplicate_keys")})
        executor.set_row_counts(rows, counts)
    for s, c in scan.nesting_checks():
        for m in scan.members:
            spec = m.est.spec
            for i, name in enumerate(spec.cluster if m.sample == s else ()):
                if scan.clusters.index(name) == c:
                    executor.set_nested(Nesting(m.rows, i), int(totals[f"mixed{s}_{c}"] or 0) == 0)


def pattern_totals(scan: SharedScan, tables: list[list[dict]]) -> dict:
    """The shared scan's totals per sample (the keys the estimators read: ``n{s}``,
    ``tot_s{s}_{j}``, ``tot_p{s}_{j}_{l}``, ``tot_w{s}_{j}_{l}``, ...) from the rows of
    ``shared_moments.sql``, one table per chunk. A row adds to sample s when its pattern
    covers s (part 0 and the row counts of part 2) or it is s's own (part 1). Sums of
    doubles are added with ``math.fsum`` (exactly rounded: the order of rows cannot
    change them)."""
    from .sqlbuild import PATTERN_BITS, sample_pairs

    rows = [r for table in tables for r in table]
    n_samples = len(scan.samples)
    clusters = sorted({c for _, c in scan.nesting_checks()})
    pairs = sample_pairs(scan.samples)

    def covers(r: dict, s: int) -> bool:
        if r["part"] == 1:
            return r["sid"] == s
        return r["why"] == 0 and (r[f"pat{s // PATTERN_BITS}"] >> (s % PATTERN_BITS)) & 1 == 1

    def lowest(values):
        values = [v for v in values if v is not None]
        return min(values) if values else None

    def highest(values):
        values = [v for v in values if v is not None]
        return max(values) if values else None

    def total(group, key):
        values = [r[key] for r in group if r[key] is not None]
        return math.fsum(values) if values else None

    counted = [r for r in rows if r["part"] == 2]
    out = {"n_rows": sum(int(r["t_n"]) for r in counted), "lo": lowest(r["t_lo"] for r in counted),
           "hi": highest(r["t_hi"] for r in counted)}
    if scan.differenced:
        for why, key in ((1, "first_of_unit"), (2, "after_gap"), (3, "duplicate_keys")):
            out[key] = sum(int(r["t_n"]) for r in counted if r["why"] == why)
    summed = [r for r in rows if r["part"] in (0, 1)]
    for s, cols in enumerate(scan.samples):
        mine = [r for r in summed if covers(r, s)]
        wide = [r for r in mine if r["w"]]
        narrow = [r for r in mine if not r["w"]]
        out[f"miss{s}"] = sum(int(r["t_n"]) for r in counted if r["why"] == 0 and not covers(r, s))
        out[f"n{s}"] = sum(int(r["t_n"]) for r in mine)
        out[f"units{s}"] = sum(int(r["t_units"]) for r in mine)
        out[f"wunits{s}"] = sum(int(r["t_groups"]) for r in wide)
        out[f"single{s}"] = sum(int(r["t_groups"]) for r in narrow)
        out[f"wn{s}"] = sum(int(r["t_n"]) for r in wide)
        out[f"single_rows{s}"] = sum(int(r["t_n"]) for r in narrow)
        out[f"tlo{s}"], out[f"thi{s}"] = lowest(r["t_lo"] for r in mine), highest(r["t_hi"] for r in mine)
        out[f"wtlo{s}"], out[f"wthi{s}"] = lowest(r["t_lo"] for r in wide), highest(r["t_hi"] for r in wide)
        for j in cols:
            out[f"tot_s{s}_{j}"] = total(mine, f"t_s{j}")
        for j, l in pairs:
            if j in cols and l in cols:
                out[f"tot_p{s}_{j}_{l}"] = total(mine, f"t_p{j}_{l}")
                out[f"tot_w{s}_{j}_{l}"] = total(wide, f"t_w{j}_{l}")
        for c in clusters:
            out[f"mixed{s}_{c}"] = sum(int(r[f"t_mixed{c}"] or 0) for r in mine)
    return out


def score_models(scan: SharedScan, requests: list[tuple[int, Scores, int, int]]) -> tuple[list[dict], list, dict]:
    """Per request: the builder's model dict, the grouping sets, and the parameters."""
    keys_of = {scan.members[i].index: scan.members[i] for i in range(len(scan.members))}
    models, sets, values = [], [], {}
    for m, (index, req, k, n_clusters) in enumerate(requests):
        member = keys_of[index]
        cols = member.columns
        models.append({"sample": member.sample, "x": cols[:-1], "y": cols[-1], "constant": req.constant,
                       "demean": req.demean, "hc1": req.kind == "rows"})
        for key, v in req.values:
            if key.startswith("b") and key != "b_one":
                values[f"b{m}_{key[1:]}"] = v
        if req.constant:
            values[f"one{m}"] = dict(req.values)["b_one"]
        for s in request_sets(scan, member, req):
            if s not in sets:
                sets.append(s)
    return models, sets, values


def request_sets(scan: SharedScan, member: Member, req: Scores) -> list[tuple[str, ...]]:
    """The grouping sets a score request reads, in the order the meats are returned."""
    spec = member.est.spec
    if req.kind == "rows":
        return [()]
    if req.kind == "units":
        return [("k_unit",)]
    names = [f"k_c{scan.clusters.index(c)}" for c in spec.cluster]
    if len(names) == 1:
        return [tuple(names)]
    return [(names[0],), (names[1],), tuple(names)]
