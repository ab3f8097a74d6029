"""Taylor-linearization variance end to end: config, ingest checks, per-cluster sums in aggregate,
the roll-up, and the estimate stage.

The yardsticks, each named beside its check:
* the published identity (DESIGN §4): equal weights, one stratum, each record its own cluster
  gives p̂q̂/(n − 1);
* a deliberately naive implementation written here from the defining formulas (Woodruff 1971,
  JASA 66:411; Binder 1983, Int. Statistical Review 51:279): a linearized value u_i for EVERY
  record (zero outside the cell), summed cluster by cluster in Python loops, then
  Σ_h (1 − f_h)·n_h/(n_h − 1)·Σ_i (u_hi − ū_h)². It shares no code with the pipeline, so it
  guards the additive roll-up and the rule that domains are never subset;
* the collapsed-strata and grand-mean rules for strata with one cluster, written out by hand
  (collapsed strata: Wolter 2007, Introduction to Variance Estimation, 2nd ed., ch. 2);
* degrees of freedom counted with pandas group-bys (clusters − strata holding records of a cell);
* the replicate (successive difference, Fay & Train 1995) standard errors of the same demo sample.
Inputs are invented; no expected value comes from the pipeline itself.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import yaml

from pipeline import runner
from pipeline.config import load_config
from pipeline.errors import ConfigError, InputDataError
from pipeline.metadata import build_metadata
from pipeline.methods.variance import linearization_variance
from pipeline.stages import aggregate, derive, estimate
from tests.conftest import ROOT, demo_settings, write_config

AREAS = {"A1": "R1", "A2": "R1", "A3": "R2", "A4": "R2"}


# --------------------------------------------------------------------------------------------
# The naive reference


def naive_variance(records: pd.DataFrame, in_cell: np.ndarray, *, fpc: bool = False,
                   single: str = "error", merge: dict | None = None, skip: tuple = ()) -> float:
    """v(p̂) for one cell, straight from the definition. records: stratum, psu, w, y (0/1; NaN
    allowed outside the cell) and N (clusters in the stratum's population). in_cell: the cell's
    base records (universe, answered, geography and domain). merge: stratum -> merged stratum
    (hand-collapsed strata). skip: strata whose contribution is left out."""
    stratum = records["stratum"].map(merge).to_numpy() if merge else records["stratum"].to_numpy()
    # a cluster is a (stratum, cluster code) pair: codes may repeat across strata
    psu = (records["stratum"].astype(str) + "/" + records["psu"].astype(str)).to_numpy()
    w = records["w"].to_numpy(dtype=float)
    y = records["y"].fillna(0).to_numpy(dtype=float)
    big_w = w[in_cell].sum()
    p_hat = (w * y)[in_cell].sum() / big_w
    u = np.where(in_cell, w * (y - p_hat) / big_w, 0.0)  # every record; 0 outside the cell
    population = records.groupby("stratum")["N"].first()
    totals, big_n = {}, {}
    for h in sorted(set(stratum)):
        in_h = stratum == h
        totals[h] = [u[in_h & (psu == c)].sum() for c in sorted(set(psu[in_h]))]
        big_n[h] = sum(population[s] for s in set(records["stratum"].to_numpy()[in_h]))
    every = [t for ts in totals.values() for t in ts]
    grand_mean = sum(every) / len(every)
    v = 0.0
    for h, ts in totals.items():
        n_h = len(ts)
        keep = 1.0 - n_h / big_n[h] if fpc else 1.0
        if h in skip:
            continue
        if n_h == 1:
            if single == "skip":
                continue
            if single == "grand_mean":
                v += keep * (ts[0] - grand_mean) ** 2
                continue
            raise AssertionError(f"stratum {h} has one cluster")
        mean = sum(ts) / n_h
        v += keep * n_h / (n_h - 1) * sum((t - mean) ** 2 for t in ts)
    return v


def naive_subset_variance(records: pd.DataFrame, in_cell: np.ndarray) -> float:
    """The WRONG way: keep only the cell's records, then apply the formula (clusters without a
    record of the cell vanish from n_h and from the stratum means)."""
    sub = records[in_cell]
    return naive_variance(sub, np.ones(len(sub), dtype=bool))


# --------------------------------------------------------------------------------------------
# Small invented designs written as a project on disk


def random_design(seed: int, cluster_counts=(3, 4, 2, 5, 3), *, spread=True) -> pd.DataFrame:
    """Strata s1.. with the given numbers of clusters, numbered 1..n_h inside each stratum (so
    cluster codes repeat across strata); each cluster in one area; 4-14 records per cluster
    with both sexes, ages 0-89, unequal weights, a cluster effect on y and some missing y.
    spread=False puts the clusters of a stratum in one region only."""
    rng = np.random.default_rng(seed)
    rows = []
    rid = 0
    for h, n_h in enumerate(cluster_counts):
        big_n = n_h + int(rng.integers(0, 8))
        for c in range(1, n_h + 1):
            area = (list(AREAS)[rng.integers(4)] if spread else ["A1", "A3"][h % 2])
            effect = rng.normal(0.0, 1.0)
            for _ in range(int(rng.integers(4, 15))):
                rid += 1
                y = float(rng.random() < 1.0 / (1.0 + np.exp(-effect)))
                rows.append({"rid": rid, "area": area, "stratum": f"s{h + 1}", "psu": c, "N": big_n,
                             "w": float(rng.lognormal(3.0, 0.5)), "sex": int(rng.integers(1, 3)),
                             "age": int(rng.integers(0, 90)),
                             "y": np.nan if rng.random() < 0.05 else y})
    frame = pd.DataFrame(rows)
    frame["y"] = frame["y"].astype("Int64")
    return frame


def settings_for(lin: dict | None, *, variance: str = "linearization", batch_rows: int = 37) -> dict:
    design = {"weight": "w", "variance": variance}
    if lin is not None:
        design["linearization"] = lin
    return {
        "release": {"name": "lin-test", "title": "t", "publisher": "p"},
        "source": {"path": "micro.parquet", "record_id": "rid", "batch_rows": batch_rows,
                   "variables": {"sex": {"type": "integer", "values": [1, 2]},
                                 "age": {"type": "integer", "min": 0, "max": 110},
                                 "y": {"type": "integer", "values": [0, 1], "missing": "allowed"}}},
        "geography": {"lookup": "areas.csv", "key": "area",
                      "levels": [{"level": "nation", "code": "nation_code", "name": "nation_name"},
                                 {"level": "region", "code": "region_code", "name": "region_name"},
                                 {"level": "area", "code": "area_code", "name": "area_name"}]},
        "design": design,
        "domains": {"sex": {"column": "sex", "categories": {1: "Male", 2: "Female"}}},
        "tables": [{"by": []}, {"by": ["sex"]}],
        "indicators": {"has_y": {"label": "y among persons 15+", "universe": "age >= 15", "condition": "y == 1"}},
        "output": {"dir": "out"},
    }


FULL = {"strata": "stratum", "clusters": "psu", "population_clusters": "N"}


def write_project(folder, records: pd.DataFrame, lin: dict | None = FULL, **kwargs):
    folder.mkdir(parents=True, exist_ok=True)
    records.to_parquet(folder / "micro.parquet", index=False)
    pd.DataFrame({"nation_code": "N", "nation_name": "Nation", "region_code": list(AREAS.values()),
                  "region_name": list(AREAS.values()), "area_code": list(AREAS),
                  "area_name": list(AREAS)}).to_csv(folder / "areas.csv", index=False)
    return write_config(folder / "config.yaml", settings_for(lin, **kwargs))


def estimates(config_path, *, split: bool = False) -> pd.DataFrame:
    """The pipeline's stages: ingest (with its design checks) -> derive -> aggregate -> roll-up
    -> estimate. split=True accumulates alternate batches in two accumulators and merges them,
    as separate machines would."""
    config = load_config(config_path)
    layout = derive.domain_layout(config)
    accumulators: list[aggregate.CellAccumulator] = []
    seen = [0]

    def add(frame, geography):
        if not accumulators:
            accumulators.extend(aggregate.CellAccumulator(
                indicators=len(config.indicators), cells=len(geography.finest_codes) * layout.n_cells,
                replicates=0) for _ in range(2))
        accumulators[seen[0] % 2 if split else 0].add(derive.derive(config, frame, geography, layout))
        seen[0] += 1

    found = runner.check_inputs(config, on_batch=add)
    acc = accumulators[0]
    if split:
        acc.merge(accumulators[1])
    return estimate.estimate(aggregate.roll_up(acc, config, found.geography, layout), config)


def cell(frame: pd.DataFrame, *, level="nation", code="N", sex="all") -> pd.Series:
    row = frame[(frame["geo_level"] == level) & (frame["geo_code"] == code) & (frame["sex"] == sex)]
    assert len(row) == 1
    return row.iloc[0]


def in_cell(records: pd.DataFrame, *, region=None, area=None, sex=None) -> np.ndarray:
    """Base of indicator has_y (age >= 15, y answered) within a geography and domain."""
    mask = (records["age"] >= 15) & records["y"].notna()
    if region is not None:
        mask &= records["area"].map(AREAS) == region
    if area is not None:
        mask &= records["area"] == area
    if sex is not None:
        mask &= records["sex"] == {"Male": 1, "Female": 2}[sex]
    return mask.to_numpy(dtype=bool)


CELLS = [  # (description, pipeline cell, naive mask)
    ("whole sample", {}, {}),
    ("domain splitting clusters", {"sex": "Female"}, {"sex": "Female"}),
    ("geography level", {"level": "region", "code": "R2"}, {"region": "R2"}),
    ("geography x domain", {"level": "area", "code": "A1", "sex": "Male"}, {"area": "A1", "sex": "Male"}),
]


# --------------------------------------------------------------------------------------------
# Identity and the naive reference


def test_identity_equal_weights_one_stratum_each_record_its_own_cluster(tmp_path):
    # DESIGN §4 identity: equal weights, one stratum, each record its own cluster ->
    # v = p̂q̂/(n − 1), exactly (here through the whole stage chain, with no strata column).
    rng = np.random.default_rng(5)
    n = 240
    records = pd.DataFrame({"rid": np.arange(1, n + 1), "area": rng.choice(list(AREAS), n),
                            "stratum": "x", "psu": np.arange(1, n + 1), "N": 1, "w": 7.0,
                            "sex": rng.integers(1, 3, n), "age": rng.integers(15, 90, n),
                            "y": pd.array(rng.integers(0, 2, n), dtype="Int64")})
    out = estimates(write_project(tmp_path, records, {"clusters": "psu"}))
    row = cell(out)
    p = records["y"].astype(float).mean()
    assert row["sample_size"] == n
    assert row["variance"] == pytest.approx(p * (1 - p) / (n - 1), rel=1e-12, abs=0)
    assert row["degrees_of_freedom"] == n - 1  # n clusters − 1 stratum


@pytest.mark.parametrize("fpc", [False, True], ids=["no_fpc", "fpc"])
def test_pipeline_equals_naive_definition(tmp_path, fpc):
    records = random_design(11)
    lin = FULL if fpc else {"strata": "stratum", "clusters": "psu"}
    out = estimates(write_project(tmp_path, records, lin))
    for name, where, mask in CELLS:
        expected = naive_variance(records, in_cell(records, **mask), fpc=fpc)
        assert cell(out, **where)["variance"] == pytest.approx(expected, rel=1e-10), name


def test_merged_accumulators_equal_one_accumulator(tmp_path):
    # Cell statistics are additive (DESIGN §2): batches summed on two "machines" and merged give
    # the same variances, although the two saw their clusters in a different order.
    records = random_design(12).sample(frac=1.0, random_state=3)  # clusters spread over batches
    path = write_project(tmp_path, records)
    one, two = estimates(path), estimates(path, split=True)
    np.testing.assert_allclose(two["variance"], one["variance"], rtol=1e-12, atol=0)
    for name, where, mask in CELLS:
        expected = naive_variance(records, in_cell(records, **mask), fpc=True)
        assert cell(two, **where)["variance"] == pytest.approx(expected, rel=1e-10), name


def test_domains_are_not_subset(tmp_path):
    # Each stratum's clusters sit in one region (spread=False), strata alternate between regions,
    # and the 'Female' domain inside R1 still has clusters of a stratum without any record of it
    # once records are thinned; the subset computation drops those clusters from n_h.
    records = random_design(13, cluster_counts=(4, 3, 5, 4), spread=False)
    # remove the women of two clusters of s1, so those clusters hold no record of the domain
    drop = (records["stratum"] == "s1") & records["psu"].isin([1, 2]) & (records["sex"] == 2)
    records = records[~drop].reset_index(drop=True)
    out = estimates(write_project(tmp_path, records))
    mask = in_cell(records, sex="Female", region="R1")
    right = naive_variance(records, mask, fpc=False)
    wrong = naive_subset_variance(records, mask)
    assert abs(wrong - right) > 0.05 * right  # the two definitions really differ here
    lin = estimates(write_project(tmp_path / "nofpc", records, {"strata": "stratum", "clusters": "psu"}))
    got = cell(lin, level="region", code="R1", sex="Female")["variance"]
    assert got == pytest.approx(right, rel=1e-10)
    assert got != pytest.approx(wrong, rel=1e-3)
    assert cell(out, level="region", code="R1", sex="Female")["variance"] == pytest.approx(
        naive_variance(records, mask, fpc=True), rel=1e-10)


def test_degrees_of_freedom_are_clusters_minus_strata_of_the_cell(tmp_path):
    records = random_design(14)
    out = estimates(write_project(tmp_path, records))
    base = records[in_cell(records)].assign(region=lambda f: f["area"].map(AREAS))
    expected = []
    for level, key in (("nation", None), ("region", "region"), ("area", "area")):
        for sex_label, sex_code in (("all", None), ("Male", 1), ("Female", 2)):
            part = base if sex_code is None else base[base["sex"] == sex_code]
            groups = part.groupby(key) if key else [("N", part)]
            for code, g in groups:
                clusters = len(g[["stratum", "psu"]].drop_duplicates())
                strata = g["stratum"].nunique()
                expected.append((level, code, sex_label, max(clusters - strata, 1)))
    assert len(expected) > 10
    for level, code, sex_label, df in expected:
        assert cell(out, level=level, code=code, sex=sex_label)["degrees_of_freedom"] == df, (level, code, sex_label)


# --------------------------------------------------------------------------------------------
# Strata with one cluster


def one_lone_stratum(seed: int, lone: str = "s3") -> pd.DataFrame:
    counts = {"s1": 3, "s2": 4, "s3": 2, "s4": 3}
    counts[lone] = 1
    return random_design(seed, tuple(counts.values()))


def test_single_cluster_error_names_the_stratum(tmp_path):
    records = one_lone_stratum(21)
    config = load_config(write_project(tmp_path, records, {**FULL, "single_cluster_strata": "error"}))
    with pytest.raises(InputDataError) as caught:
        runner.check_inputs(config)
    assert "'s3' has one sampled cluster" in str(caught.value)
    assert caught.value.exit_code == 3
    # the math alone refuses too, naming the stratum by its code
    with pytest.raises(ValueError, match="'b' has one sampled cluster"):
        linearization_variance(np.ones((1, 3)), np.ones((1, 3)), cluster_stratum=[0, 0, 1], stratum_labels=["a", "b"])


def test_single_cluster_skip_leaves_the_stratum_out(tmp_path):
    records = one_lone_stratum(22)
    path = write_project(tmp_path, records, {**FULL, "single_cluster_strata": "skip"})
    out = estimates(path)
    for name, where, mask in CELLS:
        expected = naive_variance(records, in_cell(records, **mask), fpc=True, skip=("s3",))
        assert cell(out, **where)["variance"] == pytest.approx(expected, rel=1e-10), name
    assert "understated" in build_metadata(load_config(path), ["sex"])["method"]["variance"]


def test_single_cluster_grand_mean(tmp_path):
    records = one_lone_stratum(23)
    out = estimates(write_project(tmp_path, records, {**FULL, "single_cluster_strata": "grand_mean"}))
    for name, where, mask in CELLS:
        expected = naive_variance(records, in_cell(records, **mask), fpc=True, single="grand_mean")
        assert cell(out, **where)["variance"] == pytest.approx(expected, rel=1e-10), name
        # the lone cluster's term is there: more than the variance that skips it
        without = naive_variance(records, in_cell(records, **mask), fpc=True, skip=("s3",))
        if (records[in_cell(records, **mask)]["stratum"] == "s3").any():
            assert cell(out, **where)["variance"] > without, name


@pytest.mark.parametrize("lone, merged", [
    ("s3", {"s1": "s1", "s2": "s2", "s3": "s3+s4", "s4": "s3+s4"}),  # with the next stratum
    ("s4", {"s1": "s1", "s2": "s2", "s3": "s3+s4", "s4": "s3+s4"}),  # the last: with the previous
    ("s1", {"s1": "s1+s2", "s2": "s1+s2", "s3": "s3", "s4": "s4"}),
])
def test_single_cluster_collapse_with_neighbour(tmp_path, lone, merged):
    records = one_lone_stratum(24, lone)
    out = estimates(write_project(tmp_path, records, {**FULL, "single_cluster_strata": "collapse"}))
    for name, where, mask in CELLS:
        expected = naive_variance(records, in_cell(records, **mask), fpc=True, merge=merged)
        assert cell(out, **where)["variance"] == pytest.approx(expected, rel=1e-10), name


def test_collapse_chains_and_numeric_stratum_order():
    # strata 2, 10, 11 sort numerically as 2 < 10 < 11 (positions given in that order here);
    # lone clusters in the first two: 2 joins 10, 10 joins 11 -> one stratum of 4 clusters.
    a = np.array([[3.0, 1.0, 4.0, 0.0]])
    b = np.array([[5.0, 2.0, 6.0, 3.0]])
    got = linearization_variance(a, b, cluster_stratum=[0, 1, 2, 2], single_cluster_strata="collapse")
    one = linearization_variance(a, b, cluster_stratum=[0, 0, 0, 0])
    assert list(got.variance_stratum) == [0, 0, 0]
    assert got.variance[0] == pytest.approx(one.variance[0], rel=1e-14)


# --------------------------------------------------------------------------------------------
# First-stage finite population correction and the checks on N_h


def test_fpc_certainty_stratum_contributes_nothing(tmp_path):
    records = random_design(31)
    n_h = records.groupby("stratum")["psu"].nunique()
    records["N"] = records["stratum"].map(n_h * 1_000_000)  # effectively no correction elsewhere
    records.loc[records["stratum"] == "s2", "N"] = n_h["s2"]  # every cluster of s2 taken: f = 1
    out = estimates(write_project(tmp_path, records))
    for name, where, mask in CELLS:
        m = in_cell(records, **mask)
        expected = naive_variance(records, m, fpc=False, skip=("s2",))
        assert cell(out, **where)["variance"] == pytest.approx(expected, rel=1e-5), name
        assert cell(out, **where)["variance"] < naive_variance(records, m, fpc=False), name


def bad_population(kind: str) -> tuple[pd.DataFrame, str]:
    records = random_design(32)
    s2 = records.index[records["stratum"] == "s2"]
    n_s2 = records.loc[s2, "psu"].nunique()
    if kind == "varies":
        records.loc[s2[:2], "N"] = records.loc[s2[0], "N"] + 3
        return records, "stratum 's2' has different values"
    if kind == "too_small":
        records.loc[s2, "N"] = n_s2 - 1
        return records, f"stratum 's2' has N_h = {n_s2 - 1} but {n_s2} sampled clusters"
    records.loc[s2, "N"] = 0
    return records, "stratum 's2' has 0"


@pytest.mark.parametrize("kind", ["varies", "too_small", "not_positive"])
def test_population_clusters_problems_are_input_errors(tmp_path, kind):
    records, message = bad_population(kind)
    config = load_config(write_project(tmp_path, records))
    with pytest.raises(InputDataError) as caught:
        runner.check_inputs(config)
    assert message in str(caught.value)
    assert "design.linearization.population_clusters" in str(caught.value)


def test_missing_design_column_is_a_schema_error(tmp_path):
    records = random_design(33).drop(columns="psu")
    config = load_config(write_project(tmp_path, records))
    with pytest.raises(InputDataError, match=r"'psu' \(design.linearization.clusters\)"):
        runner.check_inputs(config)


def test_missing_cluster_code_rejects_the_row(tmp_path):
    records = random_design(34)
    records["psu"] = records["psu"].astype("Int64")
    records.loc[records.index[0], "psu"] = pd.NA
    settings = settings_for(FULL)
    settings["source"]["max_rejected_share"] = 0.1
    (tmp_path / "p").mkdir()
    write_project(tmp_path / "p", records)
    config = load_config(write_config(tmp_path / "p" / "config.yaml", settings))
    found = runner.check_inputs(config)
    assert found.rejected == 1
    assert found.rejects.iloc[0]["column"] == "psu" and found.rejects.iloc[0]["rule"] == "missing_not_allowed"


# --------------------------------------------------------------------------------------------
# Config


def config_problems(tmp_path, design: dict, variables: dict | None = None) -> str:
    settings = demo_settings()
    settings["design"] = design
    if variables:
        settings["source"]["variables"].update(variables)
    with pytest.raises(ConfigError) as caught:
        load_config(write_config(tmp_path / "c.yaml", settings))
    return str(caught.value)


def test_config_requires_the_section(tmp_path):
    text = config_problems(tmp_path, {"weight": "wt", "variance": "linearization"})
    assert "design.linearization: required when design.variance is 'linearization'" in text


def test_config_single_cluster_typo_gets_a_close_match(tmp_path):
    text = config_problems(tmp_path, {"weight": "wt", "variance": "linearization",
                                      "linearization": {"clusters": "psu", "single_cluster_strata": "colapse"}})
    assert "design.linearization.single_cluster_strata" in text and "did you mean 'collapse'?" in text


def test_config_section_refused_with_another_method_and_roles_are_exclusive(tmp_path):
    text = config_problems(tmp_path, {"weight": "wt", "variance": "kish", "linearization": {"clusters": "psu"}})
    assert "design.linearization: given but design.variance is 'kish'" in text
    text = config_problems(tmp_path, {"weight": "wt", "variance": "linearization",
                                      "linearization": {"strata": "person_id", "clusters": "wt",
                                                        "population_clusters": "age"}})
    assert "design.linearization.strata: column 'person_id' is already used as source.record_id" in text
    assert "design.linearization.clusters: column 'wt' is already used as design.weight" in text
    assert "design.linearization.population_clusters: column 'age' is also declared in source.variables" in text
    text = config_problems(tmp_path, {"weight": "wt", "variance": "linearization",
                                      "linearization": {"strata": "psu", "clusters": "psu"}})
    assert "design.linearization.clusters: column 'psu' is already used as design.linearization.strata" in text
    # strata may be the finest geographic units themselves (the geography key column)
    settings = demo_settings()
    settings["design"] = {"weight": "wt", "variance": "linearization",
                          "linearization": {"strata": "area", "clusters": "psu"}}
    load_config(write_config(tmp_path / "strata_are_areas.yaml", settings))


def test_demo_linearization_config_matches_the_demo_config():
    demo = demo_settings()
    lin = yaml.safe_load((ROOT / "configs" / "demo_linearization.yaml").read_text())
    assert lin["design"] == {"weight": "wt", "variance": "linearization",
                             "linearization": {"strata": "stratum", "clusters": "psu",
                                               "single_cluster_strata": "error"}}
    assert lin["release"]["name"] == "living-conditions-linearized"
    assert lin["estimation"]["interval"] == "korn_graubard" and lin["reliability"] == {"standard": "nchs_2017"}
    for section in demo:
        if section not in ("design", "release", "estimation", "reliability"):
            assert lin[section] == demo[section], section
    load_config(ROOT / "configs" / "demo_linearization.yaml")


# --------------------------------------------------------------------------------------------
# The demo survey through the whole pipeline


def demo_records(micro: pd.DataFrame, indicator: str) -> tuple[pd.DataFrame, pd.Series]:
    """(records for the naive formula, base mask) of a demo indicator, written out in pandas."""
    universe = {"no_internet": micro["age"] >= 0, "smoker": micro["age"] >= 15,
                "employed": micro["age"].between(15, 64), "home_owner": micro["age"] >= 0}[indicator]
    column, code = {"no_internet": ("internet", 3), "smoker": ("smoker", 1), "employed": ("employed", 1),
                    "home_owner": ("home_owner", 1)}[indicator]
    answered = micro[column].notna()
    records = pd.DataFrame({"stratum": micro["stratum"], "psu": micro["psu"], "w": micro["wt"],
                            "y": (micro[column] == code).astype(float).where(answered),
                            "N": micro["psu_count"]})
    return records, (universe & answered)


def test_demo_through_runner_equals_naive(project):
    settings = yaml.safe_load((ROOT / "configs" / "demo_linearization.yaml").read_text())
    settings["design"]["linearization"]["population_clusters"] = "psu_count"  # exercise the fpc too
    path = write_config(project / "configs" / "lin.yaml", settings)
    summary = runner.run(path, release_id="lin-check")
    cells = pd.read_parquet(summary.release_dir / "internal" / "cells.parquet")
    raw = project / "data" / "raw"
    micro = pd.read_parquet(raw / "demo_persons.parquet")
    lookup = pd.read_csv(raw / "demo_areas.csv", dtype=str).set_index("area_code")
    micro["region"] = lookup.loc[micro["area"], "region_code"].to_numpy()
    micro["district"] = lookup.loc[micro["area"], "district_code"].to_numpy()
    biggest_area = micro["area"].value_counts().index[0]
    district = micro["district"].value_counts().index[3]
    checks = [  # (indicator, level, code, sex, age group, domain mask)
        ("no_internet", "nation", "VL", "all", "all", micro["age"] >= 0),
        ("smoker", "district", district, "Female", "all", (micro["district"] == district) & (micro["sex"] == 2)),
        ("employed", "region", "R2", "all", "35-64", (micro["region"] == "R2") & micro["age"].between(35, 64)),
        ("home_owner", "area", biggest_area, "all", "all", micro["area"] == biggest_area),
    ]
    for indicator, level, code, sex, age, where in checks:
        records, base = demo_records(micro, indicator)
        mask = (base & where).to_numpy(dtype=bool)
        row = cells[(cells["indicator"] == indicator) & (cells["geo_level"] == level) & (cells["geo_code"] == code)
                    & (cells["sex"] == sex) & (cells["age_group"] == age)]
        assert len(row) == 1
        row = row.iloc[0]
        assert row["sample_size"] == mask.sum()
        assert row["variance"] == pytest.approx(naive_variance(records, mask, fpc=True), rel=1e-9), indicator
        held = micro[mask]
        df = max(len(held[["stratum", "psu"]].drop_duplicates()) - held["stratum"].nunique(), 1)
        assert row["degrees_of_freedom"] == df, indicator
    metadata = (summary.release_dir / "public" / "metadata.json").read_text()
    assert "Taylor linearization" in metadata and "psu_count" in metadata


def test_demo_population_clusters_column():
    # psu_count is N_h of the district (stratum): one value per stratum, at least the sampled blocks
    from pipeline.demo import generate_demo

    micro = generate_demo(persons=3000, seed=7).microdata
    g = micro.groupby("stratum").agg(values=("psu_count", "nunique"), big_n=("psu_count", "first"),
                                     sampled=("psu", "nunique"))
    assert (g["values"] == 1).all() and (g["big_n"] >= g["sampled"]).all()
    assert (g["big_n"] > g["sampled"]).any()


@pytest.fixture(scope="module")
def default_demo_releases(tmp_path_factory):
    """The 40,000-person default demo, released with the replicate and the linearization config."""
    from pipeline.demo import write_demo

    root = tmp_path_factory.mktemp("demo40k")
    write_demo(root / "data" / "raw", persons=40_000)
    (root / "configs").mkdir()
    out = {}
    for name in ("demo", "demo_linearization"):
        settings = yaml.safe_load((ROOT / "configs" / f"{name}.yaml").read_text())
        summary = runner.run(write_config(root / "configs" / f"{name}.yaml", settings), release_id=name)
        out[name] = pd.read_parquet(summary.release_dir / "internal" / "cells.parquet")
    return out


def test_replicate_and_linearization_agree_on_large_cells(default_demo_releases):
    # Both estimate the same design variance of the same sample, so their standard errors agree
    # up to: the first-stage fpc (applied by linearization, ignored by the successive-difference
    # replicates; f_h ≈ 0.22 here, so SE_rep/SE_lin ≈ 1/√0.78 ≈ 1.13 from it alone), the pairing
    # of neighbouring clusters by successive differences (Fay & Train 1995), and the replicated
    # non-response adjustment. A median outside 0.8-1.25 would mean a scale error in one of them.
    keys = ["indicator", "geo_level", "geo_code", "sex", "age_group"]
    both = default_demo_releases["demo"].merge(default_demo_releases["demo_linearization"], on=keys,
                                               suffixes=("_rep", "_lin"))
    large = both[(both["sample_size_rep"] >= 1000) & (both["std_error_lin"] > 0)]
    ratio = large["std_error_rep"] / large["std_error_lin"]
    assert len(large) > 100
    assert 0.8 <= ratio.median() <= 1.25, ratio.describe()
