"""Tests for pipeline.demo: the fictional population and survey.

The yardsticks are the demo specification (counts, codes, bands, cells) and
results from sampling theory, each named beside its check:
* Horvitz & Thompson (1952, JASA 47:663): with first-stage probabilities proportional to household
  counts and a fixed take per block, the weighted household count is exact (zero variance), and a
  ratio non-response adjustment within districts keeps each district's sum;
* Fay & Train (1995): replicate variance (4/R)·Σ_r (θ̂_r − θ̂)² for successive-difference
  replicates;
* the weighted estimator is design-unbiased, so estimates fall within a few standard errors of the
  truth (a normal-theory 4-SE bound fails with probability ~6e-5 per check).
One default-size generation is used where the specification asks for it; the rest use 3000 persons.
"""

from __future__ import annotations

import hashlib
import re

import numpy as np
import pandas as pd
import pytest

from pipeline.demo import DemoData, generate_demo, write_demo
from pipeline.methods.replicate_factors import successive_difference_factors

SMALL = 3000
DEFAULT_SEED = 20261202
R = 80
ITEMS = ["internet", "smoker", "employed", "home_owner", "housing_burden", "chronic",
         "unmet_care", "addiction_treatment"]
COLUMNS = (["person_id", "household_id", "area", "stratum", "psu", "psu_count", "wt", "sex", "age"] + ITEMS
           + [f"rw{r}" for r in range(1, R + 1)])
AREA_COLUMNS = ["nation_code", "nation_name", "region_code", "region_name", "district_code",
                "district_name", "area_code", "area_name", "population", "households"]

# From the specification: indicator -> (item column, code, min age, max age, prevalence band at nation).
INDICATOR_SPEC = {
    "no_internet": ("internet", 3, 0, 200, (0.08, 0.15)),
    "smoker": ("smoker", 1, 15, 200, (0.20, 0.30)),
    "employed": ("employed", 1, 15, 64, (0.55, 0.70)),
    "home_owner": ("home_owner", 1, 0, 200, (0.50, 0.65)),
    "housing_burden": ("housing_burden", 1, 0, 200, (0.25, 0.40)),
    "chronic_condition": ("chronic", 1, 0, 200, (0.15, 0.45)),
    "unmet_care": ("unmet_care", 1, 15, 200, (0.05, 0.12)),
    "addiction_treatment": ("addiction_treatment", 1, 15, 200, (0.01, 0.02)),
}
# From the specification: who each item applies to, for the item non-response shares.
ITEM_UNIVERSE = {"internet": (0, 200), "smoker": (15, 200), "housing_burden": (0, 200),
                 "unmet_care": (15, 200)}
HOUSEHOLD_ITEMS = ["internet", "home_owner", "housing_burden"]
SEX = ["Male", "Female"]
AGE = ["0-14", "15-34", "35-64", "65+"]


@pytest.fixture(scope="module")
def small() -> DemoData:
    return generate_demo(persons=SMALL, seed=DEFAULT_SEED)


@pytest.fixture(scope="module")
def default() -> DemoData:
    return generate_demo()  # the one default-size generation (40,000 persons)


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    dirs = [tmp_path_factory.mktemp(f"demo{i}") for i in range(2)]
    summaries = [write_demo(d, persons=SMALL, seed=DEFAULT_SEED, formats=("parquet", "csv"))
                 for d in dirs]
    return dirs, summaries


def _sha256(path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


# ---- determinism ---------------------------------------------------------------------------


def test_same_seed_gives_equal_frames(small):
    again = generate_demo(persons=SMALL, seed=DEFAULT_SEED)
    pd.testing.assert_frame_equal(small.microdata, again.microdata)
    pd.testing.assert_frame_equal(small.areas, again.areas)
    pd.testing.assert_frame_equal(small.truth, again.truth)


def test_writing_twice_gives_identical_bytes(written):
    (a, b), (sa, sb) = written
    names = sorted(p.name for p in a.iterdir())
    assert names == ["demo_areas.csv", "demo_persons.csv", "demo_persons.parquet",
                     "demo_truth.parquet"]  # and no temporary files left behind
    assert sorted(p.name for p in b.iterdir()) == names
    for name in names:
        assert _sha256(a / name) == _sha256(b / name), name
    assert sa.sampled_persons == sb.sampled_persons


def test_written_files_hold_the_generated_frames(written, small):
    (a, _), (summary, _) = written
    pd.testing.assert_frame_equal(pd.read_parquet(a / "demo_persons.parquet"), small.microdata)
    pd.testing.assert_frame_equal(pd.read_parquet(a / "demo_truth.parquet"), small.truth)
    areas = pd.read_csv(a / "demo_areas.csv")
    assert list(areas.columns) == AREA_COLUMNS
    assert areas["area_code"].tolist() == small.areas["area_code"].tolist()
    # CSV: nulls are empty fields, so the null pattern survives a plain CSV reader.
    csv = pd.read_csv(a / "demo_persons.csv")
    assert list(csv.columns) == COLUMNS
    for item in ITEMS:
        np.testing.assert_array_equal(csv[item].isna().to_numpy(),
                                      small.microdata[item].isna().to_numpy())
    np.testing.assert_array_equal(csv["wt"].to_numpy(), small.microdata["wt"].to_numpy())
    assert summary.sampled_persons == len(small.microdata)
    assert summary.areas == 300
    assert summary.population_persons == small.areas["population"].sum()


def test_parquet_only_is_the_default_format(tmp_path):
    summary = write_demo(tmp_path, persons=1000, seed=3)
    assert summary.persons_csv is None
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "demo_areas.csv", "demo_persons.parquet", "demo_truth.parquet"]


def test_different_seeds_differ(small):
    other = generate_demo(persons=SMALL, seed=DEFAULT_SEED + 1)
    assert not small.microdata.equals(other.microdata)
    assert not small.truth["population_count"].equals(other.truth["population_count"])
    assert not small.areas["population"].equals(other.areas["population"])
    # The map itself (codes and names) is fixed; only people and sample change with the seed.
    assert small.areas["area_name"].equals(other.areas["area_name"])


def test_population_does_not_depend_on_sample_size(small, default):
    pd.testing.assert_frame_equal(small.truth, default.truth)
    pd.testing.assert_frame_equal(small.areas, default.areas)


@pytest.mark.parametrize("kwargs, error, pattern", [
    (dict(persons=500), ValueError, r"persons \(500\) must be at least"),
    (dict(persons=10_000_000), ValueError, r"persons \(10000000\) must be at most"),
    (dict(seed=-1), ValueError, r"seed \(-1\)"),
    (dict(persons=3000.0), TypeError, r"persons"),
])
def test_bad_arguments_are_refused(kwargs, error, pattern):
    with pytest.raises(error, match=pattern):
        generate_demo(**kwargs)


def test_unknown_format_is_refused(tmp_path):
    with pytest.raises(ValueError, match=r"formats"):
        write_demo(tmp_path, persons=1000, formats=("xlsx",))
    assert not list(tmp_path.iterdir())  # refused before anything is written


# ---- geography -----------------------------------------------------------------------------


def test_geography_counts_codes_and_tree(small):
    areas = small.areas
    assert list(areas.columns) == AREA_COLUMNS
    # The specification: 1 nation, 5 regions, 30 districts, 300 areas, one row per area.
    assert areas["nation_code"].nunique() == 1 and areas["nation_code"].iloc[0] == "VL"
    assert sorted(areas["region_code"].unique()) == [f"R{i}" for i in range(1, 6)]
    assert sorted(areas["district_code"].unique()) == [f"D{i:02d}" for i in range(1, 31)]
    assert areas["area_code"].tolist() == [f"A{i:03d}" for i in range(1, 301)]
    # A proper tree: every child has exactly one parent, and each level's names follow codes.
    assert (areas.groupby("district_code")["region_code"].nunique() == 1).all()
    assert (areas.groupby("region_code")["nation_code"].nunique() == 1).all()
    for code, name in [("region_code", "region_name"), ("district_code", "district_name")]:
        assert (areas.groupby(code)[name].nunique() == 1).all()
        assert (areas.groupby(name)[code].nunique() == 1).all()
    # Unequal counts per region are fine, but every district has areas.
    assert areas.groupby("district_code").size().min() >= 1


def test_names_are_unique_invented_words(small):
    areas = small.areas
    names = (areas["region_name"].drop_duplicates().tolist()
             + areas["district_name"].drop_duplicates().tolist()
             + areas["area_name"].tolist())
    assert len(names) == 5 + 30 + 300
    assert len(set(names)) == len(names)  # unique across all levels
    for name in names + [areas["nation_name"].iloc[0]]:
        assert re.fullmatch(r"[A-Z][a-z]{3,}", name), name  # one alphabetic word, capitalised


def test_population_size_and_unequal_areas(small):
    areas = small.areas
    total = areas["population"].sum()
    assert 1_500_000 <= total <= 3_000_000  # the specification: 1.5-3 million persons
    assert (areas["households"] >= 1).all()
    # households of 1-7 persons
    assert (areas["population"] >= areas["households"]).all()
    assert (areas["population"] <= 7 * areas["households"]).all()
    # very unequal: lognormal-like spread
    assert areas["population"].max() / areas["population"].min() > 100


# ---- microdata -----------------------------------------------------------------------------


def test_microdata_columns_and_dtypes(small):
    m = small.microdata
    assert list(m.columns) == COLUMNS
    for col in ["person_id", "household_id", "psu", "psu_count"]:
        assert m[col].dtype == np.int64, col
    for col in ["wt"] + [f"rw{r}" for r in range(1, R + 1)]:
        assert m[col].dtype == np.float64, col
    for col in ["sex", "age"]:
        assert pd.api.types.is_integer_dtype(m[col]) and not m[col].isna().any(), col
    for col in ITEMS:  # nullable integer, so nulls survive to Parquet
        assert isinstance(m[col].dtype, pd.core.arrays.integer.IntegerDtype), col
    assert pd.api.types.is_string_dtype(m["area"]) and pd.api.types.is_string_dtype(m["stratum"])


def test_microdata_values_and_structure(small):
    m = small.microdata
    assert m["person_id"].is_unique
    assert set(m["sex"].unique()) <= {1, 2}
    assert m["age"].between(0, 110).all()
    assert set(m["internet"].dropna().unique()) <= {1, 2, 3}
    for col in ITEMS[1:]:
        assert set(m[col].dropna().unique()) <= {1, 2}, col
    # Structural nulls from the specification: smoker etc. only 15+, employed only 15-64.
    child = m["age"] < 15
    for col in ["smoker", "unmet_care", "addiction_treatment"]:
        assert m.loc[child, col].isna().all(), col
    assert m.loc[(m["age"] < 15) | (m["age"] > 64), "employed"].isna().all()
    # Nesting: person in one household, household in one cluster, cluster in one area,
    # area in its lookup district (the stratum).
    assert (m.groupby("household_id")["psu"].nunique() == 1).all()
    assert (m.groupby("psu")["area"].nunique() == 1).all()
    lookup = small.areas.set_index("area_code")["district_code"]
    assert (m["stratum"].to_numpy() == lookup.loc[m["area"]].to_numpy()).all()
    # Household-level items are the same for everyone in the household (where answered).
    for col in HOUSEHOLD_ITEMS:
        assert (m.groupby("household_id")[col].nunique() <= 1).all(), col
    # Stratified design: every stratum keeps at least 2 clusters.
    assert m.groupby("stratum")["psu"].nunique().min() >= 2


def test_weights_positive_finite_and_per_household(small):
    m = small.microdata
    assert np.isfinite(m["wt"]).all() and (m["wt"] > 0).all()
    assert (m.groupby("household_id")["wt"].nunique() == 1).all()  # household weights


def test_weighted_households_equal_population_households_per_district(small):
    # Horvitz & Thompson (1952): first stage with π ∝ households and a fixed take per block gives
    # an exact household count; the non-response ratio adjustment within the district keeps it.
    m = small.microdata.drop_duplicates("household_id")
    estimated = m.groupby("stratum")["wt"].sum()
    true = small.areas.groupby("district_code")["households"].sum()
    np.testing.assert_allclose(estimated.sort_index().to_numpy(), true.sort_index().to_numpy(),
                               rtol=1e-9)


def _sdr_se(values: np.ndarray, full: float) -> float:
    # Fay & Train (1995): v = (4/R)·Σ_r (θ̂_r − θ̂)².
    return float(np.sqrt(4.0 / R * ((values - full) ** 2).sum()))


def test_weighted_persons_close_to_population(small, default):
    # Weights are adjusted for non-response only, never calibrated to the population, so the
    # weighted person count misses it by sampling error (households vary in size): about 2% at
    # 3000 persons, under 1% at 40,000. Allowed: 4 replicate SEs (normal theory), and never more
    # than 8% so that inflated replicates cannot hide a wrong total.
    for demo in (small, default):
        m = demo.microdata
        total = m["wt"].sum()
        rep = m[[f"rw{r}" for r in range(1, R + 1)]].sum().to_numpy()
        population = demo.areas["population"].sum()
        gap = abs(total - population)
        assert gap <= 4 * _sdr_se(rep, total)
        assert gap <= 0.08 * population


def test_replicate_weights_have_factor_times_adjustment_structure(small):
    m = small.microdata
    rw = m[[f"rw{r}" for r in range(1, R + 1)]].to_numpy()
    assert np.isfinite(rw).all() and (rw >= 0).all()
    ratio = rw / m["wt"].to_numpy()[:, None]
    # Same factor for everyone in a cluster: the ratio is constant within each psu.
    spread = pd.DataFrame(ratio).groupby(m["psu"].to_numpy()).agg(lambda s: s.max() - s.min())
    assert spread.to_numpy().max() < 1e-12
    # Successive-difference factor of the cluster (clusters sorted by stratum, then selection
    # order; Fay & Train 1995) times one non-response adjustment per stratum and replicate.
    # Every selected block keeps a respondent (8 households at ~85% response), so the microdata
    # holds all selected clusters.
    assert m["psu"].nunique() == small.selected_clusters
    clusters = (m[["stratum", "psu"]].drop_duplicates().sort_values(["stratum", "psu"])
                .reset_index(drop=True))
    position = pd.Series(clusters.index, index=clusters["psu"]).loc[m["psu"]].to_numpy()
    factors = successive_difference_factors(len(clusters), replicates=R)[position]
    adjustment = pd.DataFrame(ratio / factors).groupby(m["stratum"].to_numpy())
    spread = adjustment.agg(lambda s: s.max() - s.min()).to_numpy()
    assert spread.max() < 1e-9
    level = adjustment.first().to_numpy()
    assert (level > 0.5).all() and (level < 2.0).all()  # a mild re-adjustment, not a rescaling
    # ... and it is each replicate's own adjustment, not the full sample's reused (ratio 1).
    assert np.abs(level - 1.0).max() > 1e-3


def test_item_nonresponse_shares(small):
    m = small.microdata
    for item, (low, high) in ITEM_UNIVERSE.items():
        in_universe = m["age"].between(low, high)
        share = m.loc[in_universe, item].isna().mean()
        assert 0.01 <= share <= 0.03, (item, share)  # the specification: 1-3%


def test_sample_size_is_about_what_was_asked(small, default):
    assert abs(len(small.microdata) / SMALL - 1) < 0.15
    assert abs(len(default.microdata) / 40_000 - 1) < 0.10


def test_small_and_large_area_samples_at_default_size(default):
    counts = default.microdata.groupby("area").size().reindex(default.areas["area_code"],
                                                               fill_value=0)
    assert (counts < 10).sum() >= 3
    assert (counts > 500).sum() >= 3


def test_default_estimates_agree_with_the_truth(default):
    # Design unbiasedness: each nation-level weighted proportion is within 4 SDR standard errors
    # (Fay & Train 1995) of the true population proportion, plus an absolute cap of 0.02.
    m, truth = default.microdata, default.truth
    rw = m[[f"rw{r}" for r in range(1, R + 1)]].to_numpy()
    w = m["wt"].to_numpy()
    for name, (col, code, low, high, _band) in INDICATOR_SPEC.items():
        base = (m["age"].between(low, high) & m[col].notna()).to_numpy()
        y = (m[col] == code).fillna(False).to_numpy(dtype=float)
        p = (w * y)[base].sum() / w[base].sum()
        p_r = (rw * y[:, None])[base].sum(axis=0) / rw[base].sum(axis=0)
        se = _sdr_se(p_r, p)
        true = truth.query("indicator == @name and geo_level == 'nation' and sex == 'all' "
                           "and age_group == 'all'")["true_proportion"].item()
        assert abs(p - true) <= min(4 * se, 0.02), (name, p, true, se)


# ---- truth ---------------------------------------------------------------------------------


def test_truth_prevalence_bands_at_nation_level(small):
    truth = small.truth
    nation = truth[(truth["geo_level"] == "nation") & (truth["sex"] == "all")
                   & (truth["age_group"] == "all")].set_index("indicator")["true_proportion"]
    for name, (*_, (low, high)) in INDICATOR_SPEC.items():
        assert low <= nation[name] <= high, (name, nation[name])


def test_truth_covers_exactly_the_published_cells(small):
    truth, areas = small.truth, small.areas
    assert list(truth.columns) == ["indicator", "geo_level", "geo_code", "sex", "age_group",
                                   "population_base", "population_count", "true_proportion"]
    units = {"nation": ["VL"], "region": sorted(areas["region_code"].unique()),
             "district": sorted(areas["district_code"].unique()), "area": areas["area_code"]}
    expected = set()
    for name in INDICATOR_SPEC:
        for level, codes in units.items():
            for code in codes:
                cells = [("all", "all")] + [(s, "all") for s in SEX] + [("all", a) for a in AGE]
                if level != "area":  # sex × age_group only down to district
                    cells += [(s, a) for s in SEX for a in AGE]
                expected |= {(name, level, code, s, a) for s, a in cells}
    # 8 indicators × [336 units × (1 + 2 + 4) + 36 units × 8] = 8 × 2640
    assert len(expected) == 21_120
    keys = list(truth[["indicator", "geo_level", "geo_code", "sex", "age_group"]]
                .itertuples(index=False, name=None))
    assert len(keys) == len(set(keys)) == 21_120
    assert set(keys) == expected


def test_truth_is_consistent_with_the_lookup_and_additive(small):
    truth, areas = small.truth, small.areas
    assert (truth["population_count"] <= truth["population_base"]).all()
    np.testing.assert_allclose(truth["true_proportion"],
                               truth["population_count"] / truth["population_base"], rtol=1e-15)
    # Universe "everyone": the base of an area equals its population in the lookup.
    everyone = truth[(truth["indicator"] == "home_owner") & (truth["geo_level"] == "area")
                     & (truth["sex"] == "all") & (truth["age_group"] == "all")]
    assert everyone.set_index("geo_code")["population_base"].equals(
        areas.set_index("area_code")["population"].rename_axis("geo_code")
        .rename("population_base"))
    # Additivity: each district is the sum of its areas; "all" is the sum of its categories.
    area_rows = truth[(truth["geo_level"] == "area") & (truth["sex"] == "all")
                      & (truth["age_group"] == "all")].merge(
        areas[["area_code", "district_code"]], left_on="geo_code", right_on="area_code")
    summed = area_rows.groupby(["indicator", "district_code"])["population_count"].sum()
    district = truth[(truth["geo_level"] == "district") & (truth["sex"] == "all")
                     & (truth["age_group"] == "all")].set_index(["indicator", "geo_code"])
    assert (district["population_count"].sort_index().to_numpy()
            == summed.sort_index().to_numpy()).all()
    nation = truth[truth["geo_level"] == "nation"]
    by_age = nation[(nation["sex"] == "all") & (nation["age_group"] != "all")]
    overall = nation[(nation["sex"] == "all") & (nation["age_group"] == "all")]
    assert (by_age.groupby("indicator")["population_base"].sum().sort_index().to_numpy()
            == overall.set_index("indicator")["population_base"].sort_index().to_numpy()).all()
    # Universes from the specification: the 0-14 group is empty for 15+ indicators, 65+ for employment.
    for name in ["smoker", "employed", "unmet_care", "addiction_treatment"]:
        assert (nation.loc[(nation["indicator"] == name) & (nation["age_group"] == "0-14"),
                           "population_base"] == 0).all()
    assert (nation.loc[(nation["indicator"] == "employed") & (nation["age_group"] == "65+"),
                       "population_base"] == 0).all()
