"""Cell suppression for linked tables of additive counts, and the audit that proves it holds.

A release publishes, for every geography unit and breakdown, counts that add up: a parent area
is the sum of its children, an 'all' category the sum of its categories. Withholding a cell whose
few respondents could be singled out (primary suppression) is not enough when its value can be
recovered by subtraction from published totals; other cells must be withheld with it
(complementary suppression). Whether a pattern holds is a question for linear programming: given
everything published, which values could a withheld cell still take? (Hundepool et al. 2012,
Statistical Disclosure Control, Wiley, ch. 4 and 5; Fischetti & Salazar-González 2000, JASA
95:916.)

    table = linked_table(unit=..., parent=..., level=..., domains=..., categories=...)
    primary = primary_cells(n, x, min_respondents=5, unanimous_below=0)
    result = protect_table(table, quantities=[...], withheld=..., eligible=..., cost=...)

The reader's knowledge (the "attacker" of the literature), per quantity (weighted count, sample
size, ...): each relation holds exactly (Σ parts − total = 0); a published figure lies in the
interval its rounding leaves (`published_lower`..`published_upper`); a withheld figure lies in
`hidden_lower`..`hidden_upper` (at least 0, at most the table's grand total, or tighter when the
published reason codes say more). The feasible range of a withheld cell is the min and max of its
value over that polyhedron.

Protection rule (sliding protection level in Fischetti & Salazar-González's terms): a protected
cell passes when the width of its feasible range, upper − lower, is at least `required`. The
width is what limits how closely a reader can pin the value down, whichever side the true value
sits on, and it treats a count of 0 (where no lower margin is possible) like any other.

Complementary suppression (`protect_table`): a mixed-integer program (HiGHS, `linear_program`) chooses
the cells to hide at least cost, subject to (a) no relation holds exactly one hidden cell that
needs protecting or was chosen as a complement (two per relation is necessary, not sufficient);
(b) capacity rows known before any audit: the ±1 dual on a single relation bounds a protected
cell's width by the room its relation partners have; (c) the capacity cuts of Fischetti &
Salazar-González: after a solve the audit finds the protected cells whose range is still too
narrow, and the duals of each such cell's linear programs give a linear inequality in the
hide/publish decisions that every protecting pattern satisfies and the current one violates.
The first two solves are global; after that the cells already chosen are kept and only additions
are optimised, so that the rounds converge (re-solving everything can trade one failure for
another) and earlier proofs stay valid. A time limit bounds the optimisation; when it runs out
(or the solver fails) a greedy pattern is built instead and audited the same way. Cells withheld
for other reasons (unreliable figures) are not secrets: they need no protection but are hidden
anyway, so they serve as complements at no cost.

The audit (`audit_quantity`) proves, for every protected cell, that two sets of values a reader
cannot rule out differ in that cell by at least the required width (a lower bound on the width
of its range), cheapest proof first:
1. short cycles of the table (a unit's categories traded against a sibling unit's, rectangles in
   a two-way table) whose cells are all hidden, moved as far as the bounds allow: the best one
   up and down first, found per circuit from each unit's sibling with most room, then several
   added up where one falls short;
2. where many cells are left, witness rounds: linear programs over a few copies of the hidden
   cells of their linked components, each cell asked to come out high in one copy and low in
   another; rounds drop the cells proven;
3. per cell, the exact min and max with published figures taken at face value (the hidden cells
   linked to it only), then over every cell within a few relations of those, then over the whole
   table, published figures free within their rounding intervals (HiGHS, `linear_program`): each
   step a proof, or a cut valid for the full reader model when its dual bound falls short, or the
   exact range when its width meets that bound; the whole table is the final word. The side that
   can reach the width alone goes first, and the other is skipped when the first, with the points
   found so far, proves the cell; a cell those points prove needs no program at all, nor a side
   they already take to the cell's own bound (usually 0).
Proofs are kept and reused while the cells they move keep their bounds; the values of the proofs
are the audit's ranges (`lower`, `upper`): a reader's full range contains them.
"""

from __future__ import annotations

import itertools
import time
from dataclasses import dataclass
from enum import Enum
from functools import cached_property
from math import comb

import numpy as np
from scipy import sparse
from scipy.sparse.csgraph import connected_components

from pipeline.methods import lookup_member
from pipeline.methods.linear_program import LinearProgram

__all__ = [
    "CostKind",
    "LinkedTable",
    "PrimaryCells",
    "ProtectionResult",
    "Quantity",
    "QuantityAudit",
    "audit_quantity",
    "derivable_range",
    "feasible_range",
    "linked_table",
    "primary_cells",
    "protect_table",
    "round_half_up",
    "suppression_cost",
]

# A width within this relative distance of what is required counts as reaching it: the linear
# programs are solved to HiGHS's default feasibility tolerance (1e-7), far below any count.
_WIDTH_TOLERANCE = 1e-7
# Witness rounds: copies per round, and rounds before the rest go to the exact programs. Three
# copies let most neighbouring protected cells take their high and low sides in different
# copies; after the first round each unproven cell keeps the copies it came out highest and
# lowest in, which usually resolves the rest in a few rounds (see the module docstring).
_WITNESS_COPIES = 3
_WITNESS_ROUNDS = 8
# Witness rounds only for more than this many cells left after the cycles; fewer go straight to
# the per-cell programs, where the points each program finds prove neighbours too. Against
# rounds for any number (over whole components, then over neighbourhoods below 250 cells) this
# took 19% off the demo's protect time and 10% off the S table's, with the same patterns, and
# added 4–6% on the M table's (one program per cell costs more in its larger components).
_MANY = 500
# Exact ranges: first over the cells within this many relations of a cell's linked hidden cells
# (a small program; usually the exact range already, which the duals then confirm), the whole
# table only when that falls short (three rings left a quarter of the whole-table programs that
# two did, on the benchmark's national table).
_RINGS = 3
# A witness round costs about as much as a handful of single-cell programs: rounds go on while
# each proves at least this many cells (and the share of the rest given to the search). 20 took
# 7% off the demo's and the S table's protect time against 4, and left the M table's as it was.
_MIN_GAIN = 20
# Witness programs are split along the independent blocks of the cells they span, into programs
# of at least this many cells (one program of 15,000 cells took 1.5 times as long as seven of
# about 2,000 on the benchmark's S table; on the demo, splitting below that cost more than it gave).
_PROGRAM_CELLS = 2000
# Witness rounds charge this much per unit a cell moves, over the largest width required: a
# target gains 1/required per unit it moves, so a proof is never traded for fewer moves unless it
# needs a thousand cells moved per unit. It keeps the cells a proof does not need at their true
# values (see `_witness_round`); 1e-3 halved the simplex iterations of the S benchmark's rounds.
_WITNESS_MOVE_COST = 1e-3
# Solves of the whole mixed-integer program; later rounds keep the cells chosen and add to them.
_GLOBAL_ROUNDS = 2
# Rounds of cuts in all before the greedy fall-back takes over.
_MAX_CUT_ROUNDS = 40
# The mixed-integer program chooses among the cells within this many relations of where its
# constraints ask for something: on the benchmark's national table 2 costs what the whole table
# costs in a program half the size (1 cut the time again but cost 14% more cells on the demo).
_MILP_REACH = 2
# Circuits of a unit's category relations (the short cycles) are looked for among at most this
# many subsets of each size (a breakdown into many categories has millions; 2 million screen in
# about a second).
_CIRCUIT_SUBSETS = 2_000_000
# Cycle proofs add up at most this many cycles per target and direction, best first (see
# `_cycle_proofs`).
_CYCLES_PER_TARGET = 12
_NO_PATTERN = "no pattern satisfies the cuts"


class CostKind(str, Enum):
    """What hiding one more cell costs (stable names; the values appear in configs)."""

    CELLS = "cells"                   # 2^(steps above the finest cells): detail before totals
    WEIGHTED_BASE = "weighted_base"   # the population the cell stands for


# --------------------------------------------------------------------------------------------
# The linked table


def _rooms_at(cells: np.ndarray, step: np.ndarray, n_cells: int) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """For moves that take `cells` by `step` (either array's shape): where the room for running a
    move forwards, and backwards, sits in the array [room up of every cell, room down of every
    cell] (a cell's room up where the step raises it, its room down where it lowers it), and the
    steps' sizes |step| (None when all are 1)."""
    rises = step > 0
    size = np.abs(step)
    return cells + n_cells * ~rises, cells + n_cells * rises, None if np.all(size == 1) else size


def _least_room(room: np.ndarray, at: np.ndarray, size: np.ndarray | None, axis: int) -> np.ndarray:
    """How far each move can go: the least of its cells' rooms (`room` at `at`) over their step sizes."""
    rooms = room[at] if size is None else room[at] / size
    return np.minimum.reduce(rooms, axis=axis)


@dataclass(frozen=True)
class SiblingCircuits:
    """Circuits φ of the category relations, each at every unit of its geography level that has
    all of its cells, one row per unit and circuit; the circuits of one size together. cells:
    (rows × cells of φ); step: φ on each row; group: rows of one key are the same circuit at units
    of one parent, and the cycles are φ at one of them minus φ at another; −1 where each unit runs
    φ alone (the top level)."""

    cells: np.ndarray
    step: np.ndarray
    group: np.ndarray
    n_cells: int

    @cached_property
    def rooms_at(self) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        """`_rooms_at` of each row's +φ (asked on every audit: kept)."""
        return _rooms_at(self.cells, self.step, self.n_cells)

    @cached_property
    def by_group(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The rows in order of group (stable), where each group starts in that order, and each
        row's group as a position among those starts (asked on every audit: kept)."""
        order = np.argsort(self.group, kind="stable")
        ordered = self.group[order]
        starts = np.flatnonzero(np.r_[True, ordered[1:] != ordered[:-1]]) if len(order) else np.zeros(0, np.int64)
        of_row = np.empty(len(order), dtype=np.int64)
        of_row[order] = np.repeat(np.arange(len(starts)), np.diff(np.r_[starts, len(order)]))
        return order, starts, of_row


@dataclass(frozen=True)
class LinkedTable:
    """Cells of one indicator's tables and the additive relations between them.

    relations: (relations × cells) sparse, +1 on each part and −1 on the total, so that every
    row times the true values is 0. coarseness: (cells,) steps above the finest cells (geography
    levels below the cell's level plus the number of 'all' domains), for the cost of hiding."""

    relations: sparse.csr_matrix
    coarseness: np.ndarray
    # short moves that keep every relation (rows over cells): a unit's categories traded
    # against a sibling unit's (see `_short_cycles`); they make cheap proofs for most cells
    cycles: sparse.csr_matrix | None = None
    # the same moves by the circuit they run and the units they pair: the best cycle through a
    # cell is found per circuit without looking at every sibling's cycle (`_best_cycles`)
    circuits: tuple[SiblingCircuits, ...] = ()

    @property
    def n_cells(self) -> int:
        return self.relations.shape[1]

    @cached_property
    def cycles_by_cell(self) -> sparse.csc_matrix:
        """The cycles column by column: for each cell, the cycles that move it and by how much
        (asked on every audit: kept)."""
        return (self.cycles if self.cycles is not None else sparse.csr_matrix((0, self.n_cells))).tocsc()

    @cached_property
    def cycle_rooms(self) -> list[tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]]:
        """The cycles grouped by their number of cells, one (cycles, plus, minus, size) per group
        (asked on every audit: kept): for each cycle and each of its cells, where the room for a
        step +1 along the cycle sits in the array [room up of every cell, room down of every
        cell] (the cell's room up where the cycle raises it, its room down where it lowers it),
        where the room for a step −1 sits, and the cells' steps |δ| (None when all are 1, as in
        the cycles of `linked_table`)."""
        C = self.cycles if self.cycles is not None else sparse.csr_matrix((0, self.n_cells))
        lengths = np.diff(C.indptr)
        groups = []
        for length in np.unique(lengths[lengths > 0]):
            rows = np.flatnonzero(lengths == length)
            entries = C.indptr[rows][None, :] + np.arange(length)[:, None]  # cells × cycles
            groups.append((rows, *_rooms_at(C.indices[entries].astype(np.int64), C.data[entries], self.n_cells)))
        return groups

    @property
    def n_relations(self) -> int:
        return self.relations.shape[0]


def linked_table(*, unit, parent, level, domains, categories) -> LinkedTable:
    """The relations of a table of cells keyed by geography unit and domain categories.

    unit: (cells,) integer id of each cell's geography unit; parent: (units,) id of each unit's
    parent unit, −1 at the top; level: (cells,) depth of the unit (0 = coarsest); domains:
    (cells, D) category position in each domain, −1 for 'all'; categories: (D,) number of
    categories of each domain.

    Relations: a parent unit's cell is the sum of its children's cells with the same categories
    (where the breakdown goes down to the children's level), and a cell is the sum of the cells
    that split it by the categories of further domains, for each smallest such breakdown present
    at that level (so that [sex] and [age] each split 'all', and [sex, age] splits both). Every
    relation must be complete: all children units and all category combinations present."""
    unit = np.asarray(unit, dtype=np.int64)
    parent = np.asarray(parent, dtype=np.int64)
    level = np.asarray(level, dtype=np.int64)
    n = len(unit)
    domains = np.asarray(domains, dtype=np.int64).reshape(n, -1)
    categories = np.asarray(categories, dtype=np.int64).reshape(-1)
    n_domains = domains.shape[1]
    if len(level) != n or len(categories) != n_domains:
        raise ValueError(f"unit ({n}), level ({len(level)}), domains ({domains.shape}) and categories "
                         f"({len(categories)}) do not agree")
    if n and (unit.min() < 0 or unit.max() >= len(parent)):
        raise ValueError(f"unit ids must lie in [0, {len(parent)}) (one parent entry per unit)")
    if np.any((domains < -1) | (domains >= categories[None, :])):
        raise ValueError("domains must hold category positions in [0, categories) or −1 for 'all'")

    # one integer key per (unit, categories): 'all' is digit 0, category c is digit c + 1
    sizes = categories + 1
    mult = np.ones(n_domains, dtype=np.int64)
    for d in range(n_domains - 2, -1, -1):
        mult[d] = mult[d + 1] * sizes[d + 1]
    base = int(np.prod(sizes)) if n_domains else 1
    digits = domains + 1
    key = unit * base + (digits @ mult if n_domains else 0)
    order = np.argsort(key, kind="stable")
    sorted_keys = key[order]
    if n > 1 and np.any(sorted_keys[1:] == sorted_keys[:-1]):
        raise ValueError("two cells share a geography unit and categories")

    def find(keys: np.ndarray) -> np.ndarray:
        pos = np.minimum(np.searchsorted(sorted_keys, keys), max(n - 1, 0))
        hit = sorted_keys[pos] == keys if n else np.zeros(len(keys), dtype=bool)
        return np.where(hit, order[pos], -1)

    totals, parts, tags = [], [], []
    n_children = np.bincount(parent[parent >= 0], minlength=len(parent))

    # geography: cell (u, d) is a part of (parent(u), d)
    up = parent[unit]
    has_parent = np.flatnonzero(up >= 0)
    total = find(up[has_parent] * base + (digits[has_parent] @ mult if n_domains else 0))
    found = total >= 0
    totals.append(total[found])
    parts.append(has_parent[found])
    tags.append(np.zeros(int(found.sum()), dtype=np.int64))

    # domains: for each level, each breakdown S and each smallest breakdown S' ⊋ S present there
    mask = ((domains >= 0) * (1 << np.arange(n_domains))).sum(axis=1) if n_domains else np.zeros(n, np.int64)
    for lv in np.unique(level):
        here = level == lv
        present = sorted(set(mask[here].tolist()))
        for small in present:
            larger = [m for m in present if m != small and m & small == small]
            smallest = [m for m in larger if not any(o != m and o & m == o for o in larger)]
            for big in smallest:
                members = np.flatnonzero(here & (mask == big))
                kept = np.array([(small >> d) & 1 for d in range(n_domains)], dtype=np.int64)
                projected = unit[members] * base + (digits[members] * kept) @ mult
                total = find(projected)
                found = total >= 0
                totals.append(total[found])
                parts.append(members[found])
                tags.append(np.full(int(found.sum()), 1 + big, dtype=np.int64))

    totals = np.concatenate(totals)
    parts = np.concatenate(parts)
    tags = np.concatenate(tags)
    relation_key = totals * (1 + (1 << n_domains)) + tags
    uniq, row, n_parts = np.unique(relation_key, return_inverse=True, return_counts=True)
    # completeness: the parts of a relation must be all children / all category combinations
    first = np.zeros(len(uniq), dtype=np.int64)
    first[row] = np.arange(len(row))
    rel_total, rel_tag = totals[first], tags[first]
    expected = np.empty(len(uniq), dtype=np.int64)
    geo = rel_tag == 0
    expected[geo] = n_children[unit[rel_total[geo]]]
    for i in np.flatnonzero(~geo):
        big = int(rel_tag[i]) - 1
        split = [d for d in range(n_domains) if (big >> d) & 1 and domains[rel_total[i], d] < 0]
        expected[i] = int(np.prod(categories[split])) if split else 1
    if np.any(expected != n_parts):
        bad = int(np.flatnonzero(expected != n_parts)[0])
        raise ValueError(f"relation of total cell {int(rel_total[bad])} is incomplete: {int(n_parts[bad])} "
                         f"parts present, {int(expected[bad])} expected")
    rows = np.concatenate([row, np.arange(len(uniq))])
    cols = np.concatenate([parts, rel_total])
    vals = np.concatenate([np.ones(len(parts)), -np.ones(len(uniq))])
    relations = sparse.csr_matrix((vals, (rows, cols)), shape=(len(uniq), n))
    levels_below = (level.max() if n else 0) - level
    coarseness = levels_below + (domains < 0).sum(axis=1)
    cycles, circuits = _short_cycles(relations, unit=unit, parent=parent, level=level,
                                     code=digits @ mult if n_domains else np.zeros(n, np.int64), base=base,
                                     find=find)
    return LinkedTable(relations=relations, coarseness=coarseness.astype(np.int64), cycles=cycles,
                       circuits=circuits)


def _short_cycles(relations, *, unit, parent, level, code, base, find, max_size: int = 4):
    """Moves δ with relations·δ = 0 of the form φ at unit u minus φ at a sibling unit u' (same
    parent), φ a circuit (minimal dependent set) of the category relations at one unit over the
    categories with no finer geography below them; at the top level, φ alone. In a two-way table
    these are the rectangles of four cells; with margins, chains through the 'all' cells (every
    circuit of the demo and benchmark tables has at most four cells: `max_size`). Each is checked
    against every relation before it is kept. Returns the cycles (rows over cells) and the same
    cycles by circuit (`SiblingCircuits`; the circuits whose every cycle passed the check)."""
    n = len(unit)
    out_rows, out_cols, out_vals = [], [], []
    n_cycles = 0
    circuits = []  # (cells, φ, parent or None, the circuit's rows before the check)
    levels = np.unique(level)
    present = {int(lv): set(code[level == lv].tolist()) for lv in levels}
    for lv in levels:
        here = np.flatnonzero(level == lv)
        units_here = np.unique(unit[here])
        first = here[unit[here] == units_here[0]]
        below = present.get(int(lv) + 1, set())
        vectors = [c for c in sorted(set(code[first].tolist())) if c not in below]  # childless
        if len(vectors) < 2:
            continue
        cols = first[np.isin(code[first], vectors)]
        cols = cols[np.argsort(code[cols])]
        # the unit's own category relations: rows living within its cells
        sub = relations[:, first]
        inside = np.asarray(abs(sub).sum(axis=1)).ravel() == np.asarray(abs(relations).sum(axis=1)).ravel()
        rows = np.flatnonzero(inside & (np.asarray(abs(sub).sum(axis=1)).ravel() > 0))
        if not len(rows):
            continue
        D = relations[rows][:, cols].toarray()
        found = _circuits(D, max_size)
        if not found:
            continue
        vec_codes = code[cols]
        top = lv == levels.min() and np.all(parent[units_here] < 0)
        if top:
            pairs = [(u, -1) for u in units_here]
        else:
            pairs = []
            for p in np.unique(parent[units_here]):
                sib = units_here[parent[units_here] == p]
                pairs += [(a, b) for i, a in enumerate(sib) for b in sib[i + 1:]]
        if not pairs:
            continue
        pairs = np.array(pairs, dtype=np.int64)
        for support, phi in found:
            codes = vec_codes[support]
            first_row = n_cycles
            a_cells = find((pairs[:, :1] * base + codes[None, :]).ravel()).reshape(len(pairs), -1)
            if (pairs[:, 1] >= 0).any():
                b_cells = find((np.maximum(pairs[:, 1:], 0) * base + codes[None, :]).ravel()).reshape(len(pairs), -1)
                b_cells[pairs[:, 1] < 0] = -2
            else:
                b_cells = np.full_like(a_cells, -2)
            for alone in (True, False):  # φ at a top unit alone; φ at u minus φ at its sibling
                ok = (a_cells >= 0).all(axis=1) & ((b_cells == -2).all(axis=1) if alone else (b_cells >= 0).all(axis=1))
                m = int(ok.sum())
                if not m:
                    continue
                cells = a_cells[ok] if alone else np.hstack([a_cells[ok], b_cells[ok]])
                vals = phi if alone else np.concatenate([phi, -phi])
                out_rows.append(np.repeat(np.arange(n_cycles, n_cycles + m), cells.shape[1]))
                out_cols.append(cells.ravel())
                out_vals.append(np.tile(vals, m))
                n_cycles += m
            unit_cells = find((units_here[:, None] * base + codes[None, :]).ravel()).reshape(len(units_here), -1)
            whole = (unit_cells >= 0).all(axis=1)
            circuits.append((unit_cells[whole], np.asarray(phi, dtype=np.float64),
                             None if top else parent[units_here[whole]], first_row, n_cycles))
    if not n_cycles:
        return sparse.csr_matrix((0, n)), ()
    C = sparse.csr_matrix((np.concatenate(out_vals), (np.concatenate(out_rows), np.concatenate(out_cols))),
                          shape=(n_cycles, n))
    residual = np.asarray(abs(relations @ C.T).max(axis=0).todense()).ravel() if C.shape[0] else np.zeros(0)
    kept = residual < 1e-9
    by_size: dict[int, list] = {}
    for i, (cells, phi, parents, start, end) in enumerate(circuits):
        if end > start and kept[start:end].all():
            group = np.full(len(cells), -1) if parents is None else i * (len(parent) + 1) + parents
            by_size.setdefault(len(phi), []).append((cells, np.tile(phi, (len(cells), 1)), group))
    return C[kept], tuple(SiblingCircuits(cells=np.concatenate([c for c, _, _ in parts]),
                                          step=np.concatenate([f for _, f, _ in parts]),
                                          group=np.concatenate([g for _, _, g in parts]), n_cells=n)
                          for parts in by_size.values())


def _circuits(D: np.ndarray, max_size: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """Minimal sets of columns of D that are linearly dependent, with their null vector scaled to
    +1 on the first column. Every subset up to max_size is screened at once: in a dependent set
    no row has exactly one nonzero entry (that column's part could not cancel), which leaves few
    to test by rank. Sizes whose subsets exceed _CIRCUIT_SUBSETS are not looked at (a unit with
    very many categories): the circuits only speed the audit up, the linear programs prove the
    rest."""
    k = D.shape[1]
    nonzero = (np.abs(D) > 1e-12).astype(np.uint8)
    found: list[tuple[np.ndarray, np.ndarray]] = []
    supports: list[set] = []
    for size in range(2, min(max_size, k) + 1):
        if comb(k, size) > _CIRCUIT_SUBSETS:
            break
        every = np.fromiter(itertools.chain.from_iterable(itertools.combinations(range(k), size)), dtype=np.int64)
        every = every.reshape(-1, size)
        screened = [chunk[~((nonzero[:, chunk].sum(axis=2) == 1).any(axis=0))]
                    for chunk in np.array_split(every, max(1, len(every) // 50_000))]
        for subset in np.concatenate(screened):
            if any(s <= set(subset.tolist()) for s in supports):
                continue  # contains a smaller circuit: not minimal
            _u, sv, vt = np.linalg.svd(D[:, subset])
            if int((sv > 1e-9).sum()) != size - 1:
                continue
            v = vt[-1]
            if np.any(np.abs(v) < 1e-9):
                continue
            v = v / v[0]
            if np.allclose(v, np.round(v), atol=1e-9):
                v = np.round(v)  # relations have ±1 entries: circuits are integer, keep them exact
            supports.append(set(subset.tolist()))
            found.append((subset, v))
    return found


def suppression_cost(table: LinkedTable, *, kind: str, weighted_base: np.ndarray) -> np.ndarray:
    """Cost of hiding each cell: `cells` counts 2^coarseness (a total weighs as the detail below
    it, roughly, so detail is hidden before totals and national figures last); `weighted_base`
    counts the population the cell stands for (small cells first by construction). Preferring
    detail over totals is common practice (Hundepool et al. 2012, §4.2)."""
    kind = lookup_member(CostKind, kind, what="cost").value
    if kind == CostKind.CELLS.value:
        return np.power(2.0, table.coarseness)
    base = np.asarray(weighted_base, dtype=np.float64)
    return np.maximum(base, 1e-9 * max(float(np.nanmax(base, initial=0.0)), 1.0))


# --------------------------------------------------------------------------------------------
# Primary suppression


@dataclass(frozen=True)
class PrimaryCells:
    """Cells withheld to protect respondents, and which side of each needs protecting: the count
    with the characteristic where 0 < x < k (or x = 0 under the unanimous rule), the count without
    it where 0 < n − x < k (or x = n under the unanimous rule). A side held by no one is protected
    only by the unanimous rule: a cell of 4 persons none of whom has the characteristic is flagged
    because few lack it, and only `unanimous_below` keeps its count with it from being pinned at 0."""

    few_respondents: np.ndarray
    unanimous: np.ndarray
    protect_count: np.ndarray
    protect_complement: np.ndarray

    @property
    def cells(self) -> np.ndarray:
        return self.few_respondents | self.unanimous


def primary_cells(sample_size, respondents, *, min_respondents: int, unanimous_below: int = 0) -> PrimaryCells:
    """Threshold rule on unweighted counts: 0 < x < k or 0 < n − x < k (k = min_respondents).
    Unanimous rule (off at 0): x = 0 or x = n with 0 < n < unanimous_below, since then every
    sampled member's answer is known. Cells without sample are not primary: they have no
    respondent to protect and their (zero) values are known from the reason code."""
    n = np.asarray(sample_size, dtype=np.int64)
    x = np.asarray(respondents, dtype=np.int64)
    if n.shape != x.shape or np.any(x < 0) or np.any(x > n):
        raise ValueError("respondents must satisfy 0 <= x <= n cell by cell")
    k, u = int(min_respondents), int(unanimous_below)
    if k < 0 or u < 0:
        raise ValueError(f"min_respondents ({k}) and unanimous_below ({u}) must be >= 0")
    few_with = (x > 0) & (x < k)
    few_without = (n - x > 0) & (n - x < k)
    small = (n > 0) & (n < u)
    none_have = small & (x == 0)
    all_have = small & (x == n)
    return PrimaryCells(few_respondents=few_with | few_without, unanimous=none_have | all_have,
                        protect_count=few_with | none_have,
                        protect_complement=few_without | all_have)


def round_half_up(values, step: float) -> np.ndarray:
    """Round to a multiple of `step`, halves up (0 = unrounded). |rounded − value| <= step/2."""
    values = np.asarray(values, dtype=np.float64)
    if not step:
        return values.copy()
    return np.floor(values / step + 0.5) * step


# --------------------------------------------------------------------------------------------
# The reader's knowledge and the audit


@dataclass(frozen=True)
class Quantity:
    """One additive figure of the table (weighted count, sample size, ...) as the audit sees it.

    value: the true value of every cell (known to the office, not to a reader). published_lower/
    published_upper: what a reader can infer about a published cell (its rounding interval).
    hidden_lower/hidden_upper: what a reader knows about a withheld cell without the relations
    (0 and the grand total, or tighter bounds the reason codes reveal); +inf allowed. required:
    the width each cell's feasible range needs when it is hidden (0 where nothing is needed)."""

    name: str
    value: np.ndarray
    published_lower: np.ndarray
    published_upper: np.ndarray
    hidden_lower: np.ndarray
    hidden_upper: np.ndarray
    required: np.ndarray

    def __post_init__(self):
        arrays = [np.asarray(getattr(self, f), dtype=np.float64) for f in
                  ("value", "published_lower", "published_upper", "hidden_lower", "hidden_upper", "required")]
        n = len(arrays[0])
        if any(a.shape != (n,) for a in arrays):
            raise ValueError(f"quantity {self.name!r}: every array must have one entry per cell ({n})")
        value, pl, pu, hl, hu, req = arrays
        slack = 1e-9 * np.maximum(1.0, np.abs(value))
        if np.any(hl > value + slack) or np.any(hu < value - slack):
            raise ValueError(f"quantity {self.name!r}: hidden bounds must contain the true value")
        if np.any(pl > value + slack) or np.any(pu < value - slack):
            raise ValueError(f"quantity {self.name!r}: published intervals must contain the true value")
        if np.any(~np.isfinite(req)) or np.any(req < 0):
            raise ValueError(f"quantity {self.name!r}: required widths must be finite and >= 0")
        for name, a in zip(("value", "published_lower", "published_upper", "hidden_lower", "hidden_upper",
                            "required"), arrays):
            object.__setattr__(self, name, a)


@dataclass(frozen=True)
class QuantityAudit:
    """What the audit proved for one quantity under one pattern.

    lower/upper (inner): for every hidden cell, values it could take that a reader cannot rule out
    (the feasible range contains [lower, upper]). outer_lower/outer_upper: bounds a reader can work
    out (the feasible range lies within them; `derivable_range`). exact: the two meet, or the
    linear programs gave the min and max: then lower/upper is the feasible range itself. NaN for
    published cells. ok: the proven width upper − lower reaches `required` (True where nothing is
    required or the cell is published)."""

    name: str
    lower: np.ndarray
    upper: np.ndarray
    outer_lower: np.ndarray
    outer_upper: np.ndarray
    exact: np.ndarray
    required: np.ndarray
    ok: np.ndarray

    @property
    def failed(self) -> np.ndarray:
        return ~self.ok


@dataclass(frozen=True)
class _Cut:
    """width(z) <= constant + Σ_j gain_j · z_j for every pattern z (1 = hidden), gain >= 0 (may be
    inf) on the cells `index`: a pattern protects `cell` only if it lifts the bound to `required`."""

    cell: int
    quantity: str
    required: float
    constant: float
    index: np.ndarray
    gain: np.ndarray

    def shortfall(self, hidden: np.ndarray) -> float:
        """What the cells hidden in `hidden` leave to be covered (<= 0: the cut holds)."""
        return self.required - self.constant - float(self.gain[hidden[self.index]].sum())


class _Witnesses:
    """Sets of values a reader cannot rule out, found so far for one quantity: deviations from
    the true values that satisfy every relation, kept sparse (one row per point). A point stays a
    witness under another pattern while each cell it moves stays within that cell's bounds there
    (hiding more cells only widens bounds, so points survive added complements). Points are split
    into the independent blocks of the program that found them, so that a change of pattern in one
    place leaves the points elsewhere standing."""

    def __init__(self, n: int):
        self.n = n
        self._pending: list[sparse.csr_matrix] = []
        self._matrix = sparse.csr_matrix((0, n))
        self._seen: dict[bytes, tuple[int, np.ndarray, np.ndarray]] = {}  # pattern -> rows checked, lo, hi

    def add(self, points: np.ndarray, blocks: np.ndarray | None = None, *, relations=None) -> np.ndarray:
        """Keeps the points (rows over every cell); returns those kept."""
        points = np.atleast_2d(points)
        if relations is not None and len(points):
            # a point from a linear program satisfies the relations to the solver's tolerance;
            # keep only those that do to 1e-6 of their own size (never a proof from a bad solve)
            residual = np.abs(relations @ points.T).max(axis=0) if relations.shape[0] else np.zeros(len(points))
            points = points[residual <= 1e-6 * np.maximum(1.0, np.abs(points).max(axis=1))]
        point, cell = np.nonzero(points)
        if not len(point):
            return points
        row = point
        if blocks is not None:  # one row per point and block
            _, row = np.unique(point * (int(blocks.max()) + 2) + blocks[cell] + 1, return_inverse=True)
            order = np.argsort(row, kind="stable")
            row, point, cell = row[order], point[order], cell[order]
        # the compressed rows directly: every row holds a nonzero, and scipy's general
        # constructor and the empty-row filter of `add_rows` were most of the time of a call
        indptr = np.r_[0, np.cumsum(np.bincount(row))]
        self._pending.append(sparse.csr_matrix((points[point, cell], cell, indptr), shape=(len(indptr) - 1, self.n)))
        return points

    def add_rows(self, rows: sparse.csr_matrix) -> None:
        rows = sparse.csr_matrix(rows)
        self._pending.append(rows[np.diff(rows.indptr) > 0])

    def matrix(self) -> sparse.csr_matrix:
        if self._pending:
            self._matrix = sparse.vstack([self._matrix] + self._pending, format="csr")
            self._pending = []
        return self._matrix

    def observed(self, q: Quantity, hidden: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Per cell, the lowest and highest deviation among the points valid under `hidden`
        (0 included: the true values are always possible)."""
        m = self.matrix()
        key = np.packbits(hidden).tobytes()
        done, lo, hi = self._seen.get(key, (0, np.zeros(self.n), np.zeros(self.n)))
        if done < m.shape[0]:  # only the points added since this pattern was last asked about
            new = m[done:]
            low, high = _rooms(q, hidden)
            cols = new.indices
            bad = (new.data < low[cols]) | (new.data > high[cols])
            rows = np.repeat(np.arange(new.shape[0]), np.diff(new.indptr))
            valid = np.ones(new.shape[0], dtype=bool)
            valid[rows[bad]] = False
            entries = valid[rows]
            lo, hi = lo.copy(), hi.copy()
            np.minimum.at(lo, cols[entries], new.data[entries])
            np.maximum.at(hi, cols[entries], new.data[entries])
            self._seen[key] = (m.shape[0], lo, hi)
        return lo, hi


def _rooms(q: Quantity, hidden: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The lowest and highest deviation from its true value each cell of a point may take for
    the point to count under `hidden`: the cell's bounds, give or take 1e-7 of its size (linear
    programs keep their bounds to HiGHS's feasibility tolerance, 1e-7)."""
    lower, upper = _bounds(q, hidden)
    tol = 1e-7 * np.maximum(1.0, np.abs(q.value))
    return lower - q.value - tol, upper - q.value + tol


def _bound_pairs(q: Quantity) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(published lower, published upper, hidden lower, hidden upper), each widened to hold the
    true value: it is feasible, and float dust must not put it a hair outside."""
    v = q.value
    return (np.minimum(q.published_lower, v), np.maximum(q.published_upper, v),
            np.minimum(q.hidden_lower, v), np.maximum(q.hidden_upper, v))


def _bounds(q: Quantity, hidden: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    pl, pu, hl, hu = _bound_pairs(q)
    return np.where(hidden, hl, pl), np.where(hidden, hu, pu)


def _touching(M: sparse.csr_matrix, cols: np.ndarray) -> np.ndarray:
    """The relations that hold any of the cells `cols`."""
    return np.flatnonzero(np.asarray(abs(M[:, cols]).sum(axis=1)).ravel() > 0)


def _free_components(relations: sparse.csr_matrix, free: np.ndarray) -> np.ndarray:
    """Component label of every free cell (−1 for fixed cells): free cells sharing a relation are
    linked; fixed cells are constants and link nothing."""
    labels = np.full(relations.shape[1], -1, dtype=np.int64)
    idx = np.flatnonzero(free)
    if not len(idx):
        return labels
    # one graph of cells and relations, an edge per membership (a tenth of the time of the cell ×
    # cell adjacency on the S benchmark's tables); components numbered by their lowest cell
    m = relations[:, idx].tocoo()
    n_free, n_nodes = len(idx), len(idx) + relations.shape[0]
    graph = sparse.csr_matrix((np.ones(m.nnz), (m.col, n_free + m.row)), shape=(n_nodes, n_nodes))
    _, comp = connected_components(graph, directed=False)
    labels[idx] = np.unique(comp[:n_free], return_inverse=True)[1]
    return labels


def feasible_range(table: LinkedTable, quantity: Quantity, hidden: np.ndarray, cell: int):
    """Exact min and max of one cell's value given everything published: two linear programs
    (HiGHS) over the cells linked to it, published figures free within their intervals. Returns
    (lower, upper, cut, points): the cut the duals give (None when the range is unbounded or the
    duals give no usable bound) and the two optimal points as deviations from the true values
    (witnesses for later patterns)."""
    hidden = np.asarray(hidden, dtype=bool)
    lower, upper = _bounds(quantity, hidden)
    lo, hi, cut, _bound, points, _exact = _Ranges(table, quantity, hidden, free=upper > lower).of(cell)
    return lo, hi, cut, points


class _Ranges:
    """Min and max of cells over their linked components among `free` (the other cells held at
    their true values), with the cut from the duals and the cut's value at this pattern (an upper
    bound on the width under the full reader model, whatever `free` was). With `free` = every cell
    whose bounds leave room this is the exact range; with `free` = the hidden cells it is the range
    when published figures are taken at face value (smaller, often much smaller programs: a lower
    bound on the width, with a valid cut).

    `widen`: cells added to each component, those of them within `_RINGS` relations of it (with
    `free` = the hidden cells and `widen` = every cell with room: the exact program cut down to the
    neighbourhood of the cell's linked hidden cells, everything further away at its true value; a
    much smaller program than the exact one, and as wide wherever the slack further away does not
    matter).

    One program per component, kept open: the cells of a component are asked one after another,
    and only the objective changes between them (see `linear_program`)."""

    def __init__(self, table: LinkedTable, q: Quantity, hidden: np.ndarray, *, free: np.ndarray,
                 widen: np.ndarray | None = None):
        self.table, self.q, self.hidden, self.free, self.widen = table, q, hidden, free, widen
        self.lower, self.upper = _bounds(q, hidden)
        self._labels: np.ndarray | None = None
        self._programs: dict[int, tuple] = {}

    def _program(self, cell: int):
        if self._labels is None:
            self._labels = _free_components(self.table.relations, self.free)
        label = int(self._labels[cell])
        if label not in self._programs:
            M, q = self.table.relations, self.q
            inside = self._labels == label
            cols = np.flatnonzero(inside)
            for _ring in range(_RINGS if self.widen is not None else 0):
                inside |= (np.asarray(abs(M[_touching(M, cols)]).sum(axis=0)).ravel() > 0) & self.widen
                cols = np.flatnonzero(inside)
            rows = _touching(M, cols)
            program = None
            if len(rows):
                sub = M[rows]
                A = sub[:, cols]
                # in deviations d = y − true value (the true point is d = 0, inside the bounds);
                # the right-hand side is the float residual of the true values (≈ 0). One column
                # per cell: the split form d = d⁺ − d⁻, whose first basis is feasible, took 1.7
                # times as long per solve on the demo (twice the columns to price, same answers)
                a = q.value[cols]
                b = -(sub @ q.value)
                lo = np.minimum(self.lower[cols] - a, 0.0)
                hi = np.maximum(self.upper[cols] - a, 0.0)
                program = LinearProgram(A, b, b, lo, hi, warm=True)
            self._programs[label] = (cols, rows, program)
        return self._programs[label]

    def of(self, cell: int, proof: tuple[float, float, float] | None = None):
        """(lower, upper, cut, bound, points, exact) for one cell. `proof`: (required width, lowest
        and highest deviation of the cell already witnessed): the side that can reach the width on
        its own is solved first (the minimum when the cell's value is at least the width: it can
        fall to 0), and the other is skipped when the first, with what is witnessed, proves the
        cell. Then lower or upper is the witnessed value, there is no cut and exact is False. A side
        witnessed at the cell's own bound is known without a program (exact, multipliers 0)."""
        table, q, lower, upper = self.table, self.q, self.lower, self.upper
        none = np.zeros((0, table.n_cells))
        if not self.free[cell]:
            return float(lower[cell]), float(upper[cell]), None, 0.0, none, True
        cols, rows, program = self._program(cell)
        if program is None:
            return float(lower[cell]), float(upper[cell]), None, float(upper[cell] - lower[cell]), none, True
        k = len(cols)
        target = int(np.searchsorted(cols, cell))
        value = float(q.value[cell])
        required, seen_low, seen_high = proof if proof is not None else (np.inf, 0.0, 0.0)
        found = {-1.0: (value + seen_high, None), 1.0: (value + seen_low, None)}  # sign: (value, duals)
        # a side a witness already takes to the cell's own bound needs no program: that bound is
        # its optimum, and multipliers 0 prove it (the cut's bound on that side is the cell's bound)
        slack = 1e-9 * max(1.0, abs(value))
        at_bound = {1.0: value + seen_low <= lower[cell] + slack, -1.0: value + seen_high >= upper[cell] - slack}
        points, known = [], 0
        for sign in ((1.0, -1.0) if value >= required else (-1.0, 1.0)):  # minimise (+1), maximise (−1)
            if known and _reaches(found[-1.0][0] - found[1.0][0], required):
                break
            known += 1
            if at_bound[sign]:
                found[sign] = (float(lower[cell] if sign > 0 else upper[cell]), np.zeros(len(rows)))
                continue
            c = np.zeros(k)
            c[target] = sign
            solution = program.minimise(c)
            if solution.status in ("unbounded", "unbounded or infeasible"):  # d = 0 is feasible: unbounded
                found[sign] = (np.inf if sign < 0 else -np.inf, None)
                continue
            if not solution.optimal:
                raise RuntimeError(f"audit linear program for cell {cell} ({q.name}) failed: {solution.status}")
            d = solution.x
            point = np.zeros(table.n_cells)
            point[cols] = d
            points.append(point)
            found[sign] = (value + float(d[target]), solution.row_dual)
        (hi_v, nu_max), (lo_v, nu_min) = found[-1.0], found[1.0]
        points = np.stack(points) if points else none
        if nu_max is None or nu_min is None:
            return lo_v, hi_v, None, np.inf, points, known == 2
        cut, bound = _width_cut(table, q, cell, rows, nu_max, nu_min, lower, upper)
        return lo_v, hi_v, cut, bound, points, known == 2


def _width_cut(table, quantity, cell, rows, nu_max, nu_min, lower, upper) -> tuple[_Cut | None, float]:
    """Capacity cut from the two programs' duals (Fischetti & Salazar-González 2000), and its
    value at the current pattern.

    For any multipliers ν of the relations and every y satisfying them, c·y = (c − Mᵀν)·y = ρ·y,
    so min c·y >= Σ_j (ρ⁺_j l_j − ρ⁻_j u_j) (weak duality). With c = −e_i (the maximum) and
    c = e_i (the minimum), width = max − min <= Σ_j (α_j u_j − β_j l_j), α, β >= 0. The bounds
    depend on the pattern z (1 = hidden): u_j = pu_j + (hu_j − pu_j)·z_j, l_j = pl_j + (hl_j −
    pl_j)·z_j, so the bound is linear in z and holds for every pattern: a protecting pattern must
    lift it to the required width. With the duals of the exact programs it equals the width at
    the current pattern (strong duality). scipy's sign convention for the multipliers is settled
    by evaluating both signs at the current pattern and keeping the tighter (both are valid).
    lower, upper: the cells' bounds under the current pattern (`_bounds`)."""
    M = table.relations
    q = quantity

    def spread(nu: np.ndarray) -> np.ndarray:  # Mᵀν, once per program: the signs are cheap after
        full = np.zeros(M.shape[0])
        full[rows] = nu
        return M.T @ full

    def reduced(m_nu: np.ndarray, sign: float, c_sign: float) -> np.ndarray:
        rho = -sign * m_nu
        rho[cell] += c_sign
        return rho

    def combine(rho_max, rho_min):
        alpha = np.maximum(-rho_max, 0) + np.maximum(-rho_min, 0)
        beta = np.maximum(rho_max, 0) + np.maximum(rho_min, 0)
        alpha[alpha < 1e-9] = 0.0
        beta[beta < 1e-9] = 0.0
        with np.errstate(invalid="ignore"):
            now = np.where(alpha > 0, alpha * upper, 0.0).sum() - np.where(beta > 0, beta * lower, 0.0).sum()
        return alpha, beta, now

    best = None
    m_max, m_min = spread(nu_max), spread(nu_min)
    for s_max in (1.0, -1.0):
        for s_min in (1.0, -1.0):
            alpha, beta, now = combine(reduced(m_max, s_max, -1.0), reduced(m_min, s_min, 1.0))
            if np.isfinite(now) and (best is None or now < best[2]):
                best = (alpha, beta, now)
    if best is None:
        return None, np.inf
    return _cut_from(q, cell, best[0], best[1]), float(best[2])


def _cut_from(q: Quantity, cell: int, alpha: np.ndarray, beta: np.ndarray) -> _Cut:
    """width(z) <= Σ_j α_j u_j(z) − β_j l_j(z), written as constant + Σ gain·z."""
    pl, pu, hl, hu = _bound_pairs(q)
    with np.errstate(invalid="ignore"):
        constant = float(np.where(alpha > 0, alpha * pu, 0.0).sum() - np.where(beta > 0, beta * pl, 0.0).sum())
        gain = np.where(alpha > 0, alpha * (hu - pu), 0.0) - np.where(beta > 0, beta * (hl - pl), 0.0)
    gain = np.maximum(np.where(np.isnan(gain), np.inf, gain), 0.0)
    index = np.flatnonzero(gain > 0)
    return _Cut(cell=cell, quantity=q.name, required=float(q.required[cell]), constant=constant,
                index=index, gain=gain[index])


def _relation_rows(table: LinkedTable, q: Quantity, fixed: np.ndarray, eligible: np.ndarray):
    """Cuts that need no linear program, for the mixed-integer program's first solve: the dual
    multipliers ±1 on a single relation (Fischetti & Salazar-González's capacity constraints, one
    relation at a time). A protected part can rise no further than the total can rise and its
    siblings fall: width <= u_T − Σ_siblings l_j − l_i; a protected total moves no further than its
    parts: width <= Σ_parts (u_j − l_j). With u, l linear in the pattern (see `_width_cut`) each is
    a row Σ gain_j z_j >= rhs over the eligible cells; per relation only the largest requirement
    among its protected parts matters (its row implies the others'). Returns (rows × cells sparse
    matrix of gains clipped at the row's rhs, rhs)."""
    M = table.relations.tocsr()
    pl, pu, hl, hu = _bound_pairs(q)
    need = np.where(fixed, q.required, 0.0)
    parts = M.multiply(M > 0).tocsr()
    negative = M.data < 0
    total_of = M.indices[negative]
    if not np.array_equal(np.repeat(np.arange(M.shape[0]), np.diff(M.indptr))[negative], np.arange(M.shape[0])):
        raise ValueError("every relation needs exactly one total (one −1 entry per row)")
    part_gain = pl - hl                         # a part's lower bound drops when hidden
    total_gain = hu - pu                        # the total's upper bound rises when hidden
    out_rows, out_rhs = [], []
    # protected parts: rhs = P − u_T(fixed) + Σ_parts l_j(fixed)
    p_max = np.asarray(parts.multiply(need).max(axis=1).todense()).ravel()
    fixed_parts_gain = parts @ (part_gain * fixed)
    T = total_of
    with np.errstate(invalid="ignore"):
        rhs = p_max - np.where(fixed[T], hu[T], pu[T]) + (parts @ pl) - fixed_parts_gain
    # a shortfall within the audit's tolerance is none (`_reaches`): float dust, as where every
    # other cell of the relation is known exactly, must not ask for a complement
    use = (p_max > 0) & np.isfinite(rhs) & _falls_short(rhs, p_max)
    for r in np.flatnonzero(use):
        members = parts.indices[parts.indptr[r]:parts.indptr[r + 1]]
        cand = members[eligible[members]]
        cols = np.concatenate([cand, [T[r]] if eligible[T[r]] else []]).astype(np.int64)
        gains = np.concatenate([part_gain[cand], [total_gain[T[r]]] if eligible[T[r]] else []])
        out_rows.append((cols, np.minimum(gains, rhs[r])))
        out_rhs.append(rhs[r])
    # protected totals: rhs = P − Σ_parts (u_j − l_j)(fixed)
    width_parts = parts @ np.where(fixed, hu - hl, pu - pl)
    with np.errstate(invalid="ignore"):
        rhs_t = need[T] - width_parts
    use = (need[T] > 0) & np.isfinite(rhs_t) & _falls_short(rhs_t, need[T])
    for r in np.flatnonzero(use):
        members = parts.indices[parts.indptr[r]:parts.indptr[r + 1]]
        cand = members[eligible[members]]
        out_rows.append((cand, np.minimum((hu - pu + pl - hl)[cand], rhs_t[r])))
        out_rhs.append(rhs_t[r])
    return out_rows, out_rhs


def _witness_round(M_h: sparse.csr_matrix, low: np.ndarray, high: np.ndarray, targets: np.ndarray,
                   required: np.ndarray, up: np.ndarray, down: np.ndarray, copies: int) -> np.ndarray | None:
    """One linear program over `copies` copies of the hidden cells' deviations d (M_h d = 0,
    low <= d <= high; published figures at their true values): maximise Σ_t min(d[up_t] − d[down_t],
    required_t)/required_t over the targets t. Returns the copies' deviations (copies × hidden).

    d is written d⁺ − d⁻ (both from 0 up), with a small cost on every unit moved: a cell the
    solution does not need stays at its true value (a simplex vertex puts every other column at
    a bound, and with d itself as the column that is 0 or the cell's cap, not its true value).
    For the same proofs the witnesses move a third as many cells on the demo, the simplex takes
    half the iterations on the S benchmark's tables (dual simplex, as before), and sparse points
    are lighter to keep and check."""
    h = M_h.shape[1]
    m = len(targets)
    H = copies * h
    A = sparse.kron(sparse.identity(copies, format="csr"), M_h, format="csr")
    eq = sparse.hstack([A, -A, sparse.csr_matrix((A.shape[0], m))], format="csr")
    r = np.arange(m)
    rise, fall = up * h + targets, down * h + targets
    # s_t − d⁺[rise] + d⁻[rise] + d⁺[fall] − d⁻[fall] <= 0
    ub_rows = sparse.csr_matrix(
        (np.concatenate([np.ones(m), -np.ones(m), np.ones(m), np.ones(m), -np.ones(m)]),
         (np.tile(r, 5), np.concatenate([2 * H + r, rise, H + rise, fall, H + fall]))), shape=(m, 2 * H + m))
    c = np.concatenate([np.full(2 * H, _WITNESS_MOVE_COST / required.max()), -1.0 / required])
    lo = np.zeros(2 * H + m)
    hi = np.concatenate([np.tile(np.maximum(high, 0.0), copies), np.tile(-np.minimum(low, 0.0), copies), required])
    n_eq = eq.shape[0]
    program = LinearProgram(sparse.vstack([eq, ub_rows]), np.concatenate([np.zeros(n_eq), np.full(m, -np.inf)]),
                            np.zeros(n_eq + m), lo, hi)
    solution = program.minimise(c)
    if not solution.optimal:
        return None
    x = solution.x
    return (x[:H] - x[H:2 * H]).reshape(copies, h)


def _find_witnesses(table: LinkedTable, q: Quantity, hidden: np.ndarray, targets: np.ndarray,
                    witnesses: _Witnesses, proven: np.ndarray, rng: np.random.Generator) -> None:
    """Witness rounds for the targets not yet proven; adds the points found to `witnesses` and
    updates `proven` in place. The programs span the targets' linked components (published
    figures at their true values), split along independent blocks (`_programs`). Rounds stop when
    one proves fewer than _MIN_GAIN cells or 2% of those it was given: the rest go to the per-cell
    programs."""
    M = table.relations
    idx = np.flatnonzero(hidden)
    lower, upper = _bounds(q, hidden)
    low_all, high_all = lower - q.value, upper - q.value
    labels = _free_components(M, hidden)
    previous = None
    k = _WITNESS_COPIES
    for _ in range(_WITNESS_ROUNDS):
        todo = targets[~proven[targets]]
        if not len(todo):
            return
        if previous is None:
            up = rng.integers(0, k, len(todo))
            down = (up + rng.integers(1, k, len(todo))) % k
        else:  # keep the copies each cell came out highest and lowest in
            vals = previous[:, todo]
            up, down = vals.argmax(axis=0), vals.argmin(axis=0)
            flat = up == down
            up = np.where(flat, rng.integers(0, k, len(todo)), up)
            down = np.where(flat | (down == up), (up + rng.integers(1, k, len(todo))) % k, down)
        cols = idx[np.isin(labels[idx], labels[todo])]
        parts, components = _programs(cols, todo, labels[cols])
        previous = np.zeros((k, table.n_cells))
        for cols in parts:
            mine = np.isin(todo, cols)
            rows = _touching(M, cols)
            D = _witness_round(M[rows][:, cols].tocsr(), np.minimum(low_all[cols], 0), np.maximum(high_all[cols], 0),
                               np.searchsorted(cols, todo[mine]), q.required[todo[mine]], up[mine], down[mine], k)
            if D is not None:
                previous[:, cols] = np.where(np.abs(D) > 1e-9 * np.maximum(1.0, np.abs(q.value[cols])), D, 0.0)
        blocks = np.full(table.n_cells, -1, dtype=np.int64)
        blocks[np.concatenate(parts)] = np.concatenate(components)
        witnesses.add(previous, blocks, relations=M)
        before = int(proven.sum())
        _prove(q, witnesses, hidden, targets, proven)
        if int(proven.sum()) - before < max(_MIN_GAIN, 0.02 * len(todo)):
            return


def _programs(cols: np.ndarray, todo: np.ndarray, component: np.ndarray) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """The cells `cols` split into independent programs: the linked components among them
    (`component`, each cell's label) that hold a cell of `todo`, gathered until a program has
    _PROGRAM_CELLS cells (the simplex's work grows faster than the program, but each program has
    a fixed cost too). Returns each program's cells (ascending) and the component of each."""
    keep = np.isin(component, component[np.isin(cols, todo)])
    cols, component = cols[keep], component[keep]
    labels, sizes = np.unique(component, return_counts=True)
    program_of, current, filled = np.zeros(len(labels), dtype=np.int64), 0, 0
    for i, size in enumerate(sizes):
        if filled >= _PROGRAM_CELLS:
            current, filled = current + 1, 0
        program_of[i], filled = current, filled + size
    program = program_of[np.searchsorted(labels, component)]
    order = np.lexsort((cols, program))
    cuts = np.flatnonzero(np.diff(program[order])) + 1
    return np.split(cols[order], cuts), np.split(component[order], cuts)


def _cycle_proofs(table: LinkedTable, q: Quantity, hidden: np.ndarray, targets: np.ndarray,
                  witnesses: _Witnesses) -> None:
    """Witnesses from the table's short cycles through the targets: moving along a cycle by t
    keeps every relation, and so does a sum of such moves, as long as every cell stays within its
    bounds. For each target, one point up and one point down: the cycles through it taken best
    first (how far each alone moves the target), each moved as far as the bounds leave after the
    ones before it, up to _CYCLES_PER_TARGET of them (the best one only, where it alone proves the
    target up and down). No linear program: where every cell holds a few respondents (a rare
    characteristic) one cycle moves a target little, the sum of a dozen moves it several times as
    far. A cycle through a published cell moves no further than that cell's rounding interval
    allows (not at all for an exact figure), so it rarely proves anything, but it is valid.

    The best cycles are found first, circuit by circuit (`_best_cycles`); only the targets they do
    not prove on their own are looked at through every cycle (a small area has about 19 siblings
    in the benchmark: 130 cycles run through a cell, against 6 circuits)."""
    C = table.cycles
    if C is None or not C.shape[0] or not len(targets):
        return
    lower, upper = _bounds(q, hidden)
    room_up, room_down = upper - q.value, q.value - lower
    room = np.concatenate([room_up, room_down])
    targets = _best_cycles(table, q, np.sort(targets), room, witnesses)
    if not len(targets):
        return
    through = table.cycles_by_cell[:, targets]      # per target: its cycles and its step in each
    if not through.nnz:
        return
    n, n_cycles = table.n_cells, C.shape[0]
    # how far each cycle through a target can go on its own, up (+t) and down (−t)
    wanted = np.zeros(n_cycles, dtype=bool)
    wanted[through.indices] = True
    reach = np.zeros(2 * n_cycles)   # [+t of every cycle, −t of every cycle]
    for rows, plus, minus, size in table.cycle_rooms:
        pick = np.flatnonzero(wanted[rows])
        if len(pick) < len(rows) // 2:
            rows, plus, minus = rows[pick], plus[:, pick], minus[:, pick]
            size = None if size is None else size[:, pick]
        for offset, where in ((0, plus), (n_cycles, minus)):
            most = _least_room(room, where, size, axis=0)
            reach[offset + rows] = np.where(np.isfinite(most), np.maximum(most, 0.0), 0.0)
    # per (target, cycle) entry and direction: how far the cycle alone takes the target; the
    # cycles that cannot move at all (through an exact published figure, say) are left out
    target_of = np.repeat(np.arange(len(targets)), np.diff(through.indptr))
    cycle, step = through.indices, through.data
    moves = ((reach[:n_cycles] > 0) | (reach[n_cycles:] > 0))[cycle]
    target_of, cycle, step = target_of[moves], cycle[moves], step[moves]
    if not len(cycle):
        return
    counts = np.bincount(target_of, minlength=len(targets))
    filled = counts > 0
    starts = np.r_[0, np.cumsum(counts)[:-1]]
    amounts, best = [], []
    for sign in (1.0, -1.0):
        side = cycle + n_cycles * (sign * step < 0)   # a cycle lowering the target raises it run backwards
        amounts.append(reach[side] * np.abs(step))
        most = np.zeros(len(targets))
        most[filled] = np.maximum.reduceat(amounts[-1], starts[filled])
        best.append(most)
    alone = _reaches(best[0] + best[1], q.required[targets])
    points = []
    for sign, amount, most in zip((1.0, -1.0), amounts, best):
        # the best cycle of every target; the next best too where the best alone falls short
        use = np.flatnonzero((amount > 0) & (~alone[target_of] | (amount == most[target_of])))
        if not len(use):
            continue
        # rank within the target, furthest first (ties in entry order): one stable sort on
        # target + (1 − amount / best) orders by target, then by amount descending
        key = target_of[use] + 0.5 * (1.0 - amount[use] / most[target_of[use]])
        use = use[np.argsort(key, kind="stable")]
        new_target = np.r_[True, target_of[use][1:] != target_of[use][:-1]]
        heads = np.flatnonzero(new_target)
        rank = np.arange(len(use)) - np.repeat(heads, np.diff(np.r_[heads, len(use)]))
        keep = (rank == 0) | ((rank < _CYCLES_PER_TARGET) & ~alone[target_of[use]])
        use, rank = use[keep], rank[keep]
        owner, cell, moved = _cycle_sums(C, cycle[use], sign * np.sign(step[use]), target_of[use], rank,
                                         room_up, room_down)
        points.append((owner * 2 + (sign < 0), cell, moved))
    if points:
        row, col, val = (np.concatenate(parts) for parts in zip(*points))
        witnesses.add_rows(sparse.csr_matrix((val, (row, col)), shape=(2 * len(targets), n)))


def _best_cycles(table: LinkedTable, q: Quantity, targets: np.ndarray, room: np.ndarray,
                 witnesses: _Witnesses) -> np.ndarray:
    """The best single cycle through each target (sorted), up and down, found circuit by circuit:
    a target at unit u moves furthest along ±φ at u minus ±φ at the sibling with the most room to
    run the other way (the cycle's step is the smaller of the two units' rooms, and the target's
    move is that step times its |φ|), so the best sibling of each unit is all that is needed, not
    every pair. `room`: [room up of every cell, room down of every cell]. Where the best cycles up
    and down prove a target, their points go to `witnesses`.
    Returns the targets they do not prove. The cycles are those of `table.cycles` (a circuit one
    of whose cycles failed the check is left out, and its targets with it), so the targets left
    are those that need cycles added up."""
    m = len(targets)
    index = np.full(table.n_cells, -1)
    index[targets] = np.arange(m)
    amount = np.zeros((2, m))                         # how far the best cycle moves each target: up, down
    chosen = np.full((3, 2, m), -1, dtype=np.int64)   # its batch of circuits, row, partner row (−1: none)
    steps = np.zeros((2, m))                          # its step along +φ at the row's unit (negative: −φ)
    for c_id, circuits in enumerate(table.circuits):
        where = index[circuits.cells]                 # rows × cells of φ: the target there, or −1
        row, k = np.nonzero(where >= 0)
        if not len(row):
            continue
        t = where[row, k]
        phi = circuits.step[row, k]
        forwards_at, backwards_at, size = circuits.rooms_at
        forwards = _least_room(room, forwards_at, size, axis=1)     # room to run +φ at each row's unit
        backwards = _least_room(room, backwards_at, size, axis=1)   # and −φ
        # a target on several circuits of one size: its entries side by side, to keep its best
        by_target = np.argsort(t, kind="stable")
        firsts = np.flatnonzero(np.r_[True, t[by_target][1:] != t[by_target][:-1]])
        once = len(firsts) == len(t)
        paired = circuits.group[row] >= 0                       # the sibling runs the other way
        with_forwards = np.where(paired, _best_sibling(circuits, backwards, row), -1)
        with_backwards = np.where(paired, _best_sibling(circuits, forwards, row), -1)
        for d, sign in enumerate((1.0, -1.0)):
            run = sign * phi > 0                      # +φ at the target's unit moves it this way
            partner = np.where(run, with_forwards, with_backwards)
            p = np.maximum(partner, 0)
            other = np.where(partner >= 0, np.where(run, backwards[p], forwards[p]), 0.0)
            step = np.where(run, forwards[row], backwards[row])
            step = np.where(paired, np.minimum(step, other), step)
            step = np.where(np.isfinite(step), np.maximum(step, 0.0), 0.0)
            gain = step * np.abs(phi)
            if once:
                best = np.arange(len(t))
            else:
                ordered = gain[by_target]
                most = np.maximum.reduceat(ordered, firsts)
                at_most = ordered == np.repeat(most, np.diff(np.r_[firsts, len(t)]))
                best = by_target[np.minimum.reduceat(np.where(at_most, np.arange(len(t)), len(t)), firsts)]
            best = best[gain[best] > amount[d, t[best]]]
            t_b = t[best]
            amount[d, t_b] = gain[best]
            chosen[0, d, t_b], chosen[1, d, t_b], chosen[2, d, t_b] = c_id, row[best], partner[best]
            steps[d, t_b] = np.where(run, step, -step)[best]
    alone = _reaches(amount[0] + amount[1], q.required[targets])
    rows, cols, vals = [], [], []
    use = alone[None, :] & (amount > 0)
    for c_id in np.unique(chosen[0][use]):
        circuits = table.circuits[c_id]
        d, t = np.nonzero(use & (chosen[0] == c_id))
        point, row, partner, step = 2 * t + d, chosen[1, d, t], chosen[2, d, t], steps[d, t]
        width = circuits.cells.shape[1]
        rows.append(np.repeat(point, width))
        cols.append(circuits.cells[row].ravel())
        vals.append((step[:, None] * circuits.step[row]).ravel())
        paired = partner >= 0
        rows.append(np.repeat(point[paired], width))
        cols.append(circuits.cells[partner[paired]].ravel())
        vals.append((-step[paired, None] * circuits.step[partner[paired]]).ravel())
    if rows:
        witnesses.add_rows(sparse.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                                             shape=(2 * m, table.n_cells)))
    return targets[~alone]


def _best_sibling(circuits: SiblingCircuits, room: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """For each of `rows`, the other row of its group with the most `room` (>= 0; the first such
    on ties), or −1 where it has none: the two largest of each group, without sorting."""
    order, starts, of_row = circuits.by_group
    sizes = np.diff(np.r_[starts, len(order)])
    ordered = room[order]                     # a copy: −1 marks the row taken as the largest
    position = np.arange(len(order))
    top = []
    for _ in range(2):
        most = np.maximum.reduceat(ordered, starts)
        first = np.minimum.reduceat(np.where(ordered == np.repeat(most, sizes), position, len(order)), starts)
        found = most >= 0
        top.append(np.where(found, order[np.minimum(first, len(order) - 1)], -1))
        ordered[first[found]] = -1.0
    g = of_row[rows]
    return np.where(top[0][g] == rows, top[1][g], top[0][g])


def _cycle_sums(C: sparse.csr_matrix, rows: np.ndarray, orientation: np.ndarray, owner: np.ndarray,
                rank: np.ndarray, room_up: np.ndarray, room_down: np.ndarray):
    """Sums of cycles, one per owner: the cycles `rows` of C (each run forwards or backwards, by
    `orientation`) belong to owners and are moved in `rank` order, each by the largest step that
    what the owner's earlier cycles left of the cells' rooms allows. Every owner has at most one
    cycle of each rank, so a rank is one vectorised pass. Returns (owner, cell, deviation) of the
    sums' nonzero entries."""
    n = len(room_up)
    order = np.argsort(rank, kind="stable")
    rows, orientation, owner, rank = rows[order], orientation[order], owner[order], rank[order]
    cycles = C[rows]                                           # in pass order, one row per cycle
    entry = np.repeat(np.arange(len(rows)), np.diff(cycles.indptr))
    delta = cycles.data * orientation[entry]
    # each owner's own copy of the rooms of the cells its cycles move
    slots, slot = np.unique(owner[entry] * n + cycles.indices, return_inverse=True)
    up, down, moved = room_up[slots % n], room_down[slots % n], np.zeros(len(slots))
    passes = np.searchsorted(rank[entry], np.arange(int(rank.max()) + 2))
    for a, b in zip(passes[:-1], passes[1:]):
        sl, d, e = slot[a:b], delta[a:b], entry[a:b]
        starts = np.flatnonzero(np.r_[True, e[1:] != e[:-1]])
        t = np.minimum.reduceat(np.where(d > 0, up[sl], down[sl]) / np.abs(d), starts)
        t = np.where(np.isfinite(t), np.maximum(t, 0.0), 0.0)
        change = np.repeat(t, np.diff(np.r_[starts, len(e)])) * d
        up[sl] -= change
        down[sl] += change
        moved[sl] += change
    keep = moved != 0
    return slots[keep] // n, slots[keep] % n, moved[keep]


def _reaches(width, required) -> np.ndarray:
    return width >= required * (1 - _WIDTH_TOLERANCE) - _WIDTH_TOLERANCE


def _falls_short(shortfall, required) -> np.ndarray:
    """A width `shortfall` below `required` that `_reaches` would not forgive (float dust is none)."""
    return shortfall > _WIDTH_TOLERANCE * (1 + required)


def _prove(q: Quantity, witnesses: _Witnesses, hidden: np.ndarray, targets: np.ndarray, proven: np.ndarray) -> None:
    lo, hi = witnesses.observed(q, hidden)
    proven[targets] = _reaches((hi - lo)[targets], q.required[targets])


def audit_quantity(table: LinkedTable, quantity: Quantity, hidden, *, witnesses: _Witnesses | None = None,
                   seed: int = 0) -> tuple[QuantityAudit, list[_Cut]]:
    """Prove, for every hidden cell with a required width, that its feasible range is at least that
    wide; the cells that cannot be proven get their exact range and, when short, a cut."""
    hidden = np.asarray(hidden, dtype=bool)
    q = quantity
    n = table.n_cells
    if len(q.value) != n or hidden.shape != (n,):
        raise ValueError(f"quantity {q.name!r} and the hidden mask need one entry per cell ({n})")
    witnesses = witnesses if witnesses is not None else _Witnesses(n)
    targets = np.flatnonzero(hidden & (q.required > 0))
    proven = np.zeros(n, dtype=bool)
    lower = np.full(n, np.nan)
    upper = np.full(n, np.nan)
    exact = np.zeros(n, dtype=bool)
    cuts: list[_Cut] = []
    b_lo, b_hi = _bounds(q, hidden)
    # a hidden cell in no relation can take any value within its own bounds
    lonely = hidden & (np.asarray(abs(table.relations).sum(axis=0)).ravel() == 0)
    lower[lonely], upper[lonely], exact[lonely] = b_lo[lonely], b_hi[lonely], True
    if len(targets):
        linked = targets[~lonely[targets]]
        _prove(q, witnesses, hidden, linked, proven)
        if (~proven[linked]).any():
            _cycle_proofs(table, q, hidden, linked[~proven[linked]], witnesses)
            _prove(q, witnesses, hidden, linked, proven)
        if (~proven[linked]).sum() > _MANY:
            _find_witnesses(table, q, hidden, linked, witnesses, proven, np.random.default_rng(seed))
        b_free = b_hi > b_lo
        # per cell, published figures at face value first (a small program over the hidden cells
        # linked to it), then every cell within _RINGS relations of those hidden cells free within
        # its bounds, then the whole table. Each program's points are witnesses and its duals
        # bound the full reader's width: a bound short of the requirement ends the search with a
        # cut, and a width that meets the bound is the exact range
        models = [_Ranges(table, q, hidden, free=hidden & b_free),
                  _Ranges(table, q, hidden, free=hidden & b_free, widen=b_free),
                  _Ranges(table, q, hidden, free=b_free)]
        lo_w, hi_w = witnesses.observed(q, hidden)
        room_lo, room_hi = _rooms(q, hidden)
        for i in linked[~proven[linked]]:
            if _reaches(hi_w[i] - lo_w[i], q.required[i]):
                proven[i] = True
                continue
            for step, model in enumerate(models):
                lo_i, hi_i, cut, bound, points, both = model.of(int(i), (q.required[i], lo_w[i], hi_w[i]))
                points = witnesses.add(points, relations=table.relations)
                points = points[np.all((points >= room_lo) & (points <= room_hi), axis=1)]  # as `observed` does
                if len(points):  # later cells may be proven by these points already
                    lo_w = np.minimum(lo_w, points.min(axis=0))
                    hi_w = np.maximum(hi_w, points.max(axis=0))
                # values the programs reached (or an unbounded side: a reader has no bound there)
                lower[i], upper[i] = np.fmin(lower[i], lo_i), np.fmax(upper[i], hi_i)
                width = hi_i - lo_i
                tight = cut is not None and bound <= width + 1e-6 * max(1.0, width) + 1e-6
                final = both and (tight or step == len(models) - 1)
                exact[i] = final
                if _reaches(width, q.required[i]):
                    proven[i] = True
                    break
                if final:
                    cuts.append(cut if tight else _plain_cut(table, hidden, int(i), q))
                    break
                if cut is not None and not _reaches(bound, q.required[i]):  # short even with the rounding slack
                    cuts.append(cut)
                    break
    lo, hi = witnesses.observed(q, hidden)
    inner = targets[~exact[targets]]
    lower[inner] = np.fmin(lower[inner], q.value[inner] + lo[inner])
    upper[inner] = np.fmax(upper[inner], q.value[inner] + hi[inner])
    ok = np.ones(n, dtype=bool)
    ok[targets] = _reaches((upper - lower)[targets], q.required[targets])
    nan = np.full(n, np.nan)
    return QuantityAudit(name=q.name, lower=lower, upper=upper, outer_lower=nan, outer_upper=nan.copy(),
                         exact=exact, required=q.required, ok=ok), cuts


def _with_ranges(table: LinkedTable, q: Quantity, hidden: np.ndarray, audit: QuantityAudit,
                 witnesses: _Witnesses) -> QuantityAudit:
    """The audit of the final pattern with a range for every hidden cell, not only the protected
    ones: inner, the values the points found give it; outer, the bounds a reader can work out
    (`derivable_range`); where they meet, the exact range."""
    lower, upper, exact = audit.lower.copy(), audit.upper.copy(), audit.exact.copy()
    lo, hi = witnesses.observed(q, hidden)
    rest = hidden & ~exact
    lower[rest] = np.fmin(lower[rest], q.value[rest] + lo[rest])
    upper[rest] = np.fmax(upper[rest], q.value[rest] + hi[rest])
    outer_lower, outer_upper = derivable_range(table, q, hidden)
    tol = 1e-6 * np.maximum(1.0, np.abs(q.value))
    exact |= hidden & (lower <= outer_lower + tol) & (upper >= outer_upper - tol)
    outer_lower = np.where(hidden, np.where(exact, lower, np.fmin(outer_lower, lower)), np.nan)
    outer_upper = np.where(hidden, np.where(exact, upper, np.fmax(outer_upper, upper)), np.nan)
    return QuantityAudit(name=q.name, lower=lower, upper=upper, outer_lower=outer_lower, outer_upper=outer_upper,
                         exact=exact, required=audit.required, ok=audit.ok)


def derivable_range(table: LinkedTable, quantity: Quantity, hidden, *, passes: int = 100):
    """Bounds on every cell that a reader can work out by interval propagation through the
    relations: in a relation Σ a_k y_k = 0, a_j y_j lies between −max and −min of Σ_{k≠j} a_k y_k,
    repeated until nothing tightens by more than 1e-9 of the cell's size (or `passes` run out).
    Every pass keeps the feasible set inside the bounds, so they are outer bounds: the exact range
    (the linear programs' min and max) lies within, and any single pass is already valid. When
    the relations form no cycle (a single hierarchy) the fixed point is the exact range; with
    cycles (geography crossed with categories) it can be wider."""
    hidden = np.asarray(hidden, dtype=bool)
    lo, hi = _bounds(quantity, hidden)
    coo = table.relations.tocoo()
    r, c, a = coo.row, coo.col, coo.data
    n_rel = table.n_relations
    scale = 1e-9 * np.maximum(1.0, np.abs(quantity.value))

    def others(term: np.ndarray, bad: float) -> np.ndarray:
        # Σ_{k≠j} of the terms of j's relation, with infinite terms counted apart (inf − inf)
        infinite = term == bad
        finite_sum = np.bincount(r, np.where(infinite, 0.0, term), minlength=n_rel)
        n_infinite = np.bincount(r, infinite, minlength=n_rel)
        out = finite_sum[r] - np.where(infinite, 0.0, term)
        return np.where(n_infinite[r] - infinite > 0, bad, out)

    for _ in range(passes):
        t_min = np.where(a > 0, a * lo[c], a * hi[c])  # a_k y_k at its smallest and largest
        t_max = np.where(a > 0, a * hi[c], a * lo[c])
        with np.errstate(invalid="ignore"):
            rest_min, rest_max = others(t_min, -np.inf), others(t_max, np.inf)
            from_lo = np.where(a > 0, -rest_max / a, -rest_min / a)
            from_hi = np.where(a > 0, -rest_min / a, -rest_max / a)
        new_lo, new_hi = lo.copy(), hi.copy()
        np.maximum.at(new_lo, c, np.nan_to_num(from_lo, nan=-np.inf))
        np.minimum.at(new_hi, c, np.nan_to_num(from_hi, nan=np.inf))
        # the true values satisfy everything: keep them inside against float dust
        new_lo, new_hi = np.minimum(new_lo, quantity.value), np.maximum(new_hi, quantity.value)
        gained = np.maximum(new_lo - lo, hi - new_hi)
        lo, hi = new_lo, new_hi
        if not np.any(np.nan_to_num(gained, nan=0.0, posinf=1.0) > scale):
            break
    return lo, hi


def _plain_cut(table: LinkedTable, hidden: np.ndarray, cell: int, q: Quantity) -> _Cut:
    """When the duals give no usable bound: some cell not hidden now, in a relation with the
    cell's linked hidden cells, must be hidden (hiding more only widens ranges, so a subset of a
    failing pattern fails too)."""
    M = table.relations
    labels = _free_components(M, hidden)
    comp = np.flatnonzero(labels == labels[cell]) if labels[cell] >= 0 else np.array([cell])
    rows = _touching(M, comp)
    near = np.asarray(abs(M[rows]).sum(axis=0)).ravel() > 0
    index = np.flatnonzero(near & ~hidden)
    return _Cut(cell=cell, quantity=q.name, required=float(q.required[cell]), constant=0.0, index=index,
                gain=np.full(len(index), np.inf))


# --------------------------------------------------------------------------------------------
# Complementary suppression


@dataclass(frozen=True)
class ProtectionResult:
    """The pattern chosen for one table and what the audit proved about it.

    hidden: every cell hidden (withheld + primary + complementary); complementary: the cells this
    step added; cost: their total cost; method: 'milp' or 'greedy'; status: how the optimisation
    ended, in words; rounds: solves of the mixed-integer program (or greedy passes);
    audits: one per quantity; seconds: wall time."""

    hidden: np.ndarray
    complementary: np.ndarray
    cost: float
    method: str
    status: str
    rounds: int
    audits: tuple[QuantityAudit, ...]
    seconds: float

    @property
    def ok(self) -> bool:
        return all(bool(a.ok.all()) for a in self.audits)

    @property
    def failed(self) -> np.ndarray:
        out = np.zeros(len(self.hidden), dtype=bool)
        for a in self.audits:
            out |= a.failed
        return out


def protect_table(table: LinkedTable, *, quantities: list[Quantity], withheld, eligible, cost,
                  time_limit: float = 60.0, method: str = "milp") -> ProtectionResult:
    """Choose complementary cells so that every cell with a required width is protected, and
    audit the pattern.

    quantities: the figures to protect (their `required` arrays mark the primary cells, which are
    hidden whatever happens); withheld: cells hidden for other reasons (no protection needed, free
    as complements); eligible: cells that may be chosen (published ones whose value a reader does
    not already know); cost: cost of hiding each cell. method 'milp' optimises (falling back to the
    greedy pattern when `time_limit` seconds run out or the solver fails); 'greedy' builds the
    greedy pattern only."""
    started = time.perf_counter()
    n = table.n_cells
    withheld = np.asarray(withheld, dtype=bool)
    eligible = np.asarray(eligible, dtype=bool)
    cost = np.asarray(cost, dtype=np.float64)
    if withheld.shape != (n,) or eligible.shape != (n,) or cost.shape != (n,):
        raise ValueError(f"withheld, eligible and cost need one entry per cell ({n})")
    if method not in ("milp", "greedy"):
        raise ValueError(f"method ({method!r}) must be 'milp' or 'greedy'")
    names = [q.name for q in quantities]
    if len(set(names)) != len(names):
        # the points found are kept per quantity, by name, with what was proven per pattern: two
        # quantities of one name would take each other's proofs, valid only within their own bounds
        raise ValueError(f"quantities need distinct names; got {names}")
    primary = np.zeros(n, dtype=bool)
    for q in quantities:
        primary |= q.required > 0
    fixed = withheld | primary
    eligible = eligible & ~fixed
    witnesses = {q.name: _Witnesses(n) for q in quantities}

    def finish(hidden, method_used, status, rounds, audits):
        comp = hidden & ~fixed
        audits = [_with_ranges(table, q, hidden, a, witnesses[q.name]) for q, a in zip(quantities, audits)]
        return ProtectionResult(hidden=hidden, complementary=comp, cost=float(cost[comp].sum()),
                                method=method_used, status=status, rounds=rounds, audits=tuple(audits),
                                seconds=time.perf_counter() - started)

    if not primary.any():  # the audit still reports the range of every withheld cell
        return finish(fixed.copy(), method, "nothing to protect", 0, _audit_all(table, quantities, fixed, witnesses)[0])

    status = ""
    if method == "milp":
        deadline = started + time_limit
        cuts: list[_Cut] = []
        capacity = []  # single-relation capacity rows, known before any audit
        for q in quantities:
            rows, rhs = _relation_rows(table, q, fixed, eligible)
            capacity += [(cols, gains, b) for (cols, gains), b in zip(rows, rhs)]
        kept = np.zeros(n, dtype=bool)
        for round_no in range(1, _MAX_CUT_ROUNDS + 1):
            remaining = deadline - time.perf_counter()
            if remaining <= 0:
                status = "time limit reached; greedy fall-back"
                break
            hidden, solved = _solve_milp(table, primary | kept, fixed | kept, eligible & ~kept, cost, capacity,
                                         cuts, remaining)
            if hidden is None:
                status = f"{solved}; greedy fall-back"
                break
            audits, new_cuts = _audit_all(table, quantities, hidden, witnesses)
            if not new_cuts:
                return finish(hidden, "milp", solved if not kept.any() else
                              f"{solved} additions to the choice of round {_GLOBAL_ROUNDS}", round_no, audits)
            cuts += new_cuts
            if round_no >= _GLOBAL_ROUNDS:
                # re-solving everything again and again can trade one failure for another; from here
                # the cells chosen so far stay hidden and only additions are optimised, so the
                # rounds converge and earlier proofs stay valid
                kept = hidden & ~fixed
        else:
            status = f"still failing after {_MAX_CUT_ROUNDS} rounds of cuts; greedy fall-back"
    hidden, rounds, audits = _greedy(table, quantities, primary, fixed, eligible, cost, witnesses)
    return finish(hidden, "greedy", status or "greedy", rounds, audits)


def _audit_all(table, quantities, hidden, witnesses) -> tuple[list[QuantityAudit], list[_Cut]]:
    audits, cuts = [], []
    for q in quantities:
        audit, c = audit_quantity(table, q, hidden, witnesses=witnesses[q.name])
        audits.append(audit)
        cuts += c
    return audits, cuts


def _relation_counts(M: sparse.csr_matrix, mask: np.ndarray) -> np.ndarray:
    return np.asarray(abs(M) @ mask.astype(np.float64)).ravel()


def _solve_milp(table, primary, fixed, eligible, cost, capacity, cuts, time_limit):
    """The mixed-integer program; returns (hidden mask, status) or (None, reason). `primary`:
    hidden cells that need a partner in each relation; `fixed`: hidden whatever is chosen.

    The choice is made among the eligible cells within _MILP_REACH relations of where the
    constraints ask for something (a lone protected cell's relation, a capacity row, a cut): a
    complement far from all of them only adds cost. The whole table is tried when that leaves no
    pattern."""
    M = abs(table.relations).tocsr()
    n_fixed = _relation_counts(M, fixed)
    # a lone fixed cell that needs protecting: some eligible cell of its relation must be hidden
    # (a lone unreliable cell is no secret; with nothing to choose from, the audit decides)
    lone = (n_fixed == 1) & (np.asarray(M @ (fixed & primary).astype(np.float64)).ravel() > 0)
    asking = np.asarray(M.T @ lone.astype(np.float64)).ravel() > 0
    for cells, _gains, _rhs in capacity:
        asking[cells] = True
    for cut in cuts:
        asking[cut.index] = True
    near = asking
    for _ in range(_MILP_REACH):
        near = near | (np.asarray(M.T @ (M @ near.astype(np.float64))).ravel() > 0)
    started = time.perf_counter()
    hidden, status = _milp_over(table, M, n_fixed, lone, fixed, eligible & near, cost, capacity, cuts, time_limit)
    if hidden is None and status == _NO_PATTERN and (eligible & ~near).any():
        hidden, status = _milp_over(table, M, n_fixed, lone, fixed, eligible, cost, capacity, cuts,
                                    time_limit - (time.perf_counter() - started))
    return hidden, status


def _milp_over(table, M, n_fixed, lone, fixed, eligible, cost, capacity, cuts, time_limit):
    """The mixed-integer program over the `eligible` cells (see `_solve_milp`): `n_fixed`, the
    fixed cells per relation; `lone`, the relations whose one fixed cell needs a partner."""
    free = np.flatnonzero(eligible)
    pos = np.full(table.n_cells, -1)
    pos[free] = np.arange(len(free))
    rows, cols, vals, lbs = [], [], [], []
    k = 0
    # (a) no relation with exactly one hidden cell that needs protecting or was chosen
    coo = M.tocoo()
    rel, cell = coo.row, coo.col
    choosable = eligible[cell]
    pick = lone[rel] & choosable
    if pick.any():
        row_of = np.full(M.shape[0], -1)
        used = np.unique(rel[pick])
        row_of[used] = np.arange(k, k + len(used))
        rows.append(row_of[rel[pick]])
        cols.append(pos[cell[pick]])
        vals.append(np.ones(int(pick.sum())))
        lbs += [1.0] * len(used)
        k += len(used)
    # no fixed cell: a chosen cell needs another chosen one beside it. Written with one continuous
    # y_r in [0, 1] per relation, "something in r is chosen": z_j <= y_r for each member and
    # Σ z_l >= 2 y_r (z integer forces y_r = 1 and then two members): 3 entries per member where
    # the direct rows Σ_{l != j} z_l >= z_j need one per pair, which at national scale made the
    # program several times larger than everything else in it
    pick = (n_fixed[rel] == 0) & choosable
    r_sel, c_sel = rel[pick], cell[pick]
    used, group = np.unique(r_sel, return_inverse=True)
    n_groups = len(used)
    y = len(free) + group                                                   # the column of y_r
    member_rows = np.arange(k, k + len(c_sel))
    rows += [member_rows, member_rows]
    cols += [y, pos[c_sel]]
    vals += [np.ones(len(c_sel)), -np.ones(len(c_sel))]                     # y_r − z_j >= 0
    lbs += [0.0] * len(c_sel)
    k += len(c_sel)
    rows += [k + group, k + np.arange(n_groups)]
    cols += [pos[c_sel], len(free) + np.arange(n_groups)]
    vals += [np.ones(len(c_sel)), np.full(n_groups, -2.0)]                  # Σ z_l − 2 y_r >= 0
    lbs += [0.0] * n_groups
    k += n_groups
    # (b) capacity: single relations first, then the cuts the audit found
    for cells, gains, rhs in capacity:
        rhs = rhs - float(gains[fixed[cells]].sum())  # cells kept hidden from earlier rounds
        if rhs <= _WIDTH_TOLERANCE:  # float dust: `_relation_rows` kept only real shortfalls
            continue
        keep = (gains > 1e-12) & eligible[cells]
        gains = np.minimum(gains, rhs)
        if not keep.any():
            return None, "a protected cell has too little room in one of its relations, whatever is hidden"
        rows.append(np.full(int(keep.sum()), k))
        cols.append(pos[cells[keep]])
        vals.append(gains[keep])
        lbs.append(rhs)
        k += 1
    for cut in cuts:
        rhs = cut.shortfall(fixed)
        if not _falls_short(rhs, cut.required):
            continue
        choosable = eligible[cut.index]
        g = np.minimum(cut.gain[choosable], rhs)
        use = g > 1e-12
        if not use.any():
            return None, f"cell {cut.cell} ({cut.quantity}) cannot be protected by hiding more cells"
        rows.append(np.full(int(use.sum()), k))
        cols.append(pos[cut.index[choosable][use]])
        vals.append(g[use])
        lbs.append(rhs)
        k += 1
    if not len(free):
        return fixed.copy(), "optimal"
    n_cols = len(free) + n_groups
    A = (sparse.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(k, n_cols))
         if k else sparse.csr_matrix((0, n_cols)))
    program = LinearProgram(A, np.array(lbs, dtype=np.float64), np.full(k, np.inf), np.zeros(n_cols), np.ones(n_cols),
                            integer=np.r_[np.ones(len(free), dtype=bool), np.zeros(n_groups, dtype=bool)],
                            time_limit=time_limit, relative_gap=1e-6)
    solution = program.minimise(np.r_[cost[free], np.zeros(n_groups)])
    if solution.optimal:
        hidden = fixed.copy()
        hidden[free[np.round(solution.x[:len(free)]) > 0.5]] = True
        return hidden, "optimal"
    if solution.status == "infeasible":
        return None, _NO_PATTERN
    if solution.status == "time limit reached":
        return None, solution.status
    return None, f"solver stopped: {solution.status}"


def _greedy(table, quantities, primary, fixed, eligible, cost, witnesses):
    """Greedy pattern (the fall-back). Pass 1, repeated: for every relation whose only hidden cell
    needs protecting or was chosen, hide its cheapest eligible cell. Pass 2: audit; for each cell
    still short, hide the eligible cell with the best gain per cost in its cut. Repeat until the
    audit passes or nothing more can be hidden."""
    M = abs(table.relations).tocsr()
    hidden = fixed.copy()
    chosen = np.zeros_like(hidden)
    rounds = 0
    audits: list[QuantityAudit] = []
    while True:
        rounds += 1
        while True:
            count = _relation_counts(M, hidden)
            added = False
            for r in np.flatnonzero(count == 1):
                members = M.indices[M.indptr[r]:M.indptr[r + 1]]
                lone = members[hidden[members]]
                if not (primary[lone].any() or chosen[lone].any()):
                    continue
                options = members[eligible[members] & ~hidden[members]]
                if len(options):
                    j = options[np.argmin(cost[options])]
                    hidden[j] = chosen[j] = True
                    added = True
            if not added:
                break
        audits, cuts = _audit_all(table, quantities, hidden, witnesses)
        if not cuts:
            return hidden, rounds, audits
        progress = False
        for cut in cuts:
            rhs = cut.shortfall(hidden)
            if rhs <= 0:
                continue  # an earlier addition in this pass may already have fixed it
            pick = eligible[cut.index] & ~hidden[cut.index]
            if not pick.any():
                continue
            options = cut.index[pick]
            score = np.minimum(cut.gain[pick], rhs) / cost[options]
            j = options[np.argmax(score)]
            hidden[j] = chosen[j] = True
            progress = True
        if not progress:
            return hidden, rounds, audits
