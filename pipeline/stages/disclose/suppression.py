"""Disclose: publishable copies of the summary tables, small counts suppressed.

Primary suppression: any count from ``suppress_min`` to ``suppress_max`` (default 1-10,
config/pipeline.yaml) is blanked.

Complementary (secondary) suppression: a published total and the published cells under it must
not give a blanked cell back. The tables are hierarchies marked by 'ALL' (``PublishedTable.levels``):
the cells of a district (every sex x age band) add up to the district's row (sex and age band
'ALL'), the district rows add up to the 'ALL' row. Each count column is protected on its own.
A blanked cell counts as recoverable when what is published pins it to one value:

* the total minus the other published cells (a lone blanked cell in a group), also through the
  other level (a blanked district row is the region total minus the other district rows, or the
  sum of its cells when those are all published);
* bounds: a blanked count is at least 1 (zeros are published), so two blanked cells whose
  difference to the total is 2 are both 1; and the ``suppression`` column tells which rows hold a
  small count (1 to ``suppress_max``) and which were blanked only to protect another (so above
  ``suppress_max``), which also narrows a blanked cell.

Bounds are propagated through both levels until nothing changes (for a hierarchy of sums this
gives the exact range of every blanked cell; hierarchical sums are a network, so the integer and
real ranges coincide). When a blanked cell is pinned, one more count is blanked, looked for among
the published cells of its group and, for a total, the cells below it, smallest first: the first
of those that frees it on its own, else the smallest (and the check goes on); only when there is
none, the group's total, then any published count of the table. Only counts above
``suppress_max`` are blanked this way, so a 'secondary' mark always means "above the band". The
check runs again, the newest secondary first (a district total blanked to protect another is
then protected in its own group), until nothing is pinned. Ties go by key order, so the same
table always gets the same cells blanked, whatever the order of its rows. When blanking more
cannot help, every non-zero count of the column is blanked; if the marks still pin a cell (e.g.
a district total of 10 made of ten cells of 1), the joint audit (:mod:`pipeline.stages.disclose.audit`,
which reads one mark for every blank) decides, and withholds the table with its reason if it
must: a small region gets its run, never a crash.

Limitations (policy choices, stated so that they can be revisited):

* Zeros are never blanked and never help to hide a cell: a zero is disclosed as zero. Blanking
  structural zeros (no residents, an impossible combination) hides nothing and makes the table
  harder to read; blanking sampling zeros would protect "nobody here has CKD" statements, which
  the small-count rule of the trade (common practice: counts 1 to 10) does not ask for.
* Only exact recovery is prevented. A blanked cell can still be known to lie in a narrow range
  (say 1 to 3); a minimum width for that range ("protection level") would be a further rule.
* Columns are protected one by one. Relations between columns of a row (persons_ckd is at most
  persons_tested; with_egfr_and_acr at most with_acr) are not used, so a secondary cell next to
  an equal published count of a wider column can still be pinned (e.g. persons_ckd blanked as
  secondary where persons_tested is published as 11).

Tables that add up to another table's totals. ``district_ckd_categories`` splits each
district's persons with confirmed CKD by GFR category and, again, by albuminuria category: the
categories of one axis add up to the district's persons_ckd of ``district_ckd_prevalence`` (sex
and age band 'ALL'), the G3a to G5 rows to its persons_ckd_g3_g5, and the districts add up to
'ALL'. Those totals are published in the other table, so they are not repeated here; they are
taken as the other table published them (:class:`TotalsFrom`), and the two axes share them:

* a total published there is known to the reader: the categories under it are protected against
  it (a lone blanked category, two blanked ones adding up to 2, and so on), and across districts;
* a total blanked there blanks every category of that axis for that district (``withheld``, whatever
  the count, zeros too; for GFR also when only persons_ckd_g3_g5 is blanked, since G1 + G2 +
  unknown = persons_ckd - persons_ckd_g3_g5). A withheld row says nothing, so whatever the
  published categories of the other districts give, every total the other table admits stays
  possible: the categories table tells a reader nothing more about the other table's counts
  (the district rows of one category form a transportation problem with free row sums). A total
  blanked for one axis is blanked for the other too, being the same count.
* a blanked category that no further blank can protect is withheld with its axis: e.g. G1 = 1
  and G2 = 1 with unknown = 0, where G1 + G2 + unknown = persons_ckd - persons_ckd_g3_g5 is known
  from the other table (its columns are protected one by one) and a zero is never blanked.

Each category row is then a cell of two sums (its district's axis and its category's districts),
so the sums are no longer a hierarchy and interval propagation alone can miss a pinned cell (a
cycle of blanked cells through two districts and two categories). Where the sums touching a set of
blanked cells are not a hierarchy, each of those cells is also bounded by linear programming
(``scipy.optimize.linprog``, HiGHS: the least and greatest value given every published count,
every sum and the bounds above). Both systems solved this way are networks (flows: GFR
categories into a district's total and albuminuria categories out of it; broad age groups of the
region through those of each district into its total), whose constraint matrices are totally
unimodular, so the linear programming range is the integer range (common practice in disclosure
auditing). Propagation runs first (fast); the linear programs only confirm what it leaves open.

Age-standardised rates (``Standardised``). A district's directly standardised rate and its
Fay-Feuer limits are functions of its counts per broad age group (sexes pooled; config
``summaries.standardisation_age_bands``) and of the public resident population only. So the most a
reader can get back from them is those broad-group counts; with the published district total and
cells, two blanked cells in different broad groups can be solved for (two equations: the total and
the rate), so a rate is not harmless just because its numerator is large. The policy:

* not published when the district's persons_ckd is blanked (it would give the total back), or
  below ``standardised_min_events`` (20; flagged ``few_events``: common practice treats a rate from
  fewer than about 20 events as unreliable; said only of a published total, so the flag tells
  nothing the table does not);
* otherwise published only if a reader who knew every broad-group count of every published rate
  (and of the region's) could still not pin any blanked cell: checked with the broad-group counts
  added as published sums, districts one by one, then the region with them (``suppressed`` if not).
  The region's rate counts persons of unknown district too, so that its broad-group counts add up
  to the published region total (else total minus rate counts = the unknown district's count).
  Knowing a function of those counts (the rate) tells less than knowing the counts, so a rate
  published this way cannot be used, alone or with the tables, to back out a suppressed count.
  The counts themselves are never blanked for a rate: a rate gives way to the counts.

Rates whose numerator or denominator is blanked are blanked. Only tables in schema
``published`` are ever exported.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import duckdb
import numpy as np
import polars as pl
from scipy.optimize import linprog

from pipeline.core.periods import Period
from pipeline.core.settings import DisclosureSettings
from pipeline.warehouse.catalog import (
    PUBLISHED_TABLES,
    TOTAL,
    PublishedTable,
    Standardised,
    TotalsFrom,
)
from pipeline.warehouse.connection import add_missing_columns, fetch_frame, with_frame
from pipeline.warehouse.sql_files import checked_name

PRIMARY = "primary"
SECONDARY = "secondary"
WITHHELD = "withheld"  # blanked because the total it adds up to is blanked in another table
FEW_EVENTS = "few_events"  # a standardised rate from too few events (not published)
SUPPRESSED = "suppressed"  # a standardised rate that could give a blanked count back
_PUBLISHED, _NULL = "", "null"
_BLANKED = (PRIMARY, SECONDARY, WITHHELD)
_INF = math.inf
_TRIES = 6  # options tried one by one for a pinned cell (each try re-propagates the bounds)


class DisclosureError(ValueError):
    """A table cannot be made safe by blanking more counts (or its shape is not understood)."""


# --------------------------------------------------------------------------- the hierarchy


@dataclass
class _Group:
    total: int  # row index of the total
    cells: list[int]  # row indices of the rows it adds up


def _hierarchy(
    frame: pl.DataFrame, table: PublishedTable
) -> tuple[list[int], list[_Group], list[int]]:
    """Row order (by key), the sum groups, and each row's parent (-1: none)."""
    level_cols = [c for level in table.levels for c in level]
    outer = [k for k in table.keys if k not in level_cols]
    key_rows = frame.select(list(table.keys)).rows()
    order = sorted(
        range(frame.height),
        key=lambda i: (tuple("" if v is None else str(v) for v in key_rows[i]), i),
    )
    parent = [-1] * frame.height
    if not table.levels:
        return order, [], parent
    paths: list[tuple] = []
    by_path: dict[tuple, int] = {}
    for i, row in enumerate(frame.select(outer + level_cols).iter_rows(named=True)):
        depth, specific = 0, True
        for level in table.levels:
            marks = [row[c] == TOTAL for c in level]
            if all(marks):
                specific = False
            elif any(marks) or not specific:
                raise DisclosureError(
                    f"{table.name}: row {dict(row)} is not a cell or a total of the hierarchy {table.levels}"
                )
            else:
                depth += 1
        path = (tuple(row[c] for c in outer),
                tuple(tuple(row[c] for c in level) for level in table.levels[:depth]))  # fmt: skip
        paths.append(path)
        if depth < len(table.levels):  # a total: must be unique
            if path in by_path:
                raise DisclosureError(f"{table.name}: two total rows for {path}")
            by_path[path] = i
    members: dict[int, list[int]] = {}
    for i in order:
        head, levels = paths[i]
        for cut in range(len(levels) - 1, -1, -1):  # nearest total above the row that exists
            above = by_path.get((head, levels[:cut]))
            if above is not None and above != i:
                parent[i] = above
                members.setdefault(above, []).append(i)
                break
    groups = [_Group(total, members[total]) for total in order if total in members]
    return order, groups, parent


# --------------------------------------------------------------------------- bounds


def _propagate(lo: list[float], hi: list[float], groups: list[_Group]) -> None:
    """Tighten [lo, hi] in place with total = sum(cells) for every group, until stable."""
    for _ in range(10_000):
        changed = False
        for g in groups:
            cells, t = g.cells, g.total
            sum_lo = sum(lo[c] for c in cells)
            finite_hi = [hi[c] for c in cells if hi[c] != _INF]
            n_inf = len(cells) - len(finite_hi)
            sum_hi = _INF if n_inf else sum(finite_hi)
            if sum_lo > lo[t]:
                lo[t], changed = sum_lo, True
            if sum_hi < hi[t]:
                hi[t], changed = sum_hi, True
            finite_sum = sum(finite_hi)
            for c in cells:
                if hi[c] == _INF:
                    others_hi = _INF if n_inf > 1 else finite_sum
                else:
                    others_hi = _INF if n_inf else finite_sum - hi[c]
                new_lo = lo[t] - others_hi
                new_hi = hi[t] - (sum_lo - lo[c])
                if new_lo > lo[c]:
                    lo[c], changed = new_lo, True
                if new_hi < hi[c]:
                    hi[c], changed = new_hi, True
        if not changed:
            return
    raise DisclosureError(
        "bounds did not settle"
    )  # pragma: no cover - a tree settles in a few sweeps


def _is_hierarchy(groups: list[_Group], among: set[int] | None = None) -> bool:
    """Every variable (of ``among``) is a cell of one group at most and the total of one at most:
    nested sums, for which propagation gives the exact range.
    """
    as_cell: set[int] = set()
    as_total: set[int] = set()
    for g in groups:
        if among is None or g.total in among:
            if g.total in as_total:
                return False
            as_total.add(g.total)
        for c in g.cells:
            if among is None or c in among:
                if c in as_cell:
                    return False
                as_cell.add(c)
    return True


def _exactly_pinned(lo: list[float], hi: list[float], groups: list[_Group], targets: list[int],
                    truth: list) -> list[int]:  # fmt: skip
    """Targets whose least and greatest value coincide, by linear programming, given propagated
    bounds ``lo``/``hi`` (a variable with lo == hi is known) and ``truth``, the actual counts (a
    feasible point). Only the parts of the system that are not nested sums are solved
    (propagation is exact on those that are). On a network of sums the linear programming range
    is the integer range (total unimodularity).
    """
    unknown = {v for g in groups for v in (g.total, *g.cells) if lo[v] < hi[v]}
    wanted = [t for t in targets if t in unknown]
    if not wanted:
        return []
    parent = {v: v for v in unknown}

    def find(v: int) -> int:
        while parent[v] != v:
            parent[v] = parent[parent[v]]
            v = parent[v]
        return v

    live = []
    for g in groups:
        members = [v for v in (g.total, *g.cells) if v in unknown]
        if members:
            live.append(g)
            for v in members[1:]:
                parent[find(v)] = find(members[0])
    components: dict[int, set[int]] = {}
    for v in unknown:
        components.setdefault(find(v), set()).add(v)
    pinned = []
    for variables in components.values():
        targets_here = [t for t in wanted if t in variables]
        touching = [
            g for g in live if (g.total in variables) or any(c in variables for c in g.cells)
        ]
        if not targets_here or _is_hierarchy(touching, variables):
            continue
        pinned += _linear_ranges(lo, hi, touching, sorted(variables), targets_here, truth)
    return pinned


def _linear_ranges(lo: list[float], hi: list[float], groups: list[_Group], variables: list[int],
                   targets: list[int], truth: list) -> list[int]:  # fmt: skip
    """The targets a linear program pins. The actual counts are one feasible point, so any
    solution that moves a target away from its count shows that target is not pinned: two
    solves over all targets (least and greatest sum) settle most of them, the rest one by one.
    """
    index = {v: j for j, v in enumerate(variables)}
    a_eq = np.zeros((len(groups), len(variables)))
    b_eq = np.zeros(len(groups))
    for i, g in enumerate(groups):
        for v, sign in ((g.total, -1.0), *((c, 1.0) for c in g.cells)):
            if v in index:
                a_eq[i, index[v]] += sign
            else:
                b_eq[i] -= sign * lo[v]
    bounds = [(lo[v], None if hi[v] == _INF else hi[v]) for v in variables]
    cap = (
        2.0
        * max([float(truth[v]) for v in variables] + [hi[v] for v in variables if hi[v] != _INF])
        + 1.0
    )
    capped = [(low, cap if high is None else high) for low, high in bounds]
    open_ = set(targets)

    def solve(c: np.ndarray, limits: list) -> object:
        result = linprog(c, A_eq=a_eq, b_eq=b_eq, bounds=limits, method="highs")
        if result.status not in (0, 3):  # 3: unbounded (only when maximising)
            raise DisclosureError(f"the published sums are inconsistent ({result.message})")
        if result.status == 0:
            open_.difference_update(
                t for t in list(open_) if abs(result.x[index[t]] - truth[t]) > 1e-6
            )
        return result

    for sign in (1.0, -1.0):  # least, then greatest, sum of the open targets
        if open_:
            c = np.zeros(len(variables))
            c[[index[t] for t in open_]] = sign
            solve(c, capped)
    pinned = []
    for t in sorted(open_):
        if t not in open_:
            continue
        c = np.zeros(len(variables))
        c[index[t]] = 1.0
        low = solve(c, bounds)
        if t in open_:
            high = solve(-c, bounds)
            if high.status == 0 and -high.fun - low.fun < 0.5:
                pinned.append(t)
                open_.discard(t)
    return pinned


@dataclass
class _Disclosed:
    """A table after disclosure: its internal rows, its publishable rows and the state."""

    source: pl.DataFrame
    frame: pl.DataFrame
    state: _Table


class _Table:
    """The suppression state of one frame: status per row and count column.

    Variables 0 .. n-1 are the frame's rows; a table whose sums end in another table's totals
    (:class:`TotalsFrom`) has those totals as further variables, known or bounded as the other
    table publishes them, never blanked here.
    """

    def __init__(self, frame: pl.DataFrame, table: PublishedTable, rules: DisclosureSettings,
                 others: Mapping[str, _Disclosed] | None = None):  # fmt: skip
        self.table, self.rules = table, rules
        self.n = frame.height
        self.values = {c: frame[c].to_list() for c in table.counts}
        self.order, groups, self.parent = _hierarchy(frame, table)
        self.rank = {row: r for r, row in enumerate(self.order)}
        self.status = {
            c: [_NULL if v is None else PRIMARY if rules.suppress_min <= v <= rules.suppress_max else _PUBLISHED
                for v in values]
            for c, values in self.values.items()
        }  # fmt: skip
        self.groups = {c: list(groups) for c in table.counts}
        self.outside: dict[str, list[tuple[float, float]]] = {
            c: [] for c in table.counts
        }  # bounds of the totals
        self.copied: dict[str, list] = {}  # copied column -> its published value per row
        self.partitions: list[
            tuple[str, tuple, set[int], bool]
        ] = []  # column, join key, rows, total blanked
        self.copied_blank: dict[str, list[bool]] = {}
        if table.totals is not None:
            self._link(frame, table.totals, others or {})
        self.cells_of: dict[str, dict[int, list[_Group]]] = {}
        self.totals_of: dict[str, dict[int, list[_Group]]] = {}
        for c in table.counts:
            self.cells_of[c], self.totals_of[c] = {}, {}
            for g in self.groups[c]:
                self.totals_of[c].setdefault(g.total, []).append(g)
                for cell in g.cells:
                    self.cells_of[c].setdefault(cell, []).append(g)
        self.nested = {c: _is_hierarchy(self.groups[c]) for c in table.counts}

    # ------------------------------------------------------------------ totals in another table

    def _link(
        self, frame: pl.DataFrame, spec: TotalsFrom, others: Mapping[str, _Disclosed]
    ) -> None:
        other = others.get(spec.table)
        if other is None:
            raise DisclosureError(
                f"{self.table.name}: {spec.table} must be disclosed first (its totals are used)"
            )
        marks = [(other.source[k] == v).to_list() for k, v in spec.row.items()]
        total_row = {key: i for i, key in enumerate(other.source.select(list(spec.join)).rows())
                     if all(m[i] for m in marks)}  # fmt: skip
        keys = frame.select(list(spec.join)).rows()
        rows_of = [total_row.get(k) for k in keys]
        missing = sorted({k for k, r in zip(keys, rows_of, strict=False) if r is None}, key=str)
        if missing:
            raise DisclosureError(
                f"{self.table.name}: no total row in {spec.table} for {missing[:3]}"
            )
        for column in spec.copied:
            internal, published = other.source[column].to_list(), other.frame[column].to_list()
            here = frame[column].to_list()
            if any(h != internal[r] for h, r in zip(here, rows_of, strict=False)):
                raise DisclosureError(
                    f"{self.table.name}.{column} differs from {spec.table}.{column}"
                )
            self.copied[column] = [published[r] for r in rows_of]
            self.copied_blank[column] = [
                published[r] is None and internal[r] is not None for r in rows_of
            ]
        bounds = {}
        variable: dict[tuple[str, str, int], int] = {}
        partitions: list[
            tuple[str, tuple, set[int], bool]
        ] = []  # column, join key, rows, total blanked
        for part in spec.partitions:
            inside = [
                all(frame[k][r] in allowed for k, allowed in part.where.items())
                for r in range(self.n)
            ]
            members: dict[tuple, list[int]] = {}
            for r in range(self.n):
                if inside[r]:
                    members.setdefault(keys[r], []).append(r)
            if part.total not in bounds:
                bounds[part.total] = other.state.bounds(part.total)
            low, high = bounds[part.total]
            for key, cells in members.items():
                o_row = rows_of[cells[0]]
                total = other.state.values[part.total][o_row]
                got = sum(self.values[part.column][r] or 0 for r in cells)
                if total is None or got != total:
                    raise DisclosureError(f"{self.table.name}: the rows {part.where} of {key} add up to {got}, "
                                          f"not to {spec.table}.{part.total} = {total}")  # fmt: skip
                name = (part.column, part.total, o_row)
                if name not in variable:
                    variable[name] = self._outside_variable(part.column, total, other.state.status[part.total][o_row],
                                                            (low[o_row], high[o_row]))  # fmt: skip
                self.groups[part.column].append(_Group(variable[name], cells))
                partitions.append(
                    (part.column, key, set(cells), other.state.blanked(part.total, o_row))
                )
        self.partitions = partitions
        # sums among those totals in the other table (the districts' totals add up to 'ALL')
        for column, o_column in sorted({(c, oc) for c, oc, _ in variable}):
            mapped = {
                o_row: var
                for (c, oc, o_row), var in variable.items()
                if (c, oc) == (column, o_column)
            }
            for g in other.state.groups[o_column]:
                if g.total in mapped and all(c in mapped for c in g.cells):
                    self.groups[column].append(
                        _Group(mapped[g.total], [mapped[c] for c in g.cells])
                    )
        self._withhold(partitions)

    def _outside_variable(
        self, column: str, value: int, status: str, bounds: tuple[float, float]
    ) -> int:
        self.values[column].append(value)
        self.status[column].append(status)
        self.outside[column].append(bounds)
        return len(self.values[column]) - 1

    def _withhold(self, partitions: list[tuple[str, tuple, set[int], bool]]) -> None:
        """Blank every row of a partition whose total is blanked in the other table, and of every
        partition sharing a row with it (G1 + G2 + unknown would give persons_ckd_g3_g5 back).
        """
        by_key: dict[tuple, list[tuple[set[int], bool]]] = {}
        for column, key, rows, blanked in partitions:
            by_key.setdefault((column, key), []).append((rows, blanked))
        for (column, _), parts in by_key.items():
            self._hide(column, parts, set())

    def _hide(self, column: str, parts: list[tuple[set[int], bool]], hidden: set[int]) -> bool:
        """Withhold ``hidden`` and the partitions marked blanked, and every partition sharing a
        row with those (transitively); True if a row was newly withheld.
        """
        grow = True
        while grow:
            grow = False
            for rows, blanked in parts:
                if (blanked or rows & hidden) and not rows <= hidden:
                    hidden |= rows
                    grow = True
        changed = False
        for r in hidden:
            if self.values[column][r] is not None and self.status[column][r] != WITHHELD:
                self.status[column][r] = WITHHELD
                changed = True
        return changed

    def withhold_around(self, column: str, row: int) -> bool:
        """Withhold the partitions holding ``row`` (a cell pinned by sums that blanking more
        published counts cannot open, e.g. G1 + G2 + unknown = persons_ckd - persons_ckd_g3_g5
        with a published zero among them); True if anything changed.
        """
        parts = [(rows, False) for c, _, rows, _ in self.partitions if c == column]
        mine = [rows for rows, _ in parts if row in rows]
        if not mine:
            return False
        return self._hide(column, parts, set().union(*mine))

    # ------------------------------------------------------------------ state

    def blanked(self, column: str, row: int) -> bool:
        return self.status[column][row] in _BLANKED

    def row_flag(self, row: int) -> str:
        states = [self.status[c][row] for c in self.table.counts]
        for flag in (PRIMARY, SECONDARY, WITHHELD):
            if flag in states:
                return flag
        return ""

    def row_blanked(self, row: int) -> int:
        return sum(self.blanked(c, row) for c in self.table.counts)

    def initial_bounds(self, column: str) -> tuple[list[float], list[float]]:
        """What a reader of the published table knows of each count from the count itself."""
        rules, lo, hi = self.rules, [], []
        for row, (value, state) in enumerate(
            zip(self.values[column][: self.n], self.status[column], strict=False)
        ):
            if state == _PUBLISHED:
                lo.append(float(value))
                hi.append(float(value))
            elif state == _NULL:
                lo.append(0.0)
                hi.append(_INF)
            elif state == WITHHELD:
                lo.append(0.0)  # says nothing: zeros are withheld too
                hi.append(_INF)
            else:
                low, high = 1.0, _INF  # zeros are published, so a blanked count is at least 1
                flag = self.row_flag(row)
                if flag == SECONDARY:
                    low = float(rules.suppress_max + 1)  # blanked only to protect: above the band
                elif flag == PRIMARY and self.row_blanked(row) == 1:
                    low, high = (
                        float(rules.suppress_min),
                        float(rules.suppress_max),
                    )  # the small one
                lo.append(low)
                hi.append(high)
        for low, high in self.outside[column]:
            lo.append(low)
            hi.append(high)
        return lo, hi

    def bounds(self, column: str) -> tuple[list[float], list[float]]:
        """What a reader of the published table knows of each count, after propagation."""
        lo, hi = self.initial_bounds(column)
        _propagate(lo, hi, self.groups[column])
        return lo, hi

    def _guarded(self, column: str, row: int) -> bool:
        """A blanked count that must not be pinned: every one but a withheld zero (a zero is
        published anyway; a withheld row is blanked for its total's sake).
        """
        withheld_zero = self.status[column][row] == WITHHELD and self.values[column][row] == 0
        return self.blanked(column, row) and not withheld_zero

    def pinned(self, column: str, exact: bool = False) -> list[int]:
        lo, hi = self.bounds(column)
        rows = [r for r in range(self.n) if self._guarded(column, r) and lo[r] >= hi[r]]
        if not rows and exact and not self.nested[column]:
            rows = _exactly_pinned(
                lo,
                hi,
                self.groups[column],
                [r for r in range(self.n) if self._guarded(column, r)],
                self.values[column],
            )
        return sorted(rows, key=lambda r: (self._depth(r), self.rank[r]))

    def _is_pinned(self, column: str, row: int) -> bool:
        lo, hi = self.bounds(column)
        return lo[row] >= hi[row] or bool(
            _exactly_pinned(lo, hi, self.groups[column], [row], self.values[column])
        )

    def _depth(self, row: int) -> int:
        depth = 0
        while self.parent[row] >= 0:
            row, depth = self.parent[row], depth + 1
        return depth

    def _open(self, column: str, rows: list[int], row: int) -> list[int]:
        """Published counts among ``rows`` (not ``row``) that can protect, smallest first, then
        key order. Only counts above the band are used (zeros never; counts below
        ``suppress_min``, when it is above 1, neither), so a secondary count is always above
        ``suppress_max``, which is what the 'secondary' mark tells a reader. Totals of another
        table are never blanked here.
        """
        values, status = self.values[column], self.status[column]
        floor = self.rules.suppress_max
        usable = {
            r
            for r in rows
            if r != row and r < self.n and status[r] == _PUBLISHED and values[r] > floor
        }
        return sorted(usable, key=lambda r: (values[r], self.rank[r]))

    def _try(self, column: str, option: int, row: int, exact: bool) -> bool:
        """Tell whether blanking ``option`` alone frees ``row``."""
        self.status[column][option] = SECONDARY
        freed = not self._is_pinned(column, row) if exact else row not in self.pinned(column)
        self.status[column][option] = _PUBLISHED
        return freed

    def choose(
        self, column: str, row: int, exact: bool = False, withhold: bool = True
    ) -> int | None:
        """The count to blank next to protect the pinned ``row``.

        First the cells next to it in its groups and, for a total, the cells below it: the first
        (smallest first) that frees it on its own, else the smallest of them (the loop goes on).
        Then the groups' totals, then any published non-zero count of the table. In a table with
        partitions, None when withholding the row's partitions is the way (``withhold``): no
        count that may be blanked near it opens it.
        """
        as_cell = self.cells_of[column].get(row, [])
        as_total = self.totals_of[column].get(row, [])
        siblings = self._open(column, [c for g in as_cell for c in g.cells], row)
        below = [
            r
            for r in self._open(column, [c for g in as_total for c in g.cells], row)
            if r not in siblings
        ]
        near = siblings + below
        for option in near[:_TRIES]:
            if self._try(column, option, row, exact):
                return option
        if withhold and self.partitions and not self._freed_by_all(column, row):
            return None  # no count that may be blanked opens it: withhold (see protect)
        if near:
            return near[0]
        total = self._open(column, [g.total for g in as_cell], row)
        anywhere = total or self._open(column, self.order, row)
        return anywhere[0] if anywhere else None

    def _freed_by_all(self, column: str, row: int) -> bool:
        """Tell whether blanking every count that may be blanked frees ``row`` (checked exactly)."""
        options = self._open(column, self.order, row)
        for option in options:
            self.status[column][option] = SECONDARY
        freed = not self._is_pinned(column, row)
        for option in options:
            self.status[column][option] = _PUBLISHED
        return freed

    def protect(self, column: str) -> bool:
        """Blank secondary cells in ``column`` until no blanked cell is pinned; True if any.

        The cell blanked last is looked at first: when a new secondary is itself pinned (a
        district total that is the sum of its published cells), its own group is fixed before
        more is blanked elsewhere. Sums that are not nested are then checked exactly (linear
        programming), and a cell pinned only that way is protected the same way.
        """
        changed, recent = False, []
        while True:
            exact = False
            pinned = self.pinned(column)
            if not pinned and not self.nested[column]:
                pinned, exact = self.pinned(column, exact=True), True
            if not pinned:
                return changed
            latest = [r for r in recent if r in pinned]
            row = latest[-1] if latest else pinned[0]
            choice = self.choose(column, row, exact)
            if choice is None and self.partitions:
                if self.withhold_around(column, row):
                    changed = True
                    continue
                choice = self.choose(column, row, exact, withhold=False)
            if choice is None:
                # Blanking more next to it cannot help: blank every count of the column (a small
                # region still gets its run); the joint audit then decides, and withholds the
                # table with its reason if even that is not enough.
                whole = [
                    r
                    for r in range(self.n)
                    if self.status[column][r] == _PUBLISHED and self.values[column][r]
                ]
                if not whole:
                    return changed
                for r in whole:
                    self.status[column][r] = SECONDARY
                return True
            self.status[column][choice] = SECONDARY
            recent.append(choice)
            changed = True

    def run(self) -> None:
        if not any(self.groups.values()):
            return
        # A row's flag ties its columns together (a new secondary can change what the flag says
        # about another column), so go round the columns until none changes.
        while any([self.protect(c) for c in self.table.counts]):
            pass


# --------------------------------------------------------------------------- standardised rates


def _standardised_flags(state: _Table, frame: pl.DataFrame, spec: Standardised) -> list[str | None]:
    """'' (publish), few_events or suppressed per row with a rate; None where there is none.

    Totals are decided deepest first (districts, then the region), each with the broad-group
    counts of the rates already accepted taken as known (module docstring).
    """
    column, rules = spec.count, state.rules
    rate = frame[spec.rates[0]].to_list() if spec.rates[0] in frame.columns else [None] * state.n
    if spec.group in frame.columns:
        label = frame[spec.group].to_list()
    else:  # groups not known: every cell its own group (a rate then needs every cell published)
        label = [f"row {r}" for r in range(state.n)]
    children: dict[int, list[int]] = {}
    for r in range(state.n):
        if state.parent[r] >= 0:
            children.setdefault(state.parent[r], []).append(r)
    groups = [g for g in state.groups[column]]
    lo0, hi0 = state.initial_bounds(column)
    # broad-group sums under every total whose cells are cells (a district): nested below it
    values = list(state.values[column])
    lo, hi = list(lo0), list(hi0)
    sums: dict[tuple[int, str], int] = {}  # (total row, group) -> variable

    def new_variable(value: int) -> int:
        values.append(value)
        lo.append(0.0)
        hi.append(_INF)
        return len(values) - 1

    nested_groups = []
    for g in groups:
        leaves = [c for c in g.cells if c not in children]
        labelled = [c for c in leaves if label[c] is not None]
        if not labelled:
            nested_groups.append(g)
            continue
        by_label: dict[str, list[int]] = {}
        for c in labelled:
            by_label.setdefault(label[c], []).append(c)
        parts = []
        for name in sorted(by_label):
            cells = by_label[name]
            var = new_variable(sum(state.values[column][c] or 0 for c in cells))
            sums[(g.total, name)] = var
            nested_groups.append(_Group(var, cells))
            parts.append(var)
        others = [c for c in g.cells if c not in labelled]
        nested_groups.append(_Group(g.total, parts + others))

    def sums_under(total: int) -> dict[str, list[int]]:
        """The broad-group sum variables a total's rate is made of (its own, or its rows')."""
        own = {name: [var] for (t, name), var in sums.items() if t == total}
        if own:
            return own
        out: dict[str, list[int]] = {}
        for child in children.get(total, []):
            for name, parts in sums_under(child).items():
                out.setdefault(name, []).extend(parts)
        return out

    flags: list[str | None] = [None] * state.n
    known: list[tuple[int, list[int]]] = []  # (variable, parts) revealed by accepted rates
    blanked = [r for r in range(state.n) if state.blanked(column, r)]
    with_rate = [r for r in range(state.n) if rate[r] is not None]
    for t in sorted(with_rate, key=lambda r: (-state._depth(r), state.rank[r])):
        if state.blanked(column, t):
            flags[t] = SUPPRESSED
            continue
        if state.values[column][t] < rules.standardised_min_events:
            flags[t] = FEW_EVENTS
            continue
        trial = []
        for _name, parts in sorted(sums_under(t).items()):
            if len(parts) == 1:
                trial.append((parts[0], []))
            else:  # a higher total: its group sums are sums of its rows' group sums
                trial.append((new_variable(sum(values[p] for p in parts)), parts))
        revealed = known + trial
        t_lo, t_hi = list(lo), list(hi)
        extra = []
        for var, parts in revealed:
            t_lo[var] = t_hi[var] = float(values[var])
            if parts:
                extra.append(_Group(var, parts))
        system = nested_groups + extra
        _propagate(t_lo, t_hi, system)
        pinned = [r for r in blanked if t_lo[r] >= t_hi[r]] or _exactly_pinned(
            t_lo, t_hi, system, blanked, values
        )
        if pinned:
            flags[t] = SUPPRESSED
        else:
            flags[t] = _PUBLISHED
            known = revealed
    return flags


# --------------------------------------------------------------------------- suppression


def suppress(frame: pl.DataFrame, table: PublishedTable, rules: DisclosureSettings,
             others: Mapping[str, pl.DataFrame] | None = None) -> pl.DataFrame:  # fmt: skip
    """Blank small counts, the counts that would give them away, and the rates built on them.

    Adds ``n_suppressed`` (blanked counts in the row) and ``suppression`` ('' nothing blanked,
    'primary' the row holds a small count, 'secondary' counts blanked only to protect others,
    'withheld' blanked because the total it adds up to is blanked in another table). A table
    with :class:`TotalsFrom` needs the internal frame of that table in ``others``.
    """
    done: dict[str, _Disclosed] = {}
    if table.totals is not None:
        name = table.totals.table
        if others is None or name not in others:
            raise DisclosureError(f"{table.name}: needs the rows of {name} (its totals)")
        source = {t.name: t for t in PUBLISHED_TABLES}.get(name)
        if source is None:
            raise DisclosureError(f"{table.name}: {name} is not a published table")
        done[name] = _disclose(others[name], source, rules, {})
    return _disclose(frame, table, rules, done).frame


def suppress_tables(
    frames: Mapping[str, pl.DataFrame], rules: DisclosureSettings
) -> dict[str, pl.DataFrame]:
    """Every published table given in ``frames`` (internal rows), in the order of
    :data:`PUBLISHED_TABLES`, each using the tables disclosed before it.
    """
    done: dict[str, _Disclosed] = {}
    for table in PUBLISHED_TABLES:
        if table.name in frames:
            done[table.name] = _disclose(frames[table.name], table, rules, done)
    return {name: d.frame for name, d in done.items()}


def _disclose(frame: pl.DataFrame, table: PublishedTable, rules: DisclosureSettings,
              others: Mapping[str, _Disclosed]) -> _Disclosed:  # fmt: skip
    state = _Table(frame, table, rules, others)
    state.run()
    blank = {c: pl.Series([state.blanked(c, r) for r in range(frame.height)], dtype=pl.Boolean)
             for c in table.counts}  # fmt: skip
    blank.update({c: pl.Series(b, dtype=pl.Boolean) for c, b in state.copied_blank.items()})
    below = _below(state, table, blank)
    columns = (
        [pl.when(blank[c]).then(None).otherwise(pl.col(c)).alias(c) for c in table.counts]
        + [pl.Series(c, v, dtype=frame.schema[c]) for c, v in state.copied.items()]
        + [pl.when(pl.any_horizontal([blank[s] for s in srcs])).then(None).otherwise(pl.col(r)).alias(r)
           for r, srcs in table.rates.items() if r in frame.columns]
        + [pl.when(pl.any_horizontal([below[s] for s in srcs])).then(None).otherwise(pl.col(r)).alias(r)
           for r, srcs in table.group_rates.items() if r in frame.columns]
        + [pl.sum_horizontal([blank[c].cast(pl.Int32) for c in table.counts]).alias("n_suppressed"),
           pl.Series("suppression", [state.row_flag(r) for r in range(frame.height)], dtype=pl.String)]
    )  # fmt: skip
    spec = table.standardised
    if spec is not None and any(r in frame.columns for r in spec.rates):
        flags = pl.Series(spec.flag, _standardised_flags(state, frame, spec), dtype=pl.String)
        hide = flags.is_in([FEW_EVENTS, SUPPRESSED])
        columns += [
            pl.when(hide).then(None).otherwise(pl.col(r)).alias(r)
            for r in spec.rates
            if r in frame.columns
        ]
        columns.append(flags)
    published = frame.with_columns(columns)
    return _Disclosed(
        frame, published.drop([c for c in table.hidden if c in published.columns]), state
    )


def follow_final_blanks(frames: dict[str, pl.DataFrame]) -> dict[str, pl.DataFrame]:
    """Blank the figures of each table with ``follows`` wherever the other table's final
    (audited) row blanks one of the named counts; a row the other table lacks is blanked too.
    """
    out = dict(frames)
    for table in PUBLISHED_TABLES:
        if table.follows is None or table.name not in out or table.totals is None:
            continue
        other, counts, ours = table.follows
        mine, keys = out[table.name], list(table.totals.join)
        if other in out and out[other].height:
            blank = out[other].select(
                *keys, pl.any_horizontal([pl.col(c).is_null() for c in counts]).alias("_gone")
            )
            gone = (
                mine.select(keys)
                .join(blank, on=keys, how="left", maintain_order="left")["_gone"]
                .fill_null(True)
            )
        else:
            gone = pl.Series("_gone", [True] * mine.height)
        out[table.name] = mine.with_columns(
            [
                pl.when(gone).then(None).otherwise(pl.col(c)).alias(c)
                for c in ours
                if c in mine.columns
            ]
        )
    return out


def _below(
    state: _Table, table: PublishedTable, blank: dict[str, pl.Series]
) -> dict[str, pl.Series]:
    """Per count column: the row's count or a count of a row below it is blanked."""
    out = {}
    for column in {s for srcs in table.group_rates.values() for s in srcs}:
        hit = blank[column].to_list()
        for row in state.order:  # mark every total above a blanked count
            if hit[row]:
                up = state.parent[row]
                while up >= 0 and not hit[up]:
                    hit[up] = True
                    up = state.parent[up]
        out[column] = pl.Series(hit, dtype=pl.Boolean)
    return out


def _exists(con: duckdb.DuckDBPyConnection, name: str) -> bool:
    return (
        con.execute(
            "select count(*) from duckdb_tables() where schema_name = 'published' and table_name = ?",
            [name],
        ).fetchall()[0][0]
        > 0
    )


@dataclass(frozen=True)
class DisclosureResult:
    """What :func:`disclose_stage` leaves: the rows it published per table for the period, the
    declared tables present in schema ``published`` afterwards, and what the joint audit did.
    """

    period: str
    counts: dict[str, int]  # published rows per table for the period
    present: tuple[str, ...]  # declared tables (PUBLISHED_TABLES) that exist in published.*
    withheld: dict[str, str]  # table -> reason
    notes: tuple[str, ...]
    added: int  # cells the joint audit blanked


def disclose_stage(con: duckdb.DuckDBPyConnection, rules: DisclosureSettings, period: Period,
                   summaries: object | None = None,
                   internal: Mapping[str, int] | None = None) -> DisclosureResult:  # fmt: skip
    """Replace this period's rows of every published table.

    Each table is first protected on its own (this module), then everything the period
    publishes is audited together (:mod:`pipeline.stages.disclose.audit`), which may blank more or
    withhold a table. ``summaries`` (SummarySettings) lets the audit check the standardised
    rates' integer splits. ``internal``: the internal tables the summarise stage left and their
    rows for the period (``Summarised.tables``); a declared table not among them has nothing
    this period. Without it (tests), the internal table of each declared name is read.
    """
    from pipeline.stages.disclose.audit import RateBasis, audit, table_from_frames

    counts: dict[str, int] = {}
    done: dict[str, _Disclosed] = {}
    audited = {}
    for table in PUBLISHED_TABLES:
        if internal is not None and not internal.get(table.name):
            frame = pl.DataFrame()
        else:
            frame = fetch_frame(
                con, f"select * from {checked_name(table.name)} where period = ?", [period.label]
            )
        if frame.height == 0:  # nothing this period: drop what an earlier run published for it
            if _exists(con, table.name):
                con.execute(
                    f"delete from published.{checked_name(table.name)} where period = ?",
                    [period.label],
                )
            counts[table.name] = 0
            continue
        disclosed = _disclose(frame, table, rules, done)
        done[table.name] = disclosed
        marks = {c: [s if s in _BLANKED else "" for s in disclosed.state.status[c][: frame.height]]
                 for c in table.counts}  # fmt: skip
        audited[table.name] = table_from_frames(table.name, disclosed.frame, frame, table, marks)
    declared = {t.name for t in PUBLISHED_TABLES}
    for name in _published_names(con):  # tables published by another step: audited with the rest
        if name in declared or name in audited:
            continue
        published = fetch_frame(
            con, f"select * from published.{checked_name(name)} where period = ?", [period.label]
        )
        if published.height == 0:
            continue
        audited[name] = table_from_frames(
            name, published, _internal_rows(con, name, published), None
        )
    basis = None
    if summaries is not None and getattr(summaries, "standardisation_age_bands", None):
        from pipeline.core.statistics import age_labels, collapse_weights

        bands = list(summaries.standardisation_age_bands)
        basis = RateBasis(tuple(age_labels(bands)), tuple(float(w) for w in collapse_weights(bands)),
                          float(summaries.confidence))  # fmt: skip
    previous = {}
    last = _previous_label(period)
    for name in audited:
        if _exists(con, name):
            previous[name] = fetch_frame(
                con, f"select * from published.{checked_name(name)} where period = ?", [last]
            )
    result = audit(audited, rules, basis, previous)
    for name, published in follow_final_blanks(result.frames).items():
        if not _exists(con, name):
            with_frame(
                con,
                published,
                f"create table published.{checked_name(name)} as select * from _frame",
            )
        else:
            add_missing_columns(con, "published", name, published)
            con.execute(
                f"delete from published.{checked_name(name)} where period = ?", [period.label]
            )
            with_frame(
                con,
                published,
                f"insert into published.{checked_name(name)} by name select * from _frame",
            )
        counts[name] = published.height
    _record_cells(con, period, audited, result.withheld)
    return DisclosureResult(
        period.label,
        counts,
        tuple(t.name for t in PUBLISHED_TABLES if _exists(con, t.name)),
        dict(result.withheld),
        tuple(result.notes),
        result.added,
    )


def audit_frames(
    frames: Mapping[str, pl.DataFrame], rules: DisclosureSettings, basis: object | None = None
):
    """The publishable frames of internal ``frames`` (one period): each table protected on its
    own, then all of them audited together (:func:`pipeline.stages.disclose.audit.audit`). Returns the
    audit's result (frames, withheld tables and notes).
    """
    from pipeline.stages.disclose.audit import audit, table_from_frames

    done: dict[str, _Disclosed] = {}
    audited = {}
    for table in PUBLISHED_TABLES:
        frame = frames.get(table.name)
        if frame is None or frame.height == 0:
            continue
        disclosed = _disclose(frame, table, rules, done)
        done[table.name] = disclosed
        marks = {c: [s if s in _BLANKED else "" for s in disclosed.state.status[c][: frame.height]]
                 for c in table.counts}  # fmt: skip
        audited[table.name] = table_from_frames(table.name, disclosed.frame, frame, table, marks)
    result = audit(audited, rules, basis)
    result.frames = follow_final_blanks(result.frames)
    return result


def _previous_label(period: Period) -> str:
    year, month = (period.year, period.month - 1) if period.month > 1 else (period.year - 1, 12)
    return f"{year:04d}-{month:02d}"


def _published_names(con: duckdb.DuckDBPyConnection) -> list[str]:
    rows = con.execute(
        "select t.table_name from duckdb_tables() t join duckdb_columns() c on c.schema_name = t.schema_name "
        "and c.table_name = t.table_name and c.column_name = 'period' where t.schema_name = 'published' "
        "order by 1"
    ).fetchall()
    return [r[0] for r in rows]


def _internal_rows(
    con: duckdb.DuckDBPyConnection, name: str, published: pl.DataFrame
) -> pl.DataFrame:
    """The internal rows behind a published table not declared here, in the published order (by
    its text keys); the published rows themselves when there is no internal table (then the
    audit can only check, and blank whole, what is published).
    """
    exists = con.execute("select count(*) from duckdb_tables() where schema_name = 'main' and table_name = ?",
                         [name]).fetchall()[0][0]  # fmt: skip
    if not exists:
        return published
    keys = [c for c, t in published.schema.items() if t == pl.String and c != "suppression"]
    period = published["period"][0]
    internal = fetch_frame(
        con, f"select * from main.{checked_name(name)} where period = ?", [period]
    )
    wanted = [c for c, t in published.schema.items() if t.is_integer() and c != "n_suppressed"]
    if not set(keys) <= set(internal.columns) or not set(wanted) <= set(internal.columns):
        return published
    joined = published.select(keys).with_row_index("_row").join(internal, on=keys, how="left")
    joined = joined.sort("_row").drop("_row")
    return joined if joined.height == published.height else published


def _record_cells(
    con: duckdb.DuckDBPyConnection, period: Period, tables: Mapping, withheld: Mapping[str, str]
) -> None:
    """One internal row per blanked count of the period: why it is blank (never published)."""
    rows = []
    for name, t in tables.items():
        for column in t.counts:
            for r in range(t.n):
                if (
                    name in withheld
                    or t.values[column][r] is None
                    and t.truth[column][r] is not None
                ):
                    key = "; ".join(
                        f"{k}={v}"
                        for k, v in zip(t.keys, t.key_rows[r], strict=False)
                        if k != "period"
                    )
                    mark = "withheld_table" if name in withheld else (t.marks[column][r] or "audit")
                    rows.append((period.label, name, key, column, mark, withheld.get(name)))
    frame = pl.DataFrame(rows, schema={"period": pl.String, "table_name": pl.String, "row_key": pl.String,
                                       "column_name": pl.String, "reason": pl.String, "note": pl.String},
                         orient="row")  # fmt: skip
    con.execute("""create table if not exists disclosure_cells (period varchar, table_name varchar,
                   row_key varchar, column_name varchar, reason varchar, note varchar)""")
    con.execute("delete from disclosure_cells where period = ?", [period.label])
    with_frame(con, frame, "insert into disclosure_cells by name select * from _frame")
