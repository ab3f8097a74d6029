"""Protect: disclosure control. This stage alone decides what is withheld.

1. Primary suppression by the threshold rule on unweighted counts: a cell is withheld when
   0 < x < k or 0 < n − x < k (k = disclosure.min_respondents), so that no small group of
   respondents who have, or lack, the characteristic can be singled out; optionally also when
   x = 0 or x = n in a cell of fewer than disclosure.unanimous_below persons (everyone's answer is
   then known). Both carry the public code `few_respondents`: a code of its own for 'all or none'
   would tell a reader what the withheld figure hides.
2. Complementary suppression (disclosure.complementary): per indicator, further cells are
   withheld, chosen by pipeline.methods.suppression.protect_table, so that no confidential cell can
   be worked out from the published weighted counts and sample sizes through the table's additive
   relations (parent area = sum of its children; 'all' = sum of its categories). Indicators over
   the same persons (the same sample size in every cell) print one sample size and base per cell
   and are protected as one table (`_over_same_persons`): one pattern for all of them.
3. Audit: for every confidential cell, a range of values a reader cannot rule out, proven by
   linear programming, must be at least as wide as disclosure.protection asks; otherwise the
   release is refused (ReleaseRefused, exit 4) naming the cells, and nothing is published.

What the audit assumes a reader knows (DESIGN §4): the public file, one indicator's table at a
time, or one group's tables over the same persons: there a cell one of them withholds as
unreliable while another publishes it is taken as known (its sample size and base are printed;
treating its counts as known too is pessimistic, so the proofs stay valid, and the tests check a
reader's program over both tables with count + (base − count) tied between them). Published
weighted counts and bases are known to ± half the rounding step, and a published estimate,
rounded to disclosure.decimals, narrows the weighted count further (count = estimate × base);
sample sizes are published exactly; a withheld cell without sample is known to be 0 (its reason
code says so); `sample_too_small` on a withheld cell says n < reliability.min_sample, its absence
n >= it; no subgroup exceeds the published grand total. Three quantities are audited, each over
its own additive table: the weighted count with the characteristic (for cells where few or none
have it), the weighted count without it, i.e. base − count (for cells where few or none lack it),
and the sample size (for every confidential cell). The weighted base is the sum of the first two.

The rules and thresholds defer to the office's confidentiality rules and local law.
"""

from __future__ import annotations

import os
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import replace

import numpy as np
import pandas as pd

from pipeline.errors import ReleaseRefused
from pipeline.flags import SEVERITY, Reason, Status, apply_rule, reason_descriptions, settle
from pipeline.methods import suppression

FIGURE_COLUMNS = ["estimate", "std_error", "ci_lower", "ci_upper", "margin_of_error", "cv", "sample_size",
                  "weighted_base", "weighted_count", "design_effect", "effective_n"]
# Figures that are not counts: rounded to disclosure.decimals in the public files, so that none
# of them gives the estimate back more precisely than the estimate itself is printed.
DECIMAL_COLUMNS = ["estimate", "std_error", "ci_lower", "ci_upper", "margin_of_error", "cv", "design_effect",
                   "effective_n"]
# Per-cell audit results in internal/cells.parquet, per audited quantity, for every withheld cell
# (NaN for published ones): lower/upper, values a reader cannot rule out (proven by feasible
# points); outer_lower/outer_upper, bounds a reader can work out; the exact range lies between
# them (they are equal where it is known exactly). audit_ok: NA where no protection is needed.
_QUANTITY_COLUMNS = {
    "weighted_count": ("audit_lower", "audit_upper", "audit_outer_lower", "audit_outer_upper"),
    "weighted_complement": ("audit_complement_lower", "audit_complement_upper",
                            "audit_complement_outer_lower", "audit_complement_outer_upper"),
    "sample_size": ("audit_sample_lower", "audit_sample_upper", "audit_sample_outer_lower",
                    "audit_sample_outer_upper")}
AUDIT_COLUMNS = [col for cols in _QUANTITY_COLUMNS.values() for col in cols] + ["audit_ok"]
_NAMED_CELLS = 20  # cells listed when the audit refuses a release


def protect(frame: pd.DataFrame, severity: np.ndarray, reasons: list[list[str]], config) -> pd.DataFrame:
    """Primary suppression only (threshold and unanimous rules). A release goes through
    `protect_release`, which adds complementary suppression and the audit; this is for studies
    that need the primary outcome alone (the coverage study)."""
    f = frame.copy()
    _primary(f, severity, reasons, config)
    settle(f, severity, reasons, reason_descriptions(config))
    return f


def _primary(f: pd.DataFrame, severity: np.ndarray, reasons: list[list[str]], config) -> suppression.PrimaryCells:
    dis = config.disclosure
    primary = suppression.primary_cells(f["sample_size"].to_numpy(), f["respondents"].to_numpy(),
                                        min_respondents=dis.min_respondents, unanimous_below=dis.unanimous_below)
    f["rule_few_respondents"] = primary.few_respondents
    f["rule_unanimous"] = primary.unanimous
    apply_rule(severity, reasons, primary.cells, Reason.FEW_RESPONDENTS, Status.SUPPRESSED)
    return primary


def protect_release(frame: pd.DataFrame, severity: np.ndarray, reasons: list[list[str]], config, *,
                    geography) -> tuple[pd.DataFrame, dict]:
    """Primary and complementary suppression and the audit. Returns the cells (with
    `rule_complementary` and the audit columns) and a summary for the manifest. Raises
    ReleaseRefused when the audit cannot prove every confidential cell protected."""
    started = time.perf_counter()
    f = frame.copy()
    dis = config.disclosure
    primary = _primary(f, severity, reasons, config)
    f["rule_complementary"] = False
    for col in AUDIT_COLUMNS[:-1]:
        f[col] = np.nan
    f["audit_ok"] = pd.array([pd.NA] * len(f), dtype="boolean")
    if not dis.complementary:
        settle(f, severity, reasons, reason_descriptions(config))
        return f, {"complementary_suppression": False, "primary_cells": int(primary.cells.sum()),
                   "note": "complementary suppression is off (disclosure.complementary: false): withheld "
                           "cells may be recoverable by subtraction; no audit was run",
                   "seconds": round(time.perf_counter() - started, 3)}

    structure = _Structure(f, config, geography)
    deadline = started + dis.time_limit_seconds
    indicator_of = f["indicator"].to_numpy()
    blocks = [np.flatnonzero(indicator_of == ind) for ind in pd.unique(indicator_of)]
    names = [str(indicator_of[rows[0]]) for rows in blocks]
    sample_sizes = f["sample_size"].to_numpy()
    over_same_persons = _over_same_persons(sample_sizes, structure, blocks)
    groups = over_same_persons if dis.same_persons == "together" else [[k] for k in range(len(blocks))]
    for rows in blocks:
        structure.table(rows)  # build the shared relations once, before the threads
    withheld_before = severity >= SEVERITY[Status.SUPPRESSED]  # by the rules so far, per indicator
    no_sample = sample_sizes == 0
    base_all = f["weighted_base"].to_numpy()
    costs = [np.where(withheld_before[rows], 0.0, suppression.suppression_cost(
        structure.table(rows), kind=dis.cost, weighted_base=base_all[rows])) for rows in blocks]

    def protect_group(group: list[int]) -> suppression.ProtectionResult:
        """One table for the indicators of a group (see `_over_same_persons`): they share one
        pattern, every quantity of each and their one sample size audited over it. A cell one of
        them withholds as unreliable while another publishes it is no complement: its sample size
        and base are printed, so the audit takes its figures as known exactly (pessimistic)."""
        first = blocks[group[0]]
        everywhere = np.logical_and.reduce([withheld_before[blocks[k]] for k in group])
        quantities, samples = [], []
        for k in group:
            rows = blocks[k]
            count, complement, sample = _quantities(f.iloc[rows], severity[rows], reasons, rows, primary, config,
                                                    structure)
            shown_elsewhere = withheld_before[rows] & ~everywhere
            quantities += [_known_exactly(q, shown_elsewhere, name=f"{q.name} of {names[k]}")
                           for q in (count, complement)]
            samples.append(sample)
        quantities.append(_one_sample_size(samples))
        known = no_sample[first]
        return suppression.protect_table(structure.table(first), quantities=quantities,
                                         withheld=everywhere & ~known, eligible=~everywhere & ~known,
                                         cost=np.sum([costs[k] for k in group], axis=0),
                                         time_limit=max(deadline - time.perf_counter(), 0.0))

    # groups are independent tables; HiGHS releases the GIL while it solves, so threads overlap
    # the linear programs of different groups. Most withheld cells first: they take longest, and
    # starting them early keeps the threads busy to the end.
    work = withheld_before | primary.cells
    order = sorted(range(len(groups)), key=lambda g: -sum(int(work[blocks[k]].sum()) for k in groups[g]))
    with ThreadPoolExecutor(max_workers=min(len(groups), os.cpu_count() or 1) or 1) as pool:
        started_first = {g: pool.submit(protect_group, groups[g]) for g in order}
        results = [started_first[g].result() for g in range(len(groups))]

    per_indicator, failures = {}, []
    complementary = np.zeros(len(f), dtype=bool)
    audit_ok = np.full(len(f), True)
    audit_values = {col: np.full(len(f), np.nan) for col in AUDIT_COLUMNS[:-1]}
    totals = {"checks": 0, "proven_by_witnesses": 0, "proven_by_exact_range": 0}  # (cell, quantity) pairs
    ranges = {q: {"withheld_cells": 0, "exact": 0, "pinned_down": 0} for q in _QUANTITY_COLUMNS}
    published_elsewhere = 0
    for group, result in zip(groups, results):
        sample = result.audits[-1]
        for i, k in enumerate(group):
            rows = blocks[k]
            mine = [*result.audits[2 * i:2 * i + 2], sample]  # in the order of _QUANTITY_COLUMNS
            for audit, name in zip(mine, _QUANTITY_COLUMNS):
                for col, values in zip(_QUANTITY_COLUMNS[name],
                                       (audit.lower, audit.upper, audit.outer_lower, audit.outer_upper)):
                    audit_values[col][rows] = values
                audit_ok[rows] &= audit.ok
                if audit is sample and i:
                    continue  # the group's one sample size is counted once
                ranges[name]["withheld_cells"] += int(result.hidden.sum())
                ranges[name]["exact"] += int((result.hidden & audit.exact).sum())
                # withheld, yet a reader can work the value out to within float dust: harmless for a
                # cell withheld as unreliable (no secret), worth knowing for the office all the same
                width = audit.outer_upper - audit.outer_lower
                ranges[name]["pinned_down"] += int(
                    (result.hidden & (width <= 1e-6 * np.maximum(1.0, np.abs(audit.outer_upper)))).sum())
                checked = (audit.required > 0) & result.hidden
                totals["checks"] += int(checked.sum())
                totals["proven_by_exact_range"] += int((checked & audit.exact & audit.ok).sum())
                totals["proven_by_witnesses"] += int((checked & ~audit.exact & audit.ok).sum())
            # withheld here as unreliable, published by another indicator of the group: its sample
            # size is printed there (exact); its counts the audit took as known (no range: NaN)
            elsewhere = withheld_before[rows] & ~result.hidden & ~no_sample[rows]
            for col in _QUANTITY_COLUMNS["sample_size"]:
                audit_values[col][rows[elsewhere]] = sample_sizes[rows[elsewhere]]
            published_elsewhere += int(elsewhere.sum())
            failed = mine[0].failed | mine[1].failed | (sample.failed & primary.cells[rows])
            failures += [rows[j] for j in np.flatnonzero(failed)]
            # withheld here to protect a cell of this indicator or of another one in the group
            added = result.hidden & ~withheld_before[rows]
            complementary[rows] = added
            per_indicator[names[k]] = {
                "primary_cells": int(primary.cells[rows].sum()),
                "complementary_cells": int(added.sum()),
                "complementary_weighted_base": round(float(base_all[rows][added].sum()), 1),
                "cost": round(float(costs[k][added].sum()), 3), "method": result.method,
                "solver_status": result.status, "rounds": result.rounds, "seconds": round(result.seconds, 3),
                **({"protected_with": [names[j] for j in group if j != k]} if len(group) > 1 else {})}
    for col, values in audit_values.items():
        f[col] = values

    if failures:
        raise ReleaseRefused(
            f"disclosure audit failed: {len(failures)} confidential cell(s) can be narrowed down below "
            f"disclosure.protection from the published figures; nothing is published",
            [_describe(f, i, structure.domain_names) for i in sorted(failures)[:_NAMED_CELLS]]
            + ([f"... and {len(failures) - _NAMED_CELLS} more"] if len(failures) > _NAMED_CELLS else []))

    apply_rule(severity, reasons, complementary, Reason.COMPLEMENTARY, Status.SUPPRESSED)
    f["rule_complementary"] = complementary
    protected = primary.cells
    f["audit_ok"] = pd.array(np.where(protected, audit_ok, False), dtype="boolean")
    f.loc[~protected, "audit_ok"] = pd.NA
    settle(f, severity, reasons, reason_descriptions(config))
    publishable = int((severity < SEVERITY[Status.SUPPRESSED]).sum() + complementary.sum())
    base = f["weighted_base"].to_numpy()
    summary = {
        "complementary_suppression": True,
        "primary_cells": int(primary.cells.sum()),
        "complementary_cells": int(complementary.sum()),
        "information_lost": {
            "cells": int(complementary.sum()),
            "share_of_cells_that_passed_the_other_rules": round(complementary.sum() / publishable, 4)
            if publishable else 0.0,
            "weighted_base": round(float(base[complementary].sum()), 1),
            "cost": round(sum(v["cost"] for v in per_indicator.values()), 3),
            "cost_kind": dis.cost},
        "protection": _protection_text(config),
        "audit": {"result": "passed", "quantities": list(_QUANTITY_COLUMNS), **totals,
                  "ranges_of_withheld_cells": ranges,
                  "indicators_over_the_same_persons": _printed_elsewhere(
                      blocks, over_same_persons, names, severity >= SEVERITY[Status.SUPPRESSED], primary.cells,
                      published_elsewhere, dis.same_persons)},
        "seconds": round(time.perf_counter() - started, 3),
        "indicators": per_indicator,
    }
    return f, summary


def _over_same_persons(n: np.ndarray, structure: _Structure, blocks: list[np.ndarray]) -> list[list[int]]:
    """The indicators (blocks) grouped by the persons they cover: the same cells and the same sample
    size in every cell (same universe, no item non-response). Their rows print one sample size and
    one weighted base per cell, so a cell whose row one of them publishes has those figures
    published for all: they are protected as one table. Each indicator alone otherwise. `n`: the
    cells' sample sizes."""
    by_persons: dict[tuple[bytes, bytes], list[int]] = {}
    for k, rows in enumerate(blocks):
        by_persons.setdefault((structure.layout(rows), n[rows].tobytes()), []).append(k)
    return list(by_persons.values())


def _known_exactly(q: suppression.Quantity, cells: np.ndarray, *, name: str) -> suppression.Quantity:
    """`q`, named `name`, with the value of `cells` taken as known to a reader whenever they are
    not hidden in the pattern: fewer values a reader cannot rule out than in truth, so proofs stay
    valid."""
    return replace(q, name=name, published_lower=np.where(cells, q.value, q.published_lower),
                   published_upper=np.where(cells, q.value, q.published_upper))


def _one_sample_size(samples: list[suppression.Quantity]) -> suppression.Quantity:
    """The sample size of a group's indicators (the same in every cell) as one quantity: a reader
    combines what each indicator's reason codes say of a withheld cell, and every indicator's
    confidential cells need its protection."""
    return replace(samples[0], hidden_lower=np.maximum.reduce([q.hidden_lower for q in samples]),
                   hidden_upper=np.minimum.reduce([q.hidden_upper for q in samples]),
                   required=np.maximum.reduce([q.required for q in samples]))


def _printed_elsewhere(blocks: list[np.ndarray], groups: list[list[int]], names: list[str], withheld: np.ndarray,
                       confidential: np.ndarray, unreliable: int, mode: str) -> dict:
    """For the manifest: the groups of indicators over the same persons, how many confidential
    cells withheld in one of them have their row, with its sample size and base, published in
    another (0 when protected together, unless the shared pattern failed to hold), and how many
    cells one withholds as unreliable and another publishes (`unreliable`: their figures were taken
    as known; 0 when protected apart)."""
    printed = 0
    for group in (g for g in groups if len(g) > 1):
        shown = np.logical_or.reduce([~withheld[blocks[k]] for k in group])
        printed += sum(int((confidential[blocks[k]] & withheld[blocks[k]] & shown).sum()) for k in group)
    together = ("they are protected as one table: a cell withheld as confidential or complementary in one is "
                "withheld in all of them, and a cell only some of them withhold as unreliable is taken as known "
                "to a reader (no complement; its audit columns give the printed sample size and no range for "
                "the counts)")
    apart = ("they were protected one by one (disclosure.same_persons: apart): a confidential cell withheld in "
             "one of them whose row another publishes has its sample size printed there, and its counts are "
             "proven protected within its own indicator's table only")
    return {"groups": [[names[k] for k in g] for g in groups if len(g) > 1], "protected": mode,
            "confidential_cells_printed_in_another": printed,
            "unreliable_cells_published_in_another": unreliable,
            "note": "indicators in one group have the same sample size in every cell, so their rows print one "
                    "sample size and weighted base per cell; " + (together if mode == "together" else apart)}


def _protection_text(config) -> dict:
    dis = config.disclosure
    return {"relative": dis.protection.relative, "respondents": _respondents(config),
            "rule": "upper − lower of the range a reader can work out >= max(relative × value, respondents "
                    "× the cell's mean weight) for weighted counts, >= respondents for the sample size"}


def _respondents(config) -> int:
    p = config.disclosure.protection
    return config.disclosure.min_respondents if p.respondents is None else p.respondents


def _describe(f: pd.DataFrame, i: int, domain_names) -> str:
    row = f.iloc[i]
    cats = ", ".join(f"{d}={row[d]}" for d in domain_names)
    return (f"{row['indicator']} {row['geo_level']} {row['geo_code']} ({row['geo_name']})"
            + (f" [{cats}]" if cats else "") + ": audit ranges "
            + "; ".join(f"{q} {row[lo]:.6g}..{row[hi]:.6g}" for q, (lo, hi, *_outer) in _QUANTITY_COLUMNS.items()
                        if pd.notna(row[lo])))


class _Structure:
    """The linked-table layout of the cells table: geography units (numbered over all levels,
    with their parents) and each cell's category per domain. Built once; each indicator's block
    has the same layout, so its relations are built once too."""

    def __init__(self, f: pd.DataFrame, config, geography):
        self.domain_names = list(config.domains)
        levels = list(geography.levels)
        offsets, parent = {}, []
        for depth, level in enumerate(levels):
            offsets[level] = len(parent)
            up = np.full(len(geography.codes[level]), -1, dtype=np.int64)
            if depth:
                above = levels[depth - 1]
                up[geography.unit_index[level]] = geography.unit_index[above] + offsets[above]
            parent.extend(up.tolist())
        self.parent = np.array(parent, dtype=np.int64)
        geo_level = f["geo_level"].to_numpy()
        geo_code = f["geo_code"].to_numpy()
        self.level = np.full(len(f), -1, dtype=np.int64)
        self.unit = np.full(len(f), -1, dtype=np.int64)
        for depth, level in enumerate(levels):
            rows = geo_level == level
            self.level[rows] = depth
            self.unit[rows] = offsets[level] + pd.Index(geography.codes[level]).get_indexer(geo_code[rows])
        if (self.unit < 0).any():
            raise AssertionError("cells table holds geography units the lookup does not")  # roll_up made both
        self.categories, columns = [], []
        for name, dom in config.domains.items():
            labels = list(dom.categories.values()) if dom.categories is not None else list(dom.labels)
            self.categories.append(len(labels))
            # one hash lookup per cell (a dict map per cell took a quarter of a second at S)
            position = pd.Index([*labels, "all"]).get_indexer(f[name])
            if (position < 0).any():
                raise AssertionError(f"cells table holds a category of {name!r} the config does not")
            columns.append(np.where(position == len(labels), -1, position).astype(np.int64))
        self.domains = np.column_stack(columns) if columns else np.zeros((len(f), 0), dtype=np.int64)
        self.top = (self.level == 0) & (self.domains < 0).all(axis=1)  # grand-total cells
        self._tables: dict[bytes, suppression.LinkedTable] = {}

    def layout(self, rows: np.ndarray) -> bytes:
        """The cells of a block, unit and categories in order: blocks with the same layout have the
        same relations."""
        return np.column_stack([self.unit[rows], self.level[rows], self.domains[rows]]).tobytes()

    def table(self, rows: np.ndarray) -> suppression.LinkedTable:
        key = self.layout(rows)
        if key not in self._tables:
            self._tables[key] = suppression.linked_table(
                unit=self.unit[rows], parent=self.parent, level=self.level[rows], domains=self.domains[rows],
                categories=self.categories)
        return self._tables[key]


def _quantities(cells: pd.DataFrame, severity: np.ndarray, reasons: list[list[str]], rows: np.ndarray,
                primary: suppression.PrimaryCells, config, structure: _Structure) -> list[suppression.Quantity]:
    """The three audited quantities of one indicator's cells, with what a reader of the public
    file knows about each (see the module docstring)."""
    dis, rel = config.disclosure, config.reliability
    step = float(dis.round_counts_to)
    half = step / 2
    n = cells["sample_size"].to_numpy(dtype=np.float64)
    base = cells["weighted_base"].to_numpy(dtype=np.float64)
    count = cells["weighted_count"].to_numpy(dtype=np.float64)
    complement = np.maximum(base - count, 0.0)
    known = n == 0
    published = severity < SEVERITY[Status.SUPPRESSED]
    # rounding intervals of the published counts (halves up: |rounded − true| <= step/2)
    base_pub, count_pub = suppression.round_half_up(base, step), suppression.round_half_up(count, step)
    b_lo, b_hi = np.maximum(base_pub - half, 0.0), base_pub + half
    c_lo, c_hi = np.maximum(count_pub - half, 0.0), count_pub + half
    # a published estimate p (to `decimals`, so within ±δ) ties the count to the base
    p = np.nan_to_num(cells["estimate"].to_numpy(dtype=np.float64), nan=0.0)
    delta = 0.0 if dis.decimals is None else 0.5 * 10.0 ** (-dis.decimals)
    p_pub = p if dis.decimals is None else _round_decimals(p, dis.decimals)
    p_lo, p_hi = np.clip(p_pub - delta, 0, 1), np.clip(p_pub + delta, 0, 1)
    c_lo, c_hi = np.maximum(c_lo, p_lo * b_lo), np.minimum(c_hi, p_hi * b_hi)
    w_lo = np.maximum.reduce([b_lo - c_hi, (1 - p_hi) * b_lo, np.zeros(len(n))])
    w_hi = np.minimum(b_hi - c_lo, (1 - p_lo) * b_hi)
    # no subgroup exceeds the grand total, when the grand total is published
    top = structure.top[rows]

    def cap(upper: np.ndarray) -> float:
        return float(upper[top].sum()) if top.any() and published[top].all() else np.inf

    # sample sizes: what the reason codes of a withheld row say
    n_lo = np.where(known, 0.0, 1.0)
    n_hi = np.full(len(n), cap(n))
    codes = [set(reasons[i]) for i in rows]
    if rel.standard == "custom" and rel.min_sample > 0:
        too_small = np.array([Reason.SAMPLE_TOO_SMALL.value in c for c in codes])
        n_hi = np.where(too_small, rel.min_sample - 1.0, n_hi)
        n_lo = np.where(~too_small & ~known, float(rel.min_sample), n_lo)
    elif rel.standard == "nchs_2017":
        # effective n >= 30 where not flagged, and the effective n never exceeds n
        small_eff = np.array([Reason.EFFECTIVE_N_TOO_SMALL.value in c for c in codes])
        n_lo = np.where(~small_eff & ~known, 30.0, n_lo)
    n_lo, n_hi = np.minimum(n_lo, n), np.maximum(n_hi, n)  # the rules hold; guard float dust only

    relative = dis.protection.relative
    respondents = float(_respondents(config))
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_weight = np.where(n > 0, base / n, 0.0)
    sel = primary.cells[rows]
    need_count = np.where(primary.protect_count[rows], np.maximum(relative * count, respondents * mean_weight), 0.0)
    need_complement = np.where(primary.protect_complement[rows],
                               np.maximum(relative * complement, respondents * mean_weight), 0.0)
    need_n = np.where(sel, respondents, 0.0)

    def interval(lo, hi, value):
        return np.where(known, 0.0, lo), np.where(known, 0.0, hi), value

    out = []
    for name, (lo, hi, value), upper, need in (
            ("weighted_count", interval(c_lo, c_hi, count), cap(c_hi), need_count),
            ("weighted_complement", interval(w_lo, w_hi, complement), cap(w_hi), need_complement),
            ("sample_size", interval(n, n, n), None, need_n)):
        if name == "sample_size":
            h_lo, h_hi = n_lo, n_hi
        else:
            h_lo, h_hi = np.zeros(len(n)), np.full(len(n), upper)
        out.append(suppression.Quantity(name=name, value=value, published_lower=lo, published_upper=hi,
                                        hidden_lower=h_lo, hidden_upper=h_hi, required=need))
    return out


def _round_decimals(values: np.ndarray, decimals: int) -> np.ndarray:
    """Halves up, like the counts; NaN stays NaN."""
    scale = 10.0 ** decimals
    return np.floor(np.asarray(values, dtype=np.float64) * scale + 0.5) / scale


def public_columns(domain_names) -> list[str]:
    return (["indicator", "geo_level", "geo_code", "geo_name", *domain_names, *FIGURE_COLUMNS,
             "status", "reasons", "note"])


def public_estimates(frame: pd.DataFrame, config, domain_names) -> pd.DataFrame:
    """The public table: every figure of a suppressed cell emptied, weighted counts rounded to
    `disclosure.round_counts_to` (0 = unrounded), figures that are not counts rounded to
    `disclosure.decimals` (None = unrounded), columns in the contract's order."""
    out = frame[public_columns(domain_names)].copy()
    out["sample_size"] = out["sample_size"].astype("float64")
    step = config.disclosure.round_counts_to
    for col in ("weighted_base", "weighted_count"):
        out[col] = suppression.round_half_up(out[col].to_numpy(dtype=np.float64), step)
    if config.disclosure.decimals is not None:
        for col in DECIMAL_COLUMNS:
            out[col] = _round_decimals(out[col].to_numpy(dtype=np.float64), config.disclosure.decimals)
    withheld = out["status"].to_numpy() == Status.SUPPRESSED.value
    for col in FIGURE_COLUMNS:
        out.loc[withheld, col] = np.nan
    out["sample_size"] = out["sample_size"].astype("Int64")
    return out.reset_index(drop=True)
