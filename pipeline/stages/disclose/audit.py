"""Disclosure audit over everything a period publishes, read together.

The per-table step (:mod:`pipeline.stages.disclose.suppression`) protects each table against its own totals and
one related table. A reader has every published table of the period at once, and the report
built from them, and combines them. This module audits that joint system and blanks more where
it gives a blanked count away.

**What the reader is assumed to know** (the joint system):

* every published count of every table in schema ``published`` for the period, found there (a
  new table is covered without being declared here; its keys are its text columns, its counts
  its integer columns, its totals the rows marked 'ALL');
* the margins each table implies: a row marked 'ALL' in a level (district; sex and age band;
  any key column whose 'ALL' rows are the same) is the sum of the rows below it in that level;
* the sums between tables declared in :data:`pipeline.warehouse.catalog.PUBLISHED_TABLES` (categories
  adding up to the prevalence table's persons_ckd, the G3a to G5 rows to persons_ckd_g3_g5: the
  "CKD G3a–G5" figure of the report), and any count published under the same name in two tables
  for the same district (persons_tested of the categories and prevalence tables);
* the order of counts within a row (:data:`ROW_ORDER`: persons_ckd_g3_g5 <= persons_ckd <=
  persons_tested; with_egfr_and_acr <= with_egfr, with_acr <= persons_with_diabetes and
  with_egfr + with_acr - with_egfr_and_acr <= persons_with_diabetes; decline 57 % <= 40 % <=
  30 % <= persons_tested);
* that a blank is at least 1 (zeros are published), and nothing about why a cell is blank: the
  published tables carry one mark for every blank (:data:`MARK`); which blanks are primary
  stays in the internal table ``disclosure_cells``;
* for every published age-standardised rate, each broad age group's count lies between the
  least and greatest value of the integer splits of the district's published count that give
  the published rate and interval back at their rounding (:func:`rate_splits`).

A relation is used only where it holds on the internal counts (a sum that does not hold is not
one a reader could rely on). The report's tables, charts and headline cards are drawn from
these tables alone (``pipeline/report/page.py`` refuses any other), so they add nothing.

**The rule**, for every blanked count that is not zero: the tightest interval [lo, hi] a reader
can derive, by linear programming over the joint system (``scipy.optimize.linprog``, HiGHS:
least and greatest value), must not lie within ``suppress_min``..``suppress_max`` (1 to 10) and
must be at least ``protection_width`` (default 10) wide. Linear programming gives the real
range; the integer range can be narrower where the system is not a network (with the row
orders it need not be): the bounds are rounded inwards to integers, which closes most of that
gap but not all (a stated limit).

**Where the rule fails**, more is blanked (complementary suppression over the joint system):
the published counts that share a sum or an order with the failing cell, in its own table first,
smallest first; the first that makes it pass, else the one that widens it most. A standardised
rate that pins a broad group's count is rounded coarser or blanked before any count is
(:func:`protect_rates`). When nothing can be blanked next to a failing cell, its column is
blanked whole in its table; when even that fails, the table is withheld for the period (no rows
published) with the reason, and the run ends with exit code 1. Rates of a row whose source count
is blanked are blanked with it.

**Consecutive periods.** Prevalence counts are stocks at each period end and no change between
periods is published, so last period's tables and this period's do not combine into an equation
for a blanked cell: a reader learns only that a district's count moved, which tells nothing
finer than the two published totals. Were a column ``<count>_change`` ever published, a cell
blanked this period whose last published value and published change are both known would be
given back: :func:`audit` blanks such a change (checked against the previous period's
published rows).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import polars as pl
from scipy.optimize import linprog
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import connected_components

from pipeline.core.settings import DisclosureSettings

TOTAL = "ALL"
MARK = "suppressed"  # the one mark every published row with a blank carries
CHANGE_SUFFIX = "_change"
_NOT_COUNTS = {
    "n_suppressed",
    "revision",
}  # revision: the release number (pipeline/run/revisions.py)
_TRIES = 10  # published counts tried one by one for a failing cell (bound propagation each)

#: Orders within one row of a table, each "sum(coef * column) <= 0", used where they hold.
ROW_ORDER: tuple[tuple[str, dict[str, int]], ...] = (
    ("district_ckd_prevalence", {"persons_ckd_g3_g5": 1, "persons_ckd": -1}),
    ("district_ckd_prevalence", {"persons_ckd": 1, "persons_tested": -1}),
    ("district_screening_coverage", {"with_egfr_and_acr": 1, "with_egfr": -1}),
    ("district_screening_coverage", {"with_egfr_and_acr": 1, "with_acr": -1}),
    ("district_screening_coverage", {"with_egfr": 1, "persons_with_diabetes": -1}),
    ("district_screening_coverage", {"with_acr": 1, "persons_with_diabetes": -1}),
    ("district_screening_coverage",
     {"with_egfr": 1, "with_acr": 1, "with_egfr_and_acr": -1, "persons_with_diabetes": -1}),
    ("district_decline_incidence", {"persons_decline_57": 1, "persons_decline_40": -1}),
    ("district_decline_incidence", {"persons_decline_40": 1, "persons_decline_30": -1}),
    ("district_decline_incidence", {"persons_decline_30": 1, "persons_tested": -1}),
    ("district_ckd_categories", {"persons_ckd": 1, "persons_tested": -1}),
)  # fmt: skip


class AuditFailure(ValueError):
    """A published table that the audit could not make safe (it is withheld)."""


# --------------------------------------------------------------------------- tables


@dataclass
class AuditTable:
    """One published table of the period: what is published and the internal counts behind it.

    ``published`` and ``internal`` have the same rows in the same order. ``marks`` holds the
    internal reason per blanked count (primary, secondary, withheld; audit for those blanked
    here), keyed by column.
    """

    name: str
    published: pl.DataFrame
    internal: pl.DataFrame
    keys: list[str]
    counts: list[str]
    levels: list[tuple[str, ...]]
    rates: dict[str, tuple[str, ...]] = field(default_factory=dict)
    group_rates: dict[str, tuple[str, ...]] = field(default_factory=dict)
    standardised: object | None = None  # pipeline.warehouse.catalog.Standardised
    marks: dict[str, list[str]] = field(default_factory=dict)
    withheld_reason: str | None = None
    #: Columns shown as another table publishes them (never blanked here on their own).
    copied: tuple[str, ...] = ()
    copied_from: object | None = None  # pipeline.warehouse.catalog.TotalsFrom

    def __post_init__(self) -> None:
        self.values = {c: self.published[c].to_list() for c in self.counts}
        self.truth = {c: self.internal[c].to_list() for c in self.counts}
        for c in self.counts:
            self.marks.setdefault(c, [""] * self.published.height)
        self.key_rows = (
            self.published.select(self.keys).rows() if self.keys else [()] * self.published.height
        )

    @property
    def n(self) -> int:
        return self.published.height

    def blank(self, column: str, row: int) -> bool:
        return self.values[column][row] is None and self.truth[column][row] is not None

    def describe(self, column: str, row: int) -> str:
        where = ", ".join(
            f"{k}={v}" for k, v in zip(self.keys, self.key_rows[row], strict=False) if k != "period"
        )
        return f"{self.name}.{column} ({where})"


def infer_levels(frame: pl.DataFrame, keys: Sequence[str]) -> list[tuple[str, ...]]:
    """Key columns that are 'ALL' on exactly the same rows form one level of totals."""
    by_rows: dict[tuple[int, ...], list[str]] = {}
    for k in keys:
        if k == "period":
            continue
        rows = tuple(i for i, v in enumerate(frame[k].to_list()) if v == TOTAL)
        if rows:
            by_rows.setdefault(rows, []).append(k)
    return [tuple(cols) for cols in by_rows.values()]


def table_from_frames(name: str, published: pl.DataFrame, internal: pl.DataFrame,
                      spec: object | None = None, marks: Mapping[str, list[str]] | None = None) -> AuditTable:  # fmt: skip
    """An :class:`AuditTable` from a declared table (``spec``, a PublishedTable) or, for a table
    not declared, from its columns: text columns are keys, integer columns counts.
    """
    public = set(getattr(spec, "public", ()) or ())
    if spec is not None:
        keys = list(spec.keys)
        counts = [c for c in spec.counts if c in published.columns]
        counts += (
            [c for c in getattr(spec.totals, "copied", ()) if c in published.columns]
            if spec.totals
            else []
        )
        levels = [tuple(level) for level in spec.levels] or infer_levels(published, keys)
        rates, group_rates, standardised = (
            dict(spec.rates),
            dict(spec.group_rates),
            spec.standardised,
        )
    else:
        keys = [c for c, t in published.schema.items() if t == pl.String and c != "suppression"]
        counts = [c for c, t in published.schema.items()
                  if t.is_integer() and c not in _NOT_COUNTS and c not in public]  # fmt: skip
        levels = infer_levels(published, keys)
        rates, group_rates, standardised = {}, {}, None
    copied = (
        tuple(c for c in getattr(spec.totals, "copied", ()) if c in counts)
        if spec and spec.totals
        else ()
    )
    return AuditTable(name, published, internal, keys, counts, levels, rates, group_rates, standardised,
                      {c: list(v) for c, v in (marks or {}).items() if c in counts}, None, copied,
                      spec.totals if copied else None)  # fmt: skip


# --------------------------------------------------------------------------- the joint system


class _System:
    """Every count of every published table as a variable: a published count is fixed at its
    value, a blanked one lies in [1, inf) (a zero in [0, inf)). Every relation is a row of
    ``A x <= 0`` (a sum is two rows). Blanking a count only widens its bounds, so the system is
    built once per audit.
    """

    def __init__(self) -> None:
        self.cells: list[
            tuple[str, str, int]
        ] = []  # variable -> (table, column, row); ("", "", -1) extra
        self.index: dict[tuple[str, str, int], int] = {}
        self.truth: list[float] = []
        self.lower: list[float] = []
        self.upper: list[float] = []
        self.rows: list[dict[int, float]] = []  # each: sum(coef * x) <= 0
        self.rate_vars: dict[tuple[str, int], list[int]] = {}  # standardised rate -> its group sums

    def variable(
        self, truth: float, lower: float, upper: float, cell: tuple[str, str, int] | None = None
    ) -> int:
        self.truth.append(float(truth))
        self.lower.append(float(lower))
        self.upper.append(float(upper))
        self.cells.append(cell or ("", "", -1))
        if cell is not None:
            self.index[cell] = len(self.truth) - 1
        return len(self.truth) - 1

    def blank(self, var: int) -> None:
        self.lower[var] = 0.0 if self.truth[var] == 0 else 1.0
        self.upper[var] = math.inf

    def is_blank(self, var: int) -> bool:
        return self.cells[var][2] >= 0 and self.lower[var] != self.upper[var]

    def checked(self) -> list[int]:
        """Blanked counts the rule applies to (not zeros)."""
        lower, upper = self.lower, self.upper
        return [v for v in self.positive() if lower[v] != upper[v]]

    def positive(self) -> list[int]:
        if getattr(self, "_positive", None) is None or len(self._positive_of) != len(self.truth):
            self._positive_of = list(self.truth)
            self._positive = [
                v
                for v, (c, t) in enumerate(zip(self.cells, self.truth, strict=False))
                if c[2] >= 0 and t > 0
            ]
        return self._positive

    def matrix(self) -> csr_matrix:
        data, ri, ci = [], [], []
        for i, coefs in enumerate(self.rows):
            for v, c in coefs.items():
                data.append(c)
                ri.append(i)
                ci.append(v)
        return csr_matrix((data, (ri, ci)), shape=(len(self.rows), len(self.truth)))


def _add_relation(
    system: _System, terms: list[tuple[AuditTable, str, int, float]], kind: str
) -> None:
    """sum(coef * cell) == 0 (kind 'eq') or <= 0 ('ub'), kept only when it holds on the internal
    counts.
    """
    truth = 0.0
    coefs: dict[int, float] = {}
    for table, column, row, coef in terms:
        var = system.index.get((table.name, column, row))
        if var is None:
            return
        truth += coef * system.truth[var]
        coefs[var] = coefs.get(var, 0.0) + coef
    if kind == "eq" and abs(truth) > 1e-9 or kind == "ub" and truth > 1e-9:
        return  # not a relation of these counts
    coefs = {v: c for v, c in coefs.items() if c}
    if not coefs:
        return
    system.rows.append(coefs)
    if kind == "eq":
        system.rows.append({v: -c for v, c in coefs.items()})


def build_system(tables: Mapping[str, AuditTable], relations: Sequence = (),
                 rate_bounds: Mapping[tuple[str, int], Mapping[str, tuple[int, int]]] | None = None) -> _System:  # fmt: skip
    """The joint system of everything published (module docstring)."""
    system = _System()
    for t in tables.values():
        for column in t.counts:
            for row in range(t.n):
                truth = t.truth[column][row]
                if truth is None:
                    continue
                value = t.values[column][row]
                var = system.variable(truth, value or 0, value or 0, (t.name, column, row))
                if value is None:
                    system.blank(var)
    for t in tables.values():
        _table_sums(system, t)
        for name, order in ROW_ORDER:
            if name == t.name and all(c in t.counts for c in order):
                for row in range(t.n):
                    _add_relation(system, [(t, c, row, float(k)) for c, k in order.items()], "ub")
    _cross_sums(system, tables, relations)
    _same_counts(system, tables)
    if rate_bounds:
        _rate_groups(system, tables, rate_bounds)
    return system


def _table_sums(system: _System, t: AuditTable) -> None:
    """Each row marked 'ALL' in a level is the sum of the rows that agree with it elsewhere and are
    not 'ALL' in that level.
    """
    position = {k: i for i, k in enumerate(t.keys)}
    for level in t.levels:
        inside = [position[c] for c in level if c in position]
        outside = [i for i in range(len(t.keys)) if i not in inside]
        children: dict[tuple, list[int]] = {}
        totals: dict[tuple, int] = {}
        for row, key in enumerate(t.key_rows):
            head = tuple(key[i] for i in outside)
            marks = [key[i] == TOTAL for i in inside]
            if all(marks):
                totals[head] = row
            elif not any(marks):
                children.setdefault(head, []).append(row)
        for head, total in totals.items():
            rows = children.get(head)
            if not rows:
                continue
            for column in t.counts:
                _add_relation(
                    system, [(t, column, total, -1.0)] + [(t, column, r, 1.0) for r in rows], "eq"
                )


def _cross_sums(system: _System, tables: Mapping[str, AuditTable], relations) -> None:
    """Declared sums between tables: rows of ``table`` (``where``) per ``join`` add up to the
    total row (``row``) of ``other``.
    """
    for name, column, other_name, where, join, row_marks, total in relations:
        t, o = tables.get(name), tables.get(other_name)
        if t is None or o is None or column not in t.counts or total not in o.counts:
            continue
        o_rows = {}
        for r in range(o.n):
            key = dict(zip(o.keys, o.key_rows[r], strict=False))
            if all(key.get(k) == v for k, v in row_marks.items()):
                o_rows[tuple(key.get(j) for j in join)] = r
        members: dict[tuple, list[int]] = {}
        for r in range(t.n):
            key = dict(zip(t.keys, t.key_rows[r], strict=False))
            if all(key.get(k) in allowed for k, allowed in where.items()):
                members.setdefault(tuple(key.get(j) for j in join), []).append(r)
        for key, rows in members.items():
            if key in o_rows:
                _add_relation(
                    system,
                    [(o, total, o_rows[key], -1.0)] + [(t, column, r, 1.0) for r in rows],
                    "eq",
                )


def _same_counts(system: _System, tables: Mapping[str, AuditTable]) -> None:
    """A count published under the same name in two tables for the same keys (the other table's
    further keys 'ALL'), equal on every such pair: the same number.
    """
    names = sorted(tables)
    for a_name in names:
        for b_name in names:
            a, b = tables[a_name], tables[b_name]
            if a is b:
                continue
            shared = [k for k in a.keys if k in b.keys]
            extra_b = [k for k in b.keys if k not in shared]
            if not shared:
                continue
            b_rows = {}
            for r in range(b.n):
                key = dict(zip(b.keys, b.key_rows[r], strict=False))
                if all(key[k] == TOTAL for k in extra_b):
                    b_rows[tuple(key[k] for k in shared)] = r
            for column in sorted(set(a.counts) & set(b.counts)):
                pairs = []
                for r in range(a.n):
                    key = dict(zip(a.keys, a.key_rows[r], strict=False))
                    other = b_rows.get(tuple(key[k] for k in shared))
                    if other is not None:
                        pairs.append((r, other))
                if not pairs or any(a.truth[column][r] != b.truth[column][o] for r, o in pairs):
                    continue
                for r, o in pairs:
                    _add_relation(system, [(a, column, r, 1.0), (b, column, o, -1.0)], "eq")


def _rate_groups(system: _System, tables: Mapping[str, AuditTable],
                 rate_bounds: Mapping[tuple[str, int], Mapping[str, tuple[int, int]]]) -> None:  # fmt: skip
    """A published standardised rate bounds its broad groups' counts (sums of cells)."""
    for (name, total_row), groups in rate_bounds.items():
        t = tables.get(name)
        if t is None or t.standardised is None or t.standardised.group not in t.internal.columns:
            continue
        column, label = t.standardised.count, t.internal[t.standardised.group].to_list()
        head = _head(t, total_row)
        for group, (low, high) in groups.items():
            rows = [
                r for r in range(t.n) if label[r] == group and (head is None or _head(t, r) == head)
            ]
            cells = [
                system.index[(name, column, r)] for r in rows if (name, column, r) in system.index
            ]
            truth = sum(system.truth[v] for v in cells)
            var = system.variable(truth, float(low), float(high))
            system.rate_vars.setdefault((name, total_row), []).append(var)
            coefs = {var: -1.0} | {v: 1.0 for v in cells}
            system.rows.append(coefs)
            system.rows.append({v: -c for v, c in coefs.items()})


def _head(t: AuditTable, row: int) -> str | None:
    """The district of a row (None for the region's total: every cell)."""
    district = dict(zip(t.keys, t.key_rows[row], strict=False)).get("district_code")
    return None if district == TOTAL else district


# --------------------------------------------------------------------------- intervals


def _ok(low: float, high: float, rules: DisclosureSettings) -> bool:
    within_band = low >= rules.suppress_min and high <= rules.suppress_max
    return not within_band and high - low >= rules.protection_width


def propagate(
    a: csr_matrix, lower: Sequence[float], upper: Sequence[float]
) -> tuple[np.ndarray, np.ndarray]:
    """Outer bounds of every variable from ``A x <= 0`` by bound propagation (integer variables:
    bounds rounded inwards). Sound: the range a reader can derive lies inside them.
    """
    lo = np.array(lower, dtype=float)
    hi = np.array(upper, dtype=float)
    if a.nnz == 0:
        return lo, hi
    coo = a.tocoo()
    r, j, c = coo.row, coo.col, coo.data
    nrows = a.shape[0]
    pos = c > 0
    for _ in range(500):
        contrib = np.where(pos, c * lo[j], c * hi[j])  # least value of each term
        inf = np.isinf(contrib)
        finite = np.where(inf, 0.0, contrib)
        row_sum = np.bincount(r, weights=finite, minlength=nrows)
        row_inf = np.bincount(r, weights=inf.astype(float), minlength=nrows)
        others_inf = row_inf[r] - inf
        residual = row_sum[r] - finite  # least value of the other terms
        usable = others_inf == 0
        bound = -residual / c
        new_hi = hi.copy()
        new_lo = lo.copy()
        np.minimum.at(new_hi, j[usable & pos], np.floor(bound[usable & pos] + 1e-9))
        np.maximum.at(new_lo, j[usable & ~pos], np.ceil(bound[usable & ~pos] - 1e-9))
        if np.any(new_lo > new_hi + 1e-6):
            raise AuditFailure("the published figures are inconsistent (bounds cross)")
        if np.array_equal(new_lo, lo) and np.array_equal(new_hi, hi):
            break
        lo, hi = new_lo, new_hi
    return lo, hi


def _components(system: _System, a: csr_matrix) -> tuple[np.ndarray, np.ndarray]:
    """Component label per variable and per row, linking only variables that are not fixed."""
    free = np.array([system.lower[v] != system.upper[v] for v in range(len(system.truth))])
    n, m = a.shape[1], a.shape[0]
    coo = a.tocoo()
    keep = free[coo.col]
    rows_k, cols_k = coo.row[keep], coo.col[keep]
    graph = csr_matrix((np.ones(len(rows_k)), (cols_k, n + rows_k)), shape=(n + m, n + m))
    _, labels = connected_components(graph, directed=False)
    return labels[:n], labels[n:]


_BANNER_SHOWN = False


def _new_highs(highspy: object) -> object:
    """A silent HiGHS instance. The first one of a process prints a banner on the C stdout, which
    would land in the CLI's output: it goes to /dev/null.
    """
    global _BANNER_SHOWN
    if _BANNER_SHOWN:
        h = highspy.Highs()
    else:
        import os
        import sys

        sys.stdout.flush()
        saved = os.dup(1)
        try:
            with open(os.devnull, "w") as null:
                os.dup2(null.fileno(), 1)
                h = highspy.Highs()
        finally:
            os.dup2(saved, 1)
            os.close(saved)
        _BANNER_SHOWN = True
    h.setOptionValue("output_flag", False)
    return h


class _Model:
    """One part of the system as a HiGHS linear program (``A x <= b``), solved again and again
    with another objective from the last basis (warm start: about a millisecond a solve).
    """

    def __init__(self, a: csr_matrix, b: np.ndarray, lower: np.ndarray, upper: np.ndarray):
        import highspy

        self._highspy = highspy
        self.h = _new_highs(highspy)
        csc = a.tocsc()
        lp = highspy.HighsLp()
        lp.num_col_, lp.num_row_ = csc.shape[1], csc.shape[0]
        lp.col_cost_ = np.zeros(csc.shape[1])
        lp.col_lower_ = np.asarray(lower, dtype=float)
        lp.col_upper_ = np.where(np.isinf(upper), highspy.kHighsInf, upper).astype(float)
        lp.row_lower_ = np.full(csc.shape[0], -highspy.kHighsInf)
        lp.row_upper_ = np.asarray(b, dtype=float)
        lp.a_matrix_.format_ = highspy.MatrixFormat.kColwise
        lp.a_matrix_.start_, lp.a_matrix_.index_, lp.a_matrix_.value_ = (
            csc.indptr,
            csc.indices,
            csc.data,
        )
        lp.a_matrix_.num_col_, lp.a_matrix_.num_row_ = csc.shape[1], csc.shape[0]
        self.h.passModel(lp)
        self.cost: dict[int, float] = {}

    def solve(self, cost: dict[int, float]) -> tuple[str, float, np.ndarray]:
        """Minimise sum(cost * x): ('optimal', value, x) or ('unbounded', -inf, [])."""
        for j in self.cost:
            if j not in cost:
                self.h.changeColCost(j, 0.0)
        for j, c in cost.items():
            self.h.changeColCost(j, c)
        self.cost = dict(cost)
        self.h.run()
        status = self.h.getModelStatus()
        states = self._highspy.HighsModelStatus
        if status == states.kOptimal:
            return (
                "optimal",
                self.h.getInfo().objective_function_value,
                np.asarray(self.h.getSolution().col_value),
            )
        if status in (states.kUnbounded, states.kUnboundedOrInfeasible):
            return "unbounded", -math.inf, np.zeros(0)
        raise AuditFailure(
            f"the published figures are inconsistent ({self.h.modelStatusToString(status)})"
        )


def _solve_part(system: _System, rules: DisclosureSettings, a: csr_matrix, rows: np.ndarray, lo: np.ndarray,
                hi: np.ndarray, wanted: list[int], exact: bool) -> dict[int, tuple[float, float]]:  # fmt: skip
    """The counts of one part of the system that fail the rule, by linear programming."""
    failing: dict[int, tuple[float, float]] = {}
    in_rows = a[rows]
    touched = np.unique(in_rows.indices)
    fixed = touched[lo[touched] == hi[touched]]  # known (published, or pinned): constants
    used = touched[lo[touched] != hi[touched]]
    b = -(in_rows[:, fixed] @ lo[fixed]) if fixed.size else np.zeros(rows.size)
    local = {int(v): i for i, v in enumerate(used)}
    model = _Model(in_rows[:, used], b, lo[used], hi[used])
    seen_lo = {v: system.truth[v] for v in wanted}
    seen_hi = dict(seen_lo)
    unbounded: set[int] = set()

    def solve(weights: dict[int, float]) -> tuple[str, float]:
        status, value, x = model.solve({local[v]: w for v, w in weights.items()})
        if status == "optimal":
            for v in wanted:
                seen_lo[v], seen_hi[v] = min(seen_lo[v], x[local[v]]), max(seen_hi[v], x[local[v]])
        return status, value

    def cleared(v: int) -> bool:
        return not exact and (v in unbounded or _ok(math.ceil(seen_lo[v] - 1e-6), math.floor(seen_hi[v] + 1e-6),
                                                     rules))  # fmt: skip

    if not exact:
        for _ in range(4):
            open_ = [v for v in wanted if not cleared(v)]
            if len(open_) < 3:
                break
            for sign in (-1.0, 1.0):
                solve({v: sign for v in open_})
    for v in wanted:
        if cleared(v):
            continue
        status, low_value = solve({v: 1.0})
        if cleared(v):
            continue
        status, high_value = solve({v: -1.0})
        if status == "unbounded":
            unbounded.add(v)
            high_value = math.inf
        else:
            high_value = -high_value
        low_i = math.ceil(low_value - 1e-6)
        high_i = high_value if high_value == math.inf else math.floor(high_value + 1e-6)
        if not _ok(low_i, high_i, rules):
            failing[v] = (low_i, high_i)
    return failing


def failing_cells(system: _System, rules: DisclosureSettings, only: Sequence[int] | None = None,
                  exact: bool = False, a: csr_matrix | None = None,
                  passed: set[int] | None = None, outer_only: bool = False) -> dict[int, tuple[float, float]]:  # fmt: skip
    """Blanked counts that fail the rule, with the interval found (integer-rounded).

    Bound propagation first: its bounds hold every value a reader can derive, so a count they
    already confine fails. The rest by linear programming over its part of the system; the
    internal counts and every solution are feasible points, and a count is cleared as soon as
    two of them are far enough apart (``exact``: solve each count's least and greatest value).
    """
    a = system.matrix() if a is None else a
    if only is None:
        targets = system.checked()
    else:
        targets = [v for v in only if system.is_blank(v) and system.truth[v] > 0]
    if passed is not None:  # blanking more only widens: a count cleared once stays cleared
        targets = [v for v in targets if v not in passed]
    if not targets:
        return {}
    lo, hi = propagate(a, system.lower, system.upper)
    failing = {v: (lo[v], hi[v]) for v in targets if not _ok(lo[v], hi[v], rules)}
    if failing and not exact or outer_only:
        return failing
    rest = [v for v in targets if v not in failing]
    var_label, row_label = _components(system, a)
    by_part: dict[int, list[int]] = {}
    for v in rest:
        by_part.setdefault(int(var_label[v]), []).append(v)
    for label, wanted in by_part.items():
        rows = np.flatnonzero(row_label == label)
        if rows.size == 0:  # nothing bounds these counts but their own bounds
            for v in wanted:
                if not _ok(system.lower[v], system.upper[v], rules):
                    failing[v] = (system.lower[v], system.upper[v])
            continue
        failing.update(_solve_part(system, rules, a, rows, lo, hi, wanted, exact))
        if passed is not None:
            passed.update(v for v in wanted if v not in failing)
    return failing


# --------------------------------------------------------------------------- rates


def _blank_rates(t: AuditTable) -> None:
    """Rates of a row whose source count is blanked (for a group rate: or of a row below it)."""
    frame = t.published
    blank = {c: [v is None for v in t.values[c]] for c in t.counts}
    below = {c: list(b) for c, b in blank.items()}
    if t.group_rates:
        parent = _parents(t)
        for hit in below.values():
            for r in range(t.n):
                if hit[r]:
                    up = parent[r]
                    while up >= 0 and not hit[up]:
                        hit[up] = True
                        up = parent[up]
    updates = []
    for rates, hit in ((t.rates, blank), (t.group_rates, below)):
        for rate, sources in rates.items():
            if rate not in frame.columns or not all(s in hit for s in sources):
                continue
            mask = [any(hit[s][r] for s in sources) for r in range(t.n)]
            updates.append(
                pl.when(pl.Series(mask, dtype=pl.Boolean))
                .then(None)
                .otherwise(pl.col(rate))
                .alias(rate)
            )
    if not t.rates and not t.group_rates and t.standardised is None:
        # a table not declared: any decimal figure on a row with a blank goes with it
        row_blank = [
            any(blank[c][r] and t.truth[c][r] is not None for c in t.counts) for r in range(t.n)
        ]
        for c, dtype in frame.schema.items():
            if dtype.is_float():
                updates.append(
                    pl.when(pl.Series(row_blank, dtype=pl.Boolean))
                    .then(None)
                    .otherwise(pl.col(c))
                    .alias(c)
                )
    if updates:
        t.published = frame.with_columns(updates)


def _parents(t: AuditTable) -> list[int]:
    """Each row's nearest total (-1: none), by the table's levels."""
    parent = [-1] * t.n
    position = {k: i for i, k in enumerate(t.keys)}
    by_key = {key: r for r, key in enumerate(t.key_rows)}
    for r, key in enumerate(t.key_rows):
        for level in reversed(t.levels):  # innermost level first
            cols = [position[c] for c in level if c in position]
            if all(key[i] == TOTAL for i in cols):
                continue
            up = list(key)
            for i in cols:
                up[i] = TOTAL
            found = by_key.get(tuple(up))
            if found is not None:
                parent[r] = found
                break
    return parent


def finish(t: AuditTable) -> pl.DataFrame:
    """The publishable frame: counts as decided, rates on blanked counts blanked, one mark."""
    t.published = t.published.with_columns(
        [pl.Series(c, t.values[c], dtype=t.published.schema[c]) for c in t.counts]
    )
    _blank_rates(t)
    spec = t.standardised
    if spec is not None and spec.count in t.values:  # a rate whose count ended up blank goes too
        gone = pl.Series([v is None for v in t.values[spec.count]], dtype=pl.Boolean)
        cols = [c for c in spec.rates if c in t.published.columns]
        updates = [
            pl.when(gone & pl.col(c).is_not_null()).then(None).otherwise(pl.col(c)).alias(c)
            for c in cols
        ]
        if spec.flag in t.published.columns and cols:
            updates.append(pl.when(gone & pl.col(cols[0]).is_not_null()).then(pl.lit("suppressed"))
                           .otherwise(pl.col(spec.flag)).alias(spec.flag))  # fmt: skip
        t.published = t.published.with_columns(updates)
    row_blank = [
        sum(1 for c in t.counts if t.values[c][r] is None and t.truth[c][r] is not None)
        for r in range(t.n)
    ]
    columns = [
        pl.Series("n_suppressed", row_blank, dtype=pl.Int32),
        pl.Series("suppression", [MARK if k else "" for k in row_blank], dtype=pl.String),
    ]
    return t.published.with_columns(columns)


# --------------------------------------------------------------------------- standardised rates

_MAX_SPLITS = 3_000_000  # integer splits enumerated at most; above, a linear relaxation bounds them


def rate_splits(total: int, populations: Sequence[float], weights: Sequence[float], confidence: float,
                published: tuple[float, float | None, float | None], digits: int, per: float = 1000.0,
                ) -> np.ndarray | None:  # fmt: skip
    """Every split of ``total`` into the broad groups (rows of the result, one column per group)
    whose directly standardised rate and Fay-Feuer interval (:func:`pipeline.core.statistics.
    direct_standardised_rate`), rounded to ``digits``, are the ``published`` three. None when
    there are more than ``_MAX_SPLITS`` splits to try (:func:`rate_group_bounds` then bounds
    the groups by linear programming from the rate alone).
    """
    from pipeline.core.statistics import direct_standardised_rate

    n = np.asarray(populations, dtype=float)
    w = np.asarray(weights, dtype=float)
    k = len(n)
    free = [g for g in range(k) if n[g] > 0]
    if not free:
        return np.zeros((0, k), dtype=np.int64)
    if math.comb(total + len(free) - 1, len(free) - 1) > _MAX_SPLITS:
        return None
    grids = (
        np.indices((total + 1,) * (len(free) - 1)).reshape(len(free) - 1, -1).T
        if len(free) > 1
        else np.zeros((1, 0), dtype=np.int64)
    )
    grids = grids[grids.sum(axis=1) <= total]
    last = total - grids.sum(axis=1, keepdims=True)
    splits_free = np.hstack([grids, last]).astype(np.int64)
    splits = np.zeros((splits_free.shape[0], k), dtype=np.int64)
    splits[:, free] = splits_free
    a = np.where(n > 0, w / np.where(n > 0, n, 1) / w.sum(), 0.0)
    half = 0.5 * 10.0 ** (-digits) + 1e-9
    rate, low, high = published
    keep = np.abs(splits @ a * per - rate) <= half
    splits = splits[keep]
    if splits.shape[0] and (low is not None or high is not None):
        _, lo, hi = direct_standardised_rate(
            splits.astype(float), np.broadcast_to(n, splits.shape), w, confidence
        )
        ok = np.ones(splits.shape[0], dtype=bool)
        if low is not None:
            ok &= np.abs(np.atleast_1d(lo) * per - low) <= half
        if high is not None:
            ok &= np.abs(np.atleast_1d(hi) * per - high) <= half
        splits = splits[ok]
    return splits


def rate_group_bounds(total: int, populations: Sequence[float], weights: Sequence[float], confidence: float,
                      published: tuple[float, float | None, float | None], digits: int,
                      ) -> list[tuple[int, int]]:  # fmt: skip
    """[least, greatest] count per broad group a reader can get from the district's published
    count and its rate (and interval) at their rounding.
    """
    splits = rate_splits(total, populations, weights, confidence, published, digits)
    if splits is not None and splits.shape[0]:
        return [(int(splits[:, g].min()), int(splits[:, g].max())) for g in range(splits.shape[1])]
    n = np.asarray(populations, dtype=float)
    w = np.asarray(weights, dtype=float)
    k = len(n)
    a = np.where(n > 0, w / np.where(n > 0, n, 1) / w.sum(), 0.0) * 1000.0
    half = 0.5 * 10.0 ** (-digits) + 1e-9
    a_ub = np.vstack([a, -a])
    b_ub = np.array([published[0] + half, -(published[0] - half)])
    bounds = [(0, None if n[g] > 0 else 0) for g in range(k)]
    out = []
    for g in range(k):
        c = np.zeros(k)
        c[g] = 1.0
        lo = linprog(
            c,
            A_ub=a_ub,
            b_ub=b_ub,
            A_eq=np.ones((1, k)),
            b_eq=[total],
            bounds=bounds,
            method="highs",
        )
        hi = linprog(
            -c,
            A_ub=a_ub,
            b_ub=b_ub,
            A_eq=np.ones((1, k)),
            b_eq=[total],
            bounds=bounds,
            method="highs",
        )
        if lo.status != 0 or hi.status != 0:
            return [(0, total)] * k
        out.append((math.ceil(lo.fun - 1e-6), math.floor(-hi.fun + 1e-6)))
    return out


@dataclass(frozen=True)
class RateBasis:
    """What a standardised rate is made of: its groups' labels, standard weights and level."""

    groups: tuple[str, ...]
    weights: tuple[float, ...]
    confidence: float


def _pins(bounds: Sequence[tuple[int, int]], rules: DisclosureSettings) -> bool:
    return any(lo >= rules.suppress_min and hi <= rules.suppress_max for lo, hi in bounds)


def protect_rates(t: AuditTable, basis: RateBasis, rules: DisclosureSettings,
                  ) -> tuple[dict[int, dict[str, tuple[int, int]]], list[str]]:  # fmt: skip
    """Round coarser or blank each published standardised rate whose integer splits pin a broad
    group's count into ``suppress_min``..``suppress_max``. Returns the group bounds of the rates
    left published (by total row) and one note per rate changed.
    """
    spec = t.standardised
    if (
        spec is None
        or spec.rates[0] not in t.published.columns
        or spec.group not in t.internal.columns
    ):
        return {}, []
    rate_cols = [c for c in spec.rates if c in t.published.columns]
    values = {c: t.published[c].to_list() for c in rate_cols}
    flags = t.published[spec.flag].to_list() if spec.flag in t.published.columns else [None] * t.n
    label = t.internal[spec.group].to_list()
    population = (
        t.internal["population"].to_list() if "population" in t.internal.columns else [0] * t.n
    )
    internal = {c: t.internal[c].to_list() for c in rate_cols}
    out: dict[int, dict[str, tuple[int, int]]] = {}
    notes = []
    for row in range(t.n):
        if values[rate_cols[0]][row] is None:
            continue
        total = t.values[spec.count][row]
        if total is None:  # the count is blanked: so is its rate
            for c in rate_cols:
                values[c][row] = None
            flags[row] = "suppressed"
            continue
        head = _head(t, row)
        pops = []
        for g in basis.groups:
            pops.append(sum(float(population[r] or 0) for r in range(t.n)
                            if label[r] == g and (head is None or _head(t, r) == head)))  # fmt: skip
        low_col = rate_cols[1] if len(rate_cols) > 1 else None
        high_col = rate_cols[2] if len(rate_cols) > 2 else None
        chosen = None
        for digits in (2, 1, 0):
            figures = tuple(None if c is None or internal[c][row] is None else round(float(internal[c][row]), digits)
                            for c in (rate_cols[0], low_col, high_col))  # fmt: skip
            bounds = rate_group_bounds(
                int(total), pops, basis.weights, basis.confidence, figures, digits
            )
            if not _pins(bounds, rules):
                chosen = (digits, figures, bounds)
                break
        where = t.describe(spec.count, row)
        if chosen is None:
            for c in rate_cols:
                values[c][row] = None
            flags[row] = "suppressed"
            notes.append(
                f"{where}: standardised rate blanked (its integer splits pin an age group's count "
                f"into {rules.suppress_min}-{rules.suppress_max} at any rounding)"
            )
            continue
        digits, figures, bounds = chosen
        if digits < 2:
            for c, v in zip((rate_cols[0], low_col, high_col), figures, strict=False):
                if c is not None:
                    values[c][row] = v
            flags[row] = "rounded"
            notes.append(
                f"{where}: standardised rate rounded to {digits} decimal(s) (at 2 its integer splits "
                f"pin an age group's count into {rules.suppress_min}-{rules.suppress_max})"
            )
        out[row] = dict(zip(basis.groups, bounds, strict=False))
    updates = [pl.Series(c, values[c], dtype=t.published.schema[c]) for c in rate_cols]
    if spec.flag in t.published.columns:
        updates.append(pl.Series(spec.flag, flags, dtype=pl.String))
    t.published = t.published.with_columns(updates)
    return out, notes


def _drop_rate(t: AuditTable, row: int, note: list[str], reason: str) -> None:
    spec = t.standardised
    cols = [c for c in spec.rates if c in t.published.columns]
    updates = [
        pl.when(pl.int_range(pl.len()) == row).then(None).otherwise(pl.col(c)).alias(c)
        for c in cols
    ]
    if spec.flag in t.published.columns:
        updates.append(pl.when(pl.int_range(pl.len()) == row).then(pl.lit("suppressed"))
                       .otherwise(pl.col(spec.flag)).alias(spec.flag))  # fmt: skip
    t.published = t.published.with_columns(updates)
    note.append(f"{t.describe(spec.count, row)}: standardised rate blanked ({reason})")


# --------------------------------------------------------------------------- the audit


@dataclass
class AuditResult:
    frames: dict[str, pl.DataFrame]  # publishable rows per table (empty: withheld)
    withheld: dict[str, str]  # table -> reason
    notes: list[str]  # what the audit changed, in words
    added: int  # counts blanked by the audit


def _relations() -> list:
    """The declared sums between tables (:class:`pipeline.warehouse.catalog.TotalsFrom`)."""
    from pipeline.warehouse.catalog import PUBLISHED_TABLES

    out = []
    for spec in PUBLISHED_TABLES:
        if spec.totals is None:
            continue
        for part in spec.totals.partitions:
            out.append((spec.name, part.column, spec.totals.table, part.where, spec.totals.join,
                        spec.totals.row, part.total))  # fmt: skip
    return out


def _candidates(system: _System, a: csr_matrix, tables: Mapping[str, AuditTable], var: int,
                depth: int = 3, limit: int = 40) -> list[int]:  # fmt: skip
    """Published non-zero counts near ``var`` (sharing a sum or an order with it, then with those,
    ...): nearest first, then its own table, then smallest, then by key.
    """
    at = a.tocsc()
    own = system.cells[var][0]
    seen = {var}
    frontier = [var]
    found: list[tuple] = []
    for hop in range(depth):
        rows = set()
        for v in frontier:
            rows.update(at.indices[at.indptr[v] : at.indptr[v + 1]].tolist())
        nxt = []
        for r in sorted(rows):
            for v in a.indices[a.indptr[r] : a.indptr[r + 1]].tolist():
                if v in seen:
                    continue
                seen.add(v)
                nxt.append(v)
                name, column, row = system.cells[v]
                if (
                    row >= 0
                    and not system.is_blank(v)
                    and system.truth[v] > 0
                    and column not in tables[name].copied
                ):
                    key = tables[name].key_rows[row]
                    names = tables[name].keys
                    margin = all(
                        k == TOTAL for k, n in zip(key, names, strict=False) if n != "period"
                    )  # the grand total last
                    found.append(
                        (hop, margin, name != own, system.truth[v], name, column, str(key), v)
                    )
        if len(found) >= limit:
            break
        frontier = nxt
    found.sort()
    return [f[-1] for f in found[:limit]]


def _blank_cell(system: _System, tables: Mapping[str, AuditTable], var: int) -> None:
    name, column, row = system.cells[var]
    system.blank(var)
    tables[name].values[column][row] = None
    tables[name].marks[column][row] = "audit"


def _protect(system: _System, tables: Mapping[str, AuditTable], rules: DisclosureSettings,
             rate_bounds: dict, notes: list[str], max_rounds: int) -> tuple[str, str] | None:  # fmt: skip
    """Blank more until nothing fails; (table, reason) when a table must be withheld."""
    a = system.matrix()
    var_rows = a.tocsc()
    cleared: set[int] = set()
    for _ in range(max_rounds):
        failing = failing_cells(system, rules, a=a, passed=cleared)
        if not failing:
            return None
        var = min(
            failing,
            key=lambda v: (
                system.cells[v][1] in tables[system.cells[v][0]].copied,
                system.cells[v],
            ),
        )
        name, column, row = system.cells[var]
        t = tables[name]
        # a standardised rate gives way to the counts: free the rates around it first
        rated = [key for key, vs in system.rate_vars.items()
                 if any(system.upper[v] != math.inf or system.lower[v] > 0 for v in vs)]  # fmt: skip
        if rated:
            keep = {
                v: (system.lower[v], system.upper[v])
                for key in rated
                for v in system.rate_vars[key]
            }
            for v in keep:
                system.lower[v], system.upper[v] = 0.0, math.inf
            if not failing_cells(system, rules, only=[var], a=a):
                for v, (low, high) in keep.items():
                    system.lower[v], system.upper[v] = low, high
                hops = _hops(var_rows, a, var, 6)
                order = sorted(
                    rated, key=lambda k: (min(hops.get(v, 99) for v in system.rate_vars[k]), k)
                )
                for key in order:  # the nearest rate first, until the count is free
                    _drop_rate(
                        tables[key[0]],
                        key[1],
                        notes,
                        f"with the published counts it narrowed {t.describe(column, row)}",
                    )
                    rate_bounds.pop(key, None)
                    for v in system.rate_vars[key]:
                        system.lower[v], system.upper[v] = 0.0, math.inf
                    if not failing_cells(system, rules, only=[var], a=a):
                        break
                continue
            for v, (low, high) in keep.items():
                system.lower[v], system.upper[v] = low, high
        options = _candidates(system, a, tables, var)
        choice, widest = None, -1.0
        for option in options[:_TRIES]:
            low, high = system.lower[option], system.upper[option]
            system.blank(option)
            trial = failing_cells(system, rules, only=[var], a=a, outer_only=True)
            system.lower[option], system.upper[option] = low, high
            if not trial:
                choice = option
                break
            lo_t, hi_t = trial[var]
            if hi_t - lo_t > widest:
                choice, widest = option, hi_t - lo_t
        if choice is None and options:
            choice = options[0]
        if choice is not None:
            _blank_cell(system, tables, choice)
            continue
        whole = [system.index[(name, column, r)] for r in range(t.n)
                 if (name, column, r) in system.index and not system.is_blank(system.index[(name, column, r)])
                 and system.truth[system.index[(name, column, r)]] > 0]  # fmt: skip
        if whole:
            for v in whole:
                _blank_cell(system, tables, v)
            notes.append(
                f"{name}.{column}: blanked whole (a blanked count could not be protected otherwise)"
            )
            continue
        # the reason is printed and exported: it names the cell, never the range it was narrowed to
        return name, (f"a blanked count ({t.describe(column, row)}) could be narrowed from the published "
                      "figures and no further blank protects it")  # fmt: skip
    raise AuditFailure("the disclosure audit did not settle")  # pragma: no cover


def _hops(var_rows: csr_matrix, a: csr_matrix, var: int, depth: int) -> dict[int, int]:
    """Variables within ``depth`` relations of ``var``, with their distance."""
    seen, frontier = {var: 0}, [var]
    for hop in range(1, depth + 1):
        nxt = []
        for v in frontier:
            for r in var_rows.indices[var_rows.indptr[v] : var_rows.indptr[v + 1]].tolist():
                for u in a.indices[a.indptr[r] : a.indptr[r + 1]].tolist():
                    if u not in seen:
                        seen[u] = hop
                        nxt.append(u)
        frontier = nxt
    return seen


def audit(tables: dict[str, AuditTable], rules: DisclosureSettings, basis: RateBasis | None = None,
          previous: Mapping[str, pl.DataFrame] | None = None, max_rounds: int = 5000) -> AuditResult:  # fmt: skip
    """Blank more until every blanked count passes the rule over the joint system (module
    docstring); withhold a table that cannot be made to pass.
    """
    notes: list[str] = []
    withheld: dict[str, str] = {}
    rate_bounds: dict[tuple[str, int], dict[str, tuple[int, int]]] = {}
    if basis is not None:
        for t in tables.values():
            if t.standardised is not None:
                bounds, changed = protect_rates(t, basis, rules)
                rate_bounds.update({(t.name, row): b for row, b in bounds.items()})
                notes += changed
    for t in tables.values():  # a table published by another step gets the small-count rule too
        for column in t.counts:
            for row, value in enumerate(t.values[column]):
                if value is not None and rules.suppress_min <= value <= rules.suppress_max:
                    t.values[column][row] = None
                    t.marks[column][row] = "primary"
    relations = _relations()
    live = dict(tables)

    def blanks(t) -> int:
        return sum(1 for c in t.counts for v in t.values[c] if v is None)

    before = {name: blanks(t) for name, t in tables.items()}
    while live:
        system = build_system(live, relations, rate_bounds)
        outcome = _protect(system, live, rules, rate_bounds, notes, max_rounds)
        if outcome is None:
            break
        name, reason = outcome
        withheld[name] = reason
        notes.append(f"{name}: withheld for the period ({reason})")
        del live[name]
        rate_bounds = {k: v for k, v in rate_bounds.items() if k[0] != name}
    if previous:
        notes += _changes(live, previous)
    for t in live.values():  # copies follow their source as it is finally published
        if t.copied_from is not None and t.copied_from.table in live:
            _recopy(t, live[t.copied_from.table])
    # blanks the audit added to the tables it publishes (a withheld table is counted apart, in
    # ``withheld``: its blanks before the audit are not taken away from the others' count)
    added = sum(blanks(t) - before[name] for name, t in live.items())
    frames = {}
    for name, t in tables.items():
        frames[name] = finish(t) if name in live else t.published.clear()
    return AuditResult(frames, withheld, notes, added)


def _recopy(t: AuditTable, source: AuditTable) -> None:
    spec = t.copied_from
    at = {}
    for r in range(source.n):
        key = dict(zip(source.keys, source.key_rows[r], strict=False))
        if all(key.get(k) == v for k, v in spec.row.items()):
            at[tuple(key.get(j) for j in spec.join)] = r
    for column in t.copied:
        for r in range(t.n):
            key = dict(zip(t.keys, t.key_rows[r], strict=False))
            o = at.get(tuple(key.get(j) for j in spec.join))
            if o is not None and column in source.values:
                t.values[column][r] = source.values[column][o]
                if t.values[column][r] is None and not t.marks[column][r]:
                    t.marks[column][r] = "copied"


def _changes(live: Mapping[str, AuditTable], previous: Mapping[str, pl.DataFrame]) -> list[str]:
    """Blank a published ``<count>_change`` where the count is blanked now and was published in
    the previous period (the two would give it back).
    """
    notes = []
    for name, t in live.items():
        before = previous.get(name)
        if before is None:
            continue
        keys = [k for k in t.keys if k != "period"]
        for column in t.counts:
            change = f"{column}{CHANGE_SUFFIX}"
            if change not in t.published.columns or column not in before.columns:
                continue
            last = {tuple(r[:-1]): r[-1] for r in before.select(keys + [column]).rows()}
            mask = []
            for row in range(t.n):
                key = tuple(
                    v for k, v in zip(t.keys, t.key_rows[row], strict=False) if k != "period"
                )
                mask.append(t.values[column][row] is None and last.get(key) is not None)
            if any(mask):
                t.published = t.published.with_columns(
                    pl.when(pl.Series(mask, dtype=pl.Boolean))
                    .then(None)
                    .otherwise(pl.col(change))
                    .alias(change)
                )
                notes.append(
                    f"{name}.{change}: blanked where {column} is blanked now and was published last period"
                )
    return notes
