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
cannot help (everything non-zero of a column is blanked and the marks still pin a cell, e.g. a
district total of 10 made of ten cells of 1), :class:`DisclosureError` stops the run: nothing
is published rather than that.

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

Rates whose numerator or denominator is blanked are blanked. Only tables in schema
``published`` are ever exported.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import duckdb
import polars as pl

from pipeline.periods import Period
from pipeline.settings import DisclosureSettings
from pipeline.warehouse import fetch_frame

TOTAL = "ALL"
PRIMARY = "primary"
SECONDARY = "secondary"
_PUBLISHED, _NULL = "", "null"
_INF = math.inf
_TRIES = 6  # options tried one by one for a pinned cell (each try re-propagates the bounds)


class DisclosureError(ValueError):
    """A table cannot be made safe by blanking more counts (or its shape is not understood)."""


@dataclass(frozen=True)
class PublishedTable:
    name: str
    keys: tuple[str, ...]
    counts: tuple[str, ...]  # suppressed when small
    rates: dict[str, tuple[str, ...]]  # rate column -> the counts it is computed from
    public: tuple[str, ...] = ()  # counts that are public already (resident population)
    #: The hierarchy below the other keys, outermost first: a level whose columns are all 'ALL'
    #: marks a total of the rows below it. Empty: no totals, primary suppression only.
    levels: tuple[tuple[str, ...], ...] = ()
    #: Rates a total row computes from the rows below it (a directly standardised rate and its
    #: limits): blanked when a source count of the row or of any row below it is blanked.
    group_rates: dict[str, tuple[str, ...]] = field(default_factory=dict)


PUBLISHED_TABLES = (
    PublishedTable(
        "district_ckd_prevalence",
        keys=("period", "district_code", "sex", "age_band"),
        counts=("persons_tested", "persons_ckd", "persons_ckd_g3_g5"),
        rates={"ckd_share_of_tested": ("persons_ckd", "persons_tested"),
               "ckd_share_of_tested_low": ("persons_ckd", "persons_tested"),
               "ckd_share_of_tested_high": ("persons_ckd", "persons_tested"),
               "ckd_per_1000_residents": ("persons_ckd",)},
        # a standardised rate is a weighted sum of its cells: blank it when any cell is blank
        group_rates={"ckd_per_1000_standardised": ("persons_ckd",),
                     "ckd_per_1000_standardised_low": ("persons_ckd",),
                     "ckd_per_1000_standardised_high": ("persons_ckd",)},
        public=("population",),
        levels=(("district_code",), ("sex", "age_band")),
    ),
    PublishedTable(
        "district_screening_coverage",
        keys=("period", "district_code"),
        counts=("persons_with_diabetes", "with_egfr", "with_acr", "with_egfr_and_acr"),
        rates={"share_with_both": ("with_egfr_and_acr", "persons_with_diabetes"),
               "share_with_both_low": ("with_egfr_and_acr", "persons_with_diabetes"),
               "share_with_both_high": ("with_egfr_and_acr", "persons_with_diabetes")},
        levels=(("district_code",),),
    ),
    PublishedTable(
        "district_decline_incidence",
        keys=("period", "district_code"),
        counts=("persons_tested", "persons_decline_30", "persons_decline_40", "persons_decline_57"),
        rates={f"decline_{t}_per_1000_tested": (f"persons_decline_{t}", "persons_tested") for t in (30, 40, 57)}
        | {f"decline_{t}_per_1000_person_years": (f"persons_decline_{t}", "persons_tested")
           for t in (30, 40, 57)},
        levels=(("district_code",),),
    ),
)  # fmt: skip


# --------------------------------------------------------------------------- the hierarchy


@dataclass
class _Group:
    total: int  # row index of the total
    cells: list[int]  # row indices of the rows it adds up


def _hierarchy(frame: pl.DataFrame, table: PublishedTable) -> tuple[list[int], list[_Group], list[int]]:
    """Row order (by key), the sum groups, and each row's parent (-1: none)."""
    level_cols = [c for level in table.levels for c in level]
    outer = [k for k in table.keys if k not in level_cols]
    key_rows = frame.select(list(table.keys)).rows()
    order = sorted(range(frame.height), key=lambda i: (tuple("" if v is None else str(v) for v in key_rows[i]), i))
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
                    f"{table.name}: row {dict(row)} is not a cell or a total of the hierarchy {table.levels}")
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
    raise DisclosureError("bounds did not settle")  # pragma: no cover - a tree settles in a few sweeps


class _Table:
    """The suppression state of one frame: status per row and count column."""

    def __init__(self, frame: pl.DataFrame, table: PublishedTable, rules: DisclosureSettings):
        self.table, self.rules = table, rules
        self.values = {c: frame[c].to_list() for c in table.counts}
        self.order, self.groups, self.parent = _hierarchy(frame, table)
        self.rank = {row: r for r, row in enumerate(self.order)}
        self.status = {
            c: [_NULL if v is None else PRIMARY if rules.suppress_min <= v <= rules.suppress_max else _PUBLISHED
                for v in values]
            for c, values in self.values.items()
        }  # fmt: skip
        self.group_of_total = {g.total: g for g in self.groups}
        self.group_of_cell = {c: g for g in self.groups for c in g.cells}

    def blanked(self, column: str, row: int) -> bool:
        return self.status[column][row] in (PRIMARY, SECONDARY)

    def row_flag(self, row: int) -> str:
        states = [self.status[c][row] for c in self.table.counts]
        return PRIMARY if PRIMARY in states else SECONDARY if SECONDARY in states else ""

    def row_blanked(self, row: int) -> int:
        return sum(self.blanked(c, row) for c in self.table.counts)

    def bounds(self, column: str) -> tuple[list[float], list[float]]:
        """What a reader of the published table knows of each count, after propagation."""
        rules, lo, hi = self.rules, [], []
        for row, (value, state) in enumerate(zip(self.values[column], self.status[column])):
            if state == _PUBLISHED:
                lo.append(float(value))
                hi.append(float(value))
            elif state == _NULL:
                lo.append(0.0)
                hi.append(_INF)
            else:
                low, high = 1.0, _INF  # zeros are published, so a blanked count is at least 1
                flag = self.row_flag(row)
                if flag == SECONDARY:
                    low = float(rules.suppress_max + 1)  # blanked only to protect: above the band
                elif flag == PRIMARY and self.row_blanked(row) == 1:
                    low, high = float(rules.suppress_min), float(rules.suppress_max)  # the small one
                lo.append(low)
                hi.append(high)
        _propagate(lo, hi, self.groups)
        return lo, hi

    def pinned(self, column: str) -> list[int]:
        lo, hi = self.bounds(column)
        rows = [r for r in range(len(lo)) if self.blanked(column, r) and lo[r] >= hi[r]]
        return sorted(rows, key=lambda r: (self._depth(r), self.rank[r]))

    def _depth(self, row: int) -> int:
        depth = 0
        while self.parent[row] >= 0:
            row, depth = self.parent[row], depth + 1
        return depth

    def _open(self, column: str, rows: list[int], row: int) -> list[int]:
        """Published counts among ``rows`` (not ``row``) that can protect, smallest first, then
        key order. Only counts above the band are used (zeros never; counts below
        ``suppress_min``, when it is above 1, neither), so a secondary count is always above
        ``suppress_max``, which is what the 'secondary' mark tells a reader."""
        values, status = self.values[column], self.status[column]
        floor = self.rules.suppress_max
        usable = [r for r in rows if r != row and status[r] == _PUBLISHED and values[r] > floor]
        return sorted(usable, key=lambda r: (values[r], self.rank[r]))

    def _try(self, column: str, option: int, row: int) -> bool:
        """Would blanking ``option`` alone free ``row``?"""
        self.status[column][option] = SECONDARY
        freed = row not in self.pinned(column)
        self.status[column][option] = _PUBLISHED
        return freed

    def choose(self, column: str, row: int) -> int | None:
        """The count to blank next to protect the pinned ``row``.

        First the cells next to it in its group and, for a total, the cells below it: the first
        (smallest first) that frees it on its own, else the smallest of them (the loop goes on).
        Then the group's total, then any published non-zero count of the table.
        """
        as_cell, as_total = self.group_of_cell.get(row), self.group_of_total.get(row)
        siblings = self._open(column, as_cell.cells, row) if as_cell else []
        below = self._open(column, as_total.cells, row) if as_total else []
        near = siblings + below
        for option in near[:_TRIES]:
            if self._try(column, option, row):
                return option
        if near:
            return near[0]
        total = self._open(column, [as_cell.total], row) if as_cell else []
        anywhere = total or self._open(column, self.order, row)
        return anywhere[0] if anywhere else None

    def protect(self, column: str) -> bool:
        """Blank secondary cells in ``column`` until no blanked cell is pinned; True if any.

        The cell blanked last is looked at first: when a new secondary is itself pinned (a
        district total that is the sum of its published cells), its own group is fixed before
        more is blanked elsewhere.
        """
        changed, recent = False, []
        while pinned := self.pinned(column):
            latest = [r for r in recent if r in pinned]
            row = latest[-1] if latest else pinned[0]
            choice = self.choose(column, row)
            if choice is None:
                raise DisclosureError(
                    f"{self.table.name}.{column}: a blanked count cannot be protected by blanking more"
                )
            self.status[column][choice] = SECONDARY
            recent.append(choice)
            changed = True
        return changed

    def run(self) -> None:
        if not self.groups:
            return
        # A row's flag ties its columns together (a new secondary can change what the flag says
        # about another column), so go round the columns until none changes.
        while any([self.protect(c) for c in self.table.counts]):
            pass


# --------------------------------------------------------------------------- suppression


def suppress(frame: pl.DataFrame, table: PublishedTable, rules: DisclosureSettings) -> pl.DataFrame:
    """Blank small counts, the counts that would give them away, and the rates built on them.

    Adds ``n_suppressed`` (blanked counts in the row) and ``suppression`` ('' nothing blanked,
    'primary' the row holds a small count, 'secondary' counts blanked only to protect others).
    """
    state = _Table(frame, table, rules)
    state.run()
    blank = {c: pl.Series([state.blanked(c, r) for r in range(frame.height)], dtype=pl.Boolean)
             for c in table.counts}  # fmt: skip
    below = _below(state, table, blank)
    out = frame.with_columns(
        [pl.when(blank[c]).then(None).otherwise(pl.col(c)).alias(c) for c in table.counts]
        + [pl.when(pl.any_horizontal([blank[s] for s in srcs])).then(None).otherwise(pl.col(r)).alias(r)
           for r, srcs in table.rates.items() if r in frame.columns]
        + [pl.when(pl.any_horizontal([below[s] for s in srcs])).then(None).otherwise(pl.col(r)).alias(r)
           for r, srcs in table.group_rates.items() if r in frame.columns]
        + [pl.sum_horizontal([blank[c].cast(pl.Int32) for c in table.counts]).alias("n_suppressed"),
           pl.Series("suppression", [state.row_flag(r) for r in range(frame.height)], dtype=pl.String)]
    )  # fmt: skip
    return out


def _below(state: _Table, table: PublishedTable, blank: dict[str, pl.Series]) -> dict[str, pl.Series]:
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
    return con.execute(
        "select count(*) from duckdb_tables() where schema_name = 'published' and table_name = ?", [name]
    ).fetchall()[0][0] > 0


def disclose_stage(con: duckdb.DuckDBPyConnection, rules: DisclosureSettings, period: Period) -> dict[str, int]:
    """Replace this period's rows of every published table."""
    counts = {}
    for table in PUBLISHED_TABLES:
        frame = fetch_frame(con, f"select * from {table.name} where period = ?", [period.label])
        if frame.height == 0:  # nothing this period: drop what an earlier run published for it
            if _exists(con, table.name):
                con.execute(f"delete from published.{table.name} where period = ?", [period.label])
            counts[table.name] = 0
            continue
        published = suppress(frame, table, rules)
        con.register("_pub", published.to_arrow())
        exists = con.execute(
            "select count(*) from duckdb_tables() where schema_name = 'published' and table_name = ?",
            [table.name],
        ).fetchall()[0][0]
        if not exists:
            con.execute(f"create table published.{table.name} as select * from _pub")
        else:
            _add_missing_columns(con, table.name)
            con.execute(f"delete from published.{table.name} where period = ?", [period.label])
            con.execute(f"insert into published.{table.name} by name select * from _pub")
        con.unregister("_pub")
        counts[table.name] = published.height
    return counts


def _add_missing_columns(con: duckdb.DuckDBPyConnection, name: str) -> None:
    """A warehouse made before a column was added gets it (empty for the earlier periods)."""
    have = {c for (c,) in con.execute(
        "select column_name from duckdb_columns() where schema_name = 'published' and table_name = ?", [name]
    ).fetchall()}  # fmt: skip
    for column, dtype in con.execute("select column_name, column_type from (describe _pub)").fetchall():
        if column not in have:
            con.execute(f'alter table published.{name} add column "{column}" {dtype}')
