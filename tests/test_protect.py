"""The protect stage (DESIGN §3, §4): primary rules, the public view and its rounding, and a real
release of the small demo audited independently.

The independent audit reads only what a reader has — the public CSV and the geography lookup —
builds the additive relations itself (parent area = sum of its children, 'all' = sum of its
categories) and asks scipy.optimize.linprog directly how far each confidential cell's value can
move. It shares no code with pipeline.methods.suppression. The protection level it checks
(DESIGN §4, README 'Disclosure control'): width >= max(0.5 × value, 5 × mean weight) for the
weighted count of each side held by fewer than 5 respondents (or by none, in a cell of fewer
than 10 persons: the unanimous rule), >= 5 for the sample size. The true
values (to compute those levels and to check the truth lies inside) come from internal/cells.parquet.
"""

from __future__ import annotations

import csv
import json
import re
import shutil

import numpy as np
import pandas as pd
import pytest
from scipy import sparse
from scipy.optimize import linprog

from pipeline.config import load_config
from pipeline.errors import ReleaseRefused
from pipeline.flags import empty_outcome
from pipeline.runner import run
from pipeline.stages.protect import FIGURE_COLUMNS, protect, public_columns, public_estimates
from tests.conftest import DEMO_CONFIG, demo_settings, write_config

K = 5            # disclosure.min_respondents of the demo config
UNANIMOUS = 10   # disclosure.unanimous_below of the demo config
RELATIVE = 0.5   # disclosure.protection.relative (default)
STEP = 10        # disclosure.round_counts_to
DECIMALS = 4     # disclosure.decimals
MIN_SAMPLE = 30  # reliability.min_sample


@pytest.fixture(scope="module")
def config():
    return load_config(DEMO_CONFIG)


def frame(rows):
    f = pd.DataFrame(rows, columns=["sample_size", "respondents", "weighted_base", "weighted_count"])
    for col in ("indicator", "geo_level", "geo_code", "geo_name", "sex", "age_group"):
        f[col] = "x"
    f["estimate"] = f["weighted_count"] / f["weighted_base"]
    for col in ("std_error", "ci_lower", "ci_upper", "margin_of_error", "cv", "design_effect", "effective_n"):
        f[col] = 0.01
    return f


def run_protect(config, rows):
    f = frame(rows)
    severity, reasons = empty_outcome(len(f))
    return protect(f, severity, reasons, config)


def config_with(tmp_path, **disclosure):
    settings = demo_settings()
    settings["disclosure"].update(disclosure)
    return load_config(write_config(tmp_path / "c.yaml", settings))


# --------------------------------------------------------------------------------------------
# Primary rules and the public view


def test_threshold_rule(config):
    # (n, x): x = 4 < 5 withheld; x = 5 not; n − x = 4 withheld; x = 0 and x = n are not this rule's business
    out = run_protect(config, [(100, 4, 1000, 40), (100, 5, 1000, 50), (100, 96, 1000, 960),
                               (100, 0, 1000, 0), (100, 100, 1000, 1000)])
    assert out["rule_few_respondents"].tolist() == [True, False, True, False, False]
    assert out["status"].tolist() == ["suppressed", "published", "suppressed", "published", "published"]
    assert out["reasons"].tolist()[0] == "few_respondents"
    assert "singled out" in out["note"].iloc[0]


def test_unanimous_rule_withholds_small_all_or_none_cells_under_the_same_code(tmp_path):
    config = config_with(tmp_path, unanimous_below=10)
    # (n, x): 8 persons, none has it; 8 persons, all have it; 12 persons, none (not under 10)
    out = run_protect(config, [(8, 0, 800, 0), (8, 8, 800, 800), (12, 0, 1200, 0)])
    assert out["rule_unanimous"].tolist() == [True, True, False]
    assert out["status"].tolist() == ["suppressed", "suppressed", "published"]
    # the public code does not say which: 'all or none' would itself disclose
    assert out["reasons"].tolist()[:2] == ["few_respondents", "few_respondents"]
    assert "possibly none" in out["note"].iloc[0]


def test_public_view_empties_every_figure_of_a_withheld_cell(config):
    out = public_estimates(run_protect(config, [(100, 4, 1234, 44), (100, 50, 1234, 615)]), config,
                           ["sex", "age_group"])
    assert list(out.columns) == public_columns(["sex", "age_group"])
    assert out.loc[0, FIGURE_COLUMNS].isna().all()
    assert out.loc[1, FIGURE_COLUMNS].notna().all()


def test_weighted_counts_rounded_half_up(config):
    out = public_estimates(run_protect(config, [(100, 50, 1235, 615), (100, 50, 1234, 614)]), config,
                           ["sex", "age_group"])
    assert out["weighted_base"].tolist() == [1240.0, 1230.0]
    assert out["weighted_count"].tolist() == [620.0, 610.0]


def test_estimates_and_errors_rounded_to_decimals_in_the_public_file_only(config, tmp_path):
    cells = run_protect(config, [(100, 50, 1235, 615), (100, 50, 1600, 500.08)])
    out = public_estimates(cells, config, ["sex", "age_group"])
    # 615/1235 = 0.497975708... -> 0.4980; 500.08/1600 = 0.31255 -> 0.3126 (a half rounds up)
    assert out["estimate"].tolist() == [0.498, 0.3126]
    assert out["std_error"].tolist() == [0.01, 0.01]
    assert cells["estimate"].iloc[0] == pytest.approx(615 / 1235, rel=1e-15)  # internal stays unrounded
    unrounded = public_estimates(cells, config_with(tmp_path, decimals=None), ["sex", "age_group"])
    assert unrounded["estimate"].iloc[0] == pytest.approx(615 / 1235, rel=1e-15)


# --------------------------------------------------------------------------------------------
# A real release, audited independently


def make_release(root, small_demo, settings) -> dict:
    shutil.copytree(small_demo / "data", root / "data")
    (root / "configs").mkdir()
    summary = run(write_config(root / "configs" / "demo.yaml", settings), release_id="p1")
    rel = summary.release_dir
    return {"root": root, "dir": rel,
            "public_csv": pd.read_csv(rel / "public" / "estimates.csv", dtype={"geo_code": str}, keep_default_na=False,
                                      na_values={c: [""] for c in FIGURE_COLUMNS}),
            "cells": pd.read_parquet(rel / "internal" / "cells.parquet"),
            "manifest": json.loads((rel / "manifest.json").read_text()),
            "lookup": pd.read_csv(root / "data" / "raw" / "demo_areas.csv", dtype=str)}


@pytest.fixture(scope="module")
def release(tmp_path_factory, small_demo):
    return make_release(tmp_path_factory.mktemp("protect"), small_demo, demo_settings())


LEVELS = ["nation", "region", "district", "area"]


def reader_relations(public: pd.DataFrame, lookup: pd.DataFrame) -> sparse.csr_matrix:
    """The additive relations of one indicator's rows, from the public keys and the lookup alone:
    each row that has a parent unit (same categories) or an 'all' margin over one domain (same
    unit) is a part of that total."""
    parent = {}
    for upper, lower in zip(LEVELS[:-1], LEVELS[1:]):
        for p, c in lookup[[f"{upper}_code", f"{lower}_code"]].drop_duplicates().itertuples(index=False):
            parent[(lower, c)] = (upper, p)
    key = {k: i for i, k in enumerate(zip(public["geo_level"], public["geo_code"], public["sex"], public["age_group"]))}
    groups: dict[tuple, list[int]] = {}
    for i, (level, code, sex, age) in enumerate(key):
        totals = []
        if level != "nation":
            totals.append(("geo", key.get((*parent[(level, code)], sex, age))))
        if sex != "all":
            totals.append(("sex", key.get((level, code, "all", age))))
        if age != "all":
            totals.append(("age", key.get((level, code, sex, "all"))))
        for kind, total in totals:
            if total is not None:
                groups.setdefault((kind, total), []).append(i)
    rows, cols, vals = [], [], []
    for r, ((_, total), parts) in enumerate(groups.items()):
        rows += [r] * (len(parts) + 1)
        cols += parts + [total]
        vals += [1.0] * len(parts) + [-1.0]
    return sparse.csr_matrix((vals, (rows, cols)), shape=(len(groups), len(public)))


def reader_bounds(public: pd.DataFrame) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """What the public file says about each row's weighted count, weighted count without the
    characteristic (base − count) and sample size: a published count within ± STEP/2, narrowed
    by count = estimate × base with the estimate within ± half a unit of its last decimal; a
    withheld one between 0 and the published grand total; sample sizes exact, and for a withheld
    row what its reason codes say (no_sample: 0; sample_too_small: below MIN_SAMPLE; else at least)."""
    hidden = (public["status"] == "suppressed").to_numpy()
    reasons = public["reasons"].fillna("")
    none = reasons.str.contains("no_sample").to_numpy()
    too_small = reasons.str.contains("sample_too_small").to_numpy()
    b, c, p = (public[col].to_numpy(dtype=float) for col in ("weighted_base", "weighted_count", "estimate"))
    half, dp = STEP / 2, 0.5 * 10.0 ** -DECIMALS
    p_lo, p_hi = np.clip(p - dp, 0, 1), np.clip(p + dp, 0, 1)
    c_lo = np.maximum.reduce([c - half, p_lo * (b - half), np.zeros(len(c))])
    c_hi = np.minimum(c + half, p_hi * (b + half))
    w_lo = np.maximum.reduce([b - half - c_hi, (1 - p_hi) * (b - half), np.zeros(len(c))])
    w_hi = np.minimum(b + half - c_lo, (1 - p_lo) * (b + half))
    n = public["sample_size"].to_numpy(dtype=float)
    top = ((public["geo_level"] == "nation") & (public["sex"] == "all") & (public["age_group"] == "all")).to_numpy()
    out = {}
    for name, lo, hi in (("count", c_lo, c_hi), ("complement", w_lo, w_hi), ("sample", n, n)):
        cap = float(hi[top].sum())
        lo = np.where(hidden, 0.0, lo)
        hi = np.where(hidden, cap, hi)
        if name == "sample":
            lo = np.where(hidden & too_small, 1.0, np.where(hidden, MIN_SAMPLE, lo))
            hi = np.where(hidden & too_small, MIN_SAMPLE - 1.0, hi)
        out[name] = (np.where(none, 0.0, lo), np.where(none, 0.0, hi))
    return out


def reader_range(M, bounds, i) -> tuple[float, float]:
    lo, hi = bounds
    found = []
    for sign in (1.0, -1.0):
        c = np.zeros(M.shape[1])
        c[i] = -sign  # minimise −y_i = maximise y_i, then minimise y_i
        res = linprog(c, A_eq=M, b_eq=np.zeros(M.shape[0]), bounds=np.column_stack([lo, hi]), method="highs")
        assert res.status == 0, res.message
        found.append(res.x[i])
    return found[1], found[0]


def protected_sides(n, x, *, k=K, unanimous=UNANIMOUS) -> list[str]:
    """The weighted counts the rules protect in a cell of n persons, x with the characteristic: a
    side held by fewer than k respondents, or by none in a cell of fewer than `unanimous` persons."""
    return [name for name, persons in (("count", x), ("complement", n - x))
            if 0 < persons < k or (persons == 0 and 0 < n < unanimous)]


def side_level(truth: pd.DataFrame, i: int, name: str, respondents: int = K) -> tuple[float, float]:
    """A protected side's true weighted count (count, or base − count) and the width it needs:
    max(RELATIVE × value, respondents × the cell's mean weight)."""
    base, count = truth.loc[i, "weighted_base"], truth.loc[i, "weighted_count"]
    value = count if name == "count" else base - count
    return value, max(RELATIVE * value, respondents * base / truth.loc[i, "sample_size"])


def check_protected(release, indicator, pick, *, k=K, unanimous=UNANIMOUS, respondents=K):
    """Independent audit of the cells `pick(pub, truth, M, primary, beside)` chooses in one
    indicator: every protected side's range (and the sample size's) at least as wide as the level.
    Returns (cells checked, count sides checked, complement sides checked, sides held by nobody)."""
    public, cells = release["public_csv"], release["cells"]
    rows = np.flatnonzero((public["indicator"] == indicator).to_numpy())
    pub, truth = public.iloc[rows].reset_index(drop=True), cells.iloc[rows].reset_index(drop=True)
    assert (pub["geo_code"].to_numpy() == truth["geo_code"].to_numpy()).all()
    M = reader_relations(pub, release["lookup"])
    bounds = reader_bounds(pub)
    primary = pub["reasons"].fillna("").str.contains("few_respondents").to_numpy()
    comp = pub["reasons"].fillna("").str.contains("complementary").to_numpy()
    A = abs(M)
    beside = np.asarray((A.T @ (A @ comp.astype(float))) > 0).ravel()
    checked, sides, nobody = 0, {"count": 0, "complement": 0}, 0
    for i in pick(pub, truth, M, primary, beside):
        n, x = truth.loc[i, "sample_size"], truth.loc[i, "respondents"]
        for name in protected_sides(n, x, k=k, unanimous=unanimous):
            value, need = side_level(truth, i, name, respondents)
            lo, hi = reader_range(M, bounds[name], i)
            assert lo - 1e-6 <= value <= hi + 1e-6, (indicator, i, name)
            assert hi - lo >= need * (1 - 1e-7), (indicator, truth.loc[i, "geo_code"], name, lo, hi, need)
            sides[name] += 1
            nobody += (x if name == "count" else n - x) == 0
        lo, hi = reader_range(M, bounds["sample"], i)
        assert lo - 1e-9 <= n <= hi + 1e-9 and hi - lo >= respondents - 1e-7, (indicator, i, "sample", lo, hi)
        checked += 1
    return checked, sides["count"], sides["complement"], nobody


def test_no_confidential_cell_can_be_narrowed_below_the_protection_level(release):
    rng = np.random.default_rng(11)

    def pick(pub, truth, M, primary, beside):
        # the cells that needed complements are the ones at risk; a few others at random, and a few
        # all-or-none cells (the unanimous rule)
        n, x = truth["sample_size"].to_numpy(), truth["respondents"].to_numpy()
        unanimous = np.flatnonzero(primary & (n < UNANIMOUS) & ((x == 0) | (x == n)))
        others = np.flatnonzero(primary & ~beside)
        return (list(np.flatnonzero(primary & beside)[:8])
                + list(rng.choice(others, size=min(4, len(others)), replace=False))
                + list(rng.choice(unanimous, size=min(4, len(unanimous)), replace=False)))

    found = [check_protected(release, ind, pick) for ind in ["smoker", "chronic_condition", "addiction_treatment"]]
    checked, _count, _complement, nobody = np.sum(found, axis=0)
    assert checked >= 20 and nobody >= 4


def same_persons(public: pd.DataFrame) -> list[tuple[str, str]]:
    """Pairs of indicators a reader can tell cover the same persons (same universe, no item
    non-response): their published sample sizes agree on every cell both publish (at least 10)."""
    key = ["geo_level", "geo_code", "sex", "age_group"]
    names = list(public["indicator"].unique())
    rows = {ind: public[public["indicator"] == ind].reset_index(drop=True) for ind in names}
    pairs = []
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            ta, tb = rows[a], rows[b]
            assert (ta[key].to_numpy() == tb[key].to_numpy()).all()
            both = (ta["status"] != "suppressed").to_numpy() & (tb["status"] != "suppressed").to_numpy()
            if both.sum() >= 10 and (ta.loc[both, "sample_size"] == tb.loc[both, "sample_size"]).all():
                pairs.append((a, b))
    return pairs


@pytest.fixture(scope="module")
def full_release(tmp_path_factory):
    """The release `make demo` publishes (the full demo survey, its config): enough persons for
    indicators over the same people to publish cells the other withholds."""
    from pipeline.demo import write_demo

    root = tmp_path_factory.mktemp("full")
    (root / "demo" / "data" / "raw").mkdir(parents=True)
    write_demo(root / "demo" / "data" / "raw")
    return {**make_release(root / "release", root / "demo", demo_settings()), "demo": root / "demo"}


def test_a_reader_of_both_indicators_over_the_same_persons_cannot_narrow_a_confidential_cell(full_release):
    """Indicators over the same persons print one sample size and weighted base per cell. A reader
    of both rows of such a pair sets up one linear program: each indicator's weighted count and
    base − count over the relations, one sample size table (known wherever either row is
    published, bounded by both rows' reason codes), count + (base − count) the same for both
    indicators in every cell and within ± the rounding of a published base. linprog over it: every
    protected side of a confidential cell, and its sample size, keeps a range at least as wide as
    the level. Checked: the cells confidential in one indicator only, and cells next to one that
    only one indicator withholds (the pipeline takes those as known: its proofs must hold here)."""
    release = full_release
    public, cells = release["public_csv"], release["cells"]
    pairs = same_persons(public)
    assert pairs == [("home_owner", "chronic_condition")]
    a, b = pairs[0]
    pub = {ind: public[public["indicator"] == ind].reset_index(drop=True) for ind in (a, b)}
    truth = {ind: cells[cells["indicator"] == ind].reset_index(drop=True) for ind in (a, b)}
    M = reader_relations(pub[a], release["lookup"])
    cols = M.shape[1]
    bounds = {ind: reader_bounds(pub[ind]) for ind in (a, b)}
    # variables, one block of `cols` each: count a, complement a, count b, complement b (the sample
    # sizes are tied to nothing else: a program of their own, one table known where either row is)
    box = np.vstack([np.column_stack(bounds[ind][name]) for ind in (a, b) for name in ("count", "complement")])
    eye = sparse.identity(cols, format="csr")
    A_eq = sparse.vstack([sparse.block_diag([M] * 4), sparse.hstack([eye, eye, -eye, -eye])], format="csr")
    ub_rows, ub = [], []
    for k, ind in enumerate((a, b)):
        shown = np.flatnonzero((pub[ind]["status"] != "suppressed").to_numpy())
        base = pub[ind]["weighted_base"].to_numpy(dtype=float)[shown]
        pair = sparse.csr_matrix((np.ones(2 * len(shown)), (np.tile(np.arange(len(shown)), 2),
                                                             np.r_[shown, cols + shown] + 2 * k * cols)),
                                 shape=(len(shown), 4 * cols))
        ub_rows += [pair, -pair]
        ub += [base + STEP / 2, -(base - STEP / 2)]
    A_ub, b_ub = sparse.vstack(ub_rows, format="csr"), np.concatenate(ub)
    samples = (np.maximum(bounds[a]["sample"][0], bounds[b]["sample"][0]),
               np.minimum(bounds[a]["sample"][1], bounds[b]["sample"][1]))

    def joint_range(j):
        ends = []
        for sign in (1.0, -1.0):
            c = np.zeros(4 * cols)
            c[j] = sign
            res = linprog(c, A_ub=A_ub, b_ub=b_ub, A_eq=A_eq, b_eq=np.zeros(A_eq.shape[0]), bounds=box,
                          method="highs")
            assert res.status == 0, res.message
            ends.append(res.x[j])
        return ends

    withheld = {ind: (pub[ind]["status"] == "suppressed").to_numpy() for ind in (a, b)}
    confidential = {ind: pub[ind]["reasons"].fillna("").str.contains("few_respondents").to_numpy() for ind in (a, b)}
    assert (withheld[a] == withheld[b])[confidential[a] | confidential[b]].all()  # withheld in both
    A = abs(M)
    one_only = (withheld[a] != withheld[b]).astype(float)
    beside = np.asarray((A.T @ (A @ one_only)) > 0).ravel()
    # the other row withheld for no reason of its own (published, or complementary): the cells a
    # pattern chosen one indicator at a time would leave with their sample size printed
    for_others = {ind: ~withheld[ind] | (pub[ind]["reasons"].fillna("") == "complementary").to_numpy()
                  for ind in (a, b)}
    rng = np.random.default_rng(7)
    checked = 0
    for k, ind in enumerate((a, b)):
        other = b if ind == a else a
        mine_only = np.flatnonzero(confidential[ind] & for_others[other])
        near = np.flatnonzero(confidential[ind] & beside)
        pick = np.unique(np.r_[rng.choice(mine_only, size=min(4, len(mine_only)), replace=False),
                               rng.choice(near, size=min(4, len(near)), replace=False)]).astype(int)
        n, x = truth[ind]["sample_size"].to_numpy(), truth[ind]["respondents"].to_numpy()
        for i in pick:
            for name in protected_sides(n[i], x[i]):
                lo, hi = joint_range(2 * k * cols + (i if name == "count" else cols + i))
                value, need = side_level(truth[ind], i, name)
                assert lo - 1e-6 <= value <= hi + 1e-6
                assert hi - lo >= need * (1 - 1e-7), (ind, pub[ind].loc[i, "geo_code"], name, lo, hi, need)
            lo, hi = reader_range(M, samples, i)
            assert lo - 1e-9 <= n[i] <= hi + 1e-9 and hi - lo >= K - 1e-7, (ind, i, "sample", lo, hi)
            checked += 1
    assert checked >= 12


def printed_in_another(release) -> tuple[set, int]:
    """Counted again from the files: the groups of indicators whose internal sample sizes agree
    cell by cell, and the confidential cells withheld in one of them whose row another publishes."""
    cells, public = release["cells"], release["public_csv"]
    key = ["geo_level", "geo_code", "sex", "age_group"]
    table = cells.assign(withheld=(public["status"] == "suppressed").to_numpy(),
                         confidential=(cells["rule_few_respondents"] | cells["rule_unanimous"]).to_numpy())
    by = {ind: t.set_index(key).sort_index() for ind, t in table.groupby("indicator")}
    printed, groups = 0, set()
    for a, ta in by.items():
        same = frozenset(b for b, tb in by.items() if ta["sample_size"].equals(tb["sample_size"]))
        if len(same) > 1:
            groups.add(same)
        shown = np.zeros(len(ta), dtype=bool)
        for b in same - {a}:
            shown |= ~by[b]["withheld"].to_numpy()
        printed += int((ta["confidential"].to_numpy() & ta["withheld"].to_numpy() & shown).sum())
    return groups, printed


def test_manifest_names_the_indicators_protected_together_and_none_prints_anothers_confidential_cell(
        full_release):
    groups, printed = printed_in_another(full_release)
    reported = full_release["manifest"]["disclosure"]["audit"]["indicators_over_the_same_persons"]
    assert {frozenset(g) for g in reported["groups"]} == groups and groups and reported["protected"] == "together"
    assert reported["confidential_cells_printed_in_another"] == printed == 0
    indicators = full_release["manifest"]["disclosure"]["indicators"]
    for group in groups:
        for ind in group:
            assert set(indicators[ind]["protected_with"]) == group - {ind}


def test_protected_apart_the_release_counts_the_sample_sizes_it_prints_and_says_so(tmp_path_factory, full_release):
    # the office's choice (disclosure.same_persons: apart): each indicator on its own, fewer cells
    # withheld, and the sample sizes of confidential cells printed in the partner's row, counted
    settings = demo_settings()
    settings["disclosure"]["same_persons"] = "apart"
    release = make_release(tmp_path_factory.mktemp("apart"), full_release["demo"], settings)
    groups, printed = printed_in_another(release)
    disclosure = release["manifest"]["disclosure"]
    reported = disclosure["audit"]["indicators_over_the_same_persons"]
    assert {frozenset(g) for g in reported["groups"]} == groups and reported["protected"] == "apart"
    assert reported["confidential_cells_printed_in_another"] == printed > 0
    assert disclosure["complementary_cells"] < full_release["manifest"]["disclosure"]["complementary_cells"]
    assert not any("protected_with" in v for v in disclosure["indicators"].values())
    meta = json.loads((release["dir"] / "public" / "metadata.json").read_text())
    assert "same_persons: apart" in " ".join(meta["cautions"])


def test_all_or_none_cells_alone_get_complements_and_pass_the_independent_audit(tmp_path_factory, small_demo):
    """The unanimous rule on its own (threshold rule off: min_respondents 0), 5 persons' worth of
    protection: cells where nobody, or everybody, has the characteristic are protected like any
    other confidential cell, complements included."""
    settings = demo_settings()
    settings["disclosure"].update(min_respondents=0, protection={"respondents": K})
    release = make_release(tmp_path_factory.mktemp("unanimous"), small_demo, settings)
    assert release["manifest"]["disclosure"]["complementary_cells"] > 0

    rng = np.random.default_rng(5)

    def pick(pub, truth, M, primary, beside):
        others = np.flatnonzero(primary & ~beside)
        return list(np.flatnonzero(primary & beside)[:12]) + list(rng.choice(others, size=min(5, len(others)),
                                                                             replace=False))

    found = [check_protected(release, ind, pick, k=0) for ind in ["smoker", "chronic_condition", "addiction_treatment"]]
    checked, count, complement, nobody = np.sum(found, axis=0)
    # one side per cell, held by nobody; cells where none have it and cells where all have it
    assert checked >= 20 and count + complement == nobody == checked and count > 0 and complement > 0


def test_without_complementary_cells_a_confidential_cell_would_be_recoverable(release):
    """The check above can fail: publish the complementary cells again (their true figures, as the
    internal file holds them) and some confidential cell's range collapses below its level."""
    public, cells = release["public_csv"].copy(), release["cells"]
    comp = public["reasons"].fillna("").str.contains("complementary").to_numpy()
    assert comp.any()
    indicator = public.loc[comp, "indicator"].value_counts().idxmax()
    rows = np.flatnonzero((public["indicator"] == indicator).to_numpy())
    pub, truth = public.iloc[rows].reset_index(drop=True), cells.iloc[rows].reset_index(drop=True)
    back = pub["reasons"].fillna("").str.contains("complementary").to_numpy()
    pub.loc[back, "status"] = "published"
    pub.loc[back, "weighted_count"] = np.floor(truth.loc[back, "weighted_count"] / STEP + 0.5) * STEP
    pub.loc[back, "weighted_base"] = np.floor(truth.loc[back, "weighted_base"] / STEP + 0.5) * STEP
    pub.loc[back, "estimate"] = np.floor(truth.loc[back, "estimate"] * 10 ** DECIMALS + 0.5) / 10 ** DECIMALS
    pub.loc[back, "sample_size"] = truth.loc[back, "sample_size"]
    M = reader_relations(pub, release["lookup"])
    bounds = reader_bounds(pub)
    A = abs(M)
    beside = np.flatnonzero(np.asarray((A.T @ (A @ back.astype(float))) > 0).ravel()
                            & pub["reasons"].fillna("").str.contains("few_respondents").to_numpy())
    short = 0
    for i in beside[:40]:
        n, x = truth.loc[i, "sample_size"], truth.loc[i, "respondents"]
        for name, persons in (("count", x), ("complement", n - x)):
            if 0 < persons < K:
                lo, hi = reader_range(M, bounds[name], i)
                short += hi - lo < side_level(truth, i, name)[1]
        lo, hi = reader_range(M, bounds["sample"], i)
        short += hi - lo < K
    assert short > 0


def test_every_figure_of_a_hidden_row_is_empty_in_parquet_and_csv(release):
    est = pd.read_parquet(release["dir"] / "public" / "estimates.parquet")
    hidden = (est["status"] == "suppressed").to_numpy()
    comp = est["reasons"].fillna("").str.contains("complementary").to_numpy()
    assert comp.any() and hidden[comp].all()
    assert est.loc[hidden, FIGURE_COLUMNS].isna().all().all()
    with open(release["dir"] / "public" / "estimates.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    for row, is_hidden in zip(rows, hidden):
        if is_hidden:
            assert all(row[c] == "" for c in FIGURE_COLUMNS), row
    assert sum(r["status"] == "suppressed" for r in rows) == int(hidden.sum())


def test_metadata_holds_no_cell_values(release):
    text = (release["dir"] / "public" / "metadata.json").read_text()
    cells = release["cells"]
    # no unit code below the nation, and none of the weighted counts of a withheld cell, in any
    # form a writer might print it (5+ digits: shorter numbers, such as the years of the cited
    # sources, would match by chance)
    for code in release["lookup"]["area_code"].tolist() + release["lookup"]["district_code"].tolist():
        assert f'"{code}"' not in text, code
    hidden = cells[cells["status"] == "suppressed"]
    numbers = set(re.findall(r"\d+(?:\.\d+)?", text))
    checked = 0
    for value in hidden["weighted_count"]:
        if value >= 10_000:
            checked += 1
            for form in (f"{value:.0f}", f"{value:.1f}", f"{np.floor(value / STEP + 0.5) * STEP:.0f}"):
                assert form not in numbers, form
    assert checked > 10
    meta = json.loads(text)
    assert "complementary" in meta["reason_codes"] and "audit" in meta["method"]["disclosure"]


def test_cells_carry_the_audit_and_the_manifest_its_summary(release):
    cells, manifest = release["cells"], release["manifest"]
    summary = manifest["disclosure"]
    primary = (cells["rule_few_respondents"] | cells["rule_unanimous"]).to_numpy()
    comp = cells["rule_complementary"].to_numpy()
    assert summary["complementary_suppression"] is True
    assert summary["primary_cells"] == int(primary.sum()) > 0
    assert summary["complementary_cells"] == int(comp.sum()) == summary["information_lost"]["cells"]
    assert summary["audit"]["result"] == "passed"
    assert set(summary["indicators"]) == set(cells["indicator"])
    assert cells.loc[comp, "reasons"].str.contains("complementary").all()
    assert cells.loc[primary, "audit_ok"].eq(True).all() and cells.loc[~primary, "audit_ok"].isna().all()
    # the proven range holds the truth and is as wide as required, for every protected side
    p = cells[primary]
    few_have = (p["respondents"] > 0) & (p["respondents"] < K)
    lo, hi, value = p["audit_lower"], p["audit_upper"], p["weighted_count"]
    need = np.maximum(RELATIVE * value, K * p["weighted_base"] / p["sample_size"])
    assert ((lo[few_have] <= value[few_have] + 1e-6) & (value[few_have] <= hi[few_have] + 1e-6)).all()
    assert (hi - lo)[few_have].ge(need[few_have] * (1 - 1e-7)).all()
    assert (p["audit_sample_upper"] - p["audit_sample_lower"]).ge(K - 1e-7).all()
    # every withheld cell (primary, complementary or unreliable) has its range bracketed: the truth
    # within the values proven possible, those within the bounds a reader can work out; published
    # cells have none. Except the counts of a cell withheld as unreliable whose row another indicator
    # over the same persons publishes (taken as known: no range; its sample size is printed there)
    withheld = cells["status"].eq("suppressed") & cells["sample_size"].gt(0)
    key = ["geo_level", "geo_code", "sex", "age_group"]
    elsewhere = np.zeros(len(cells), dtype=bool)
    same_persons_summary = summary["audit"]["indicators_over_the_same_persons"]
    for group in same_persons_summary["groups"]:
        shown = cells[cells["indicator"].isin(group) & cells["status"].ne("suppressed")][key].drop_duplicates()
        mine = cells["indicator"].isin(group).to_numpy()
        elsewhere |= mine & cells[key].merge(shown, how="left", indicator=True)["_merge"].eq("both").to_numpy()
    elsewhere &= withheld.to_numpy()
    assert elsewhere.sum() == same_persons_summary["unreliable_cells_published_in_another"] > 0
    assert cells.loc[elsewhere, ["audit_lower", "audit_complement_lower"]].isna().all().all()
    assert cells.loc[elsewhere, "audit_sample_lower"].eq(cells.loc[elsewhere, "sample_size"]).all()
    for value_col, (lo_c, hi_c, out_lo, out_hi), audited in (
            ("weighted_count", ("audit_lower", "audit_upper", "audit_outer_lower", "audit_outer_upper"),
             withheld & ~elsewhere),
            ("sample_size", ("audit_sample_lower", "audit_sample_upper", "audit_sample_outer_lower",
                             "audit_sample_outer_upper"), withheld)):
        w = cells[audited]
        tol = 1e-6 * np.maximum(1.0, w[value_col].abs())
        assert w[[lo_c, hi_c, out_lo, out_hi]].notna().all().all()
        assert (w[out_lo] <= w[lo_c] + tol).all() and (w[lo_c] <= w[value_col] + tol).all()
        assert (w[value_col] <= w[hi_c] + tol).all() and (w[hi_c] <= w[out_hi] + tol).all()
        assert cells.loc[cells["status"].ne("suppressed"), [lo_c, out_hi]].isna().all().all()
    ranges = summary["audit"]["ranges_of_withheld_cells"]
    assert ranges["weighted_count"]["withheld_cells"] == int((withheld & ~elsewhere).sum())


# --------------------------------------------------------------------------------------------
# Refusal, and complementary suppression switched off


def small_settings(**disclosure) -> dict:
    """One indicator, no breakdowns: a table of 336 cells, quick to protect."""
    settings = demo_settings()
    settings["indicators"] = {"smoker": settings["indicators"]["smoker"]}
    settings["tables"] = [{"by": []}]
    settings["disclosure"].update(disclosure)
    return settings


def test_a_release_whose_audit_fails_is_refused_naming_the_cells(project):
    # a protection level no pattern can reach: 10^6 times each value
    config = write_config(project / "configs" / "strict.yaml", small_settings(protection={"relative": 1e6}))
    out = project / "data" / "out"
    with pytest.raises(ReleaseRefused) as info:
        run(config, release_id="strict")
    assert info.value.exit_code == 4  # DESIGN §3: release refused
    assert "disclosure audit failed" in info.value.message
    assert info.value.problems and "smoker" in info.value.problems[0]
    assert not (out / "strict").exists() and not (out / "latest").exists()


def test_switched_off_no_cell_is_added_and_the_release_says_so(project):
    config = write_config(project / "configs" / "off.yaml", small_settings(complementary=False))
    summary = run(config, release_id="off")
    cells = pd.read_parquet(summary.release_dir / "internal" / "cells.parquet")
    meta = json.loads((summary.release_dir / "public" / "metadata.json").read_text())
    manifest = json.loads((summary.release_dir / "manifest.json").read_text())
    assert not cells["rule_complementary"].any() and cells["audit_ok"].isna().all()
    assert manifest["disclosure"]["complementary_suppression"] is False
    assert any("switched off" in c for c in meta["cautions"])
