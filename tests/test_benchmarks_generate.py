"""Tests for the benchmark's input generator and contenders (tests/benchmarks/), on a tiny map.

The benchmark itself (`make bench`) is not run here. Yardsticks: the generator's specification
(columns, map sizes, nesting, universes), Fay & Train's successive-difference factors from
pipeline.methods.replicate_factors, and ratebook's own cells (internal/cells.parquet) for the sums
the DuckDB and pandas contenders compute, recomputed independently from the microdata.
"""

from __future__ import annotations

import argparse
import hashlib
import json

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from pipeline.methods.replicate_factors import successive_difference_factors
from pipeline.runner import run
from tests.benchmarks import bench, contenders, generate

ROWS = 5_000
SEED = 3
R = generate.REPLICATES


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    out = tmp_path_factory.mktemp("bench")
    # small chunks and row groups, so that households and clusters straddle chunk boundaries
    result = generate.generate(out, rows=ROWS, seed=SEED, shape=generate.TINY_SHAPE, chunk_rows=1_500,
                               row_group_rows=1_000)
    return result, pq.read_table(result.path("persons")).to_pandas()


def test_columns_rows_and_row_groups(tiny):
    result, frame = tiny
    expected = (["person_id", "household_id", "area", "stratum", "psu", "wt", "sex", "age"]
                + [i.name for i in generate.INDICATORS] + [f"rw{r}" for r in range(1, R + 1)])
    assert list(frame.columns) == expected
    assert len(frame) == ROWS == result.rows
    assert (frame["person_id"].to_numpy() == np.arange(1, ROWS + 1)).all()
    assert pq.ParquetFile(result.path("persons")).metadata.num_row_groups == result.row_groups == 7  # 3 × (1000 + 500) + 500


def test_default_map_has_the_benchmark_shape():
    geo = generate.build_geography()
    assert (len(geo.region_codes), len(geo.district_codes), len(geo.area_codes)) == (8, 100, 2_000)
    names = [geo.nation_name] + geo.region_names + geo.district_names + geo.area_names
    assert len(set(names)) == len(names)
    assert np.bincount(geo.area_district).min() >= generate.Shape().min_areas_per_district


def test_lookup_matches_the_microdata_and_nests(tiny):
    result, frame = tiny
    areas = pd.read_csv(result.path("areas"), dtype=str)
    assert list(areas.columns) == ["nation_code", "nation_name", "region_code", "region_name", "district_code",
                                   "district_name", "area_code", "area_name", "population", "households"]
    assert [areas[c].nunique() for c in ("nation_code", "region_code", "district_code", "area_code")] == [1, 2, 5, 40]
    assert set(frame["area"]) == set(areas["area_code"])  # every area has records (allocation floor)
    district_of = dict(zip(areas["area_code"], areas["district_code"]))
    assert (frame["area"].map(district_of) == frame["stratum"]).all()
    # households within one cluster, clusters within one area
    assert (frame.groupby("household_id")["psu"].nunique() == 1).all()
    assert (frame.groupby("psu")["area"].nunique() == 1).all()
    assert frame.groupby("psu")["household_id"].nunique().max() <= generate.HOUSEHOLDS_PER_CLUSTER
    assert frame.groupby("household_id").size().max() <= 7


def test_replicate_factors_are_successive_difference_factors_of_the_cluster(tiny):
    result, frame = tiny
    factors = frame[[f"rw{r}" for r in range(1, R + 1)]].to_numpy() / frame["wt"].to_numpy()[:, None]
    expected = successive_difference_factors(result.clusters, replicates=R)[frame["psu"].to_numpy() - 1]
    np.testing.assert_allclose(factors, expected, rtol=1e-12)
    assert (factors > 0).all() and (frame["wt"] > 0).all()
    assert abs(factors.mean() - 1) < 0.01


def test_universes_missing_values_and_rare_items(tiny):
    _, frame = tiny
    for ind in generate.INDICATORS:
        values = frame[ind.name]
        outside = frame["age"] < ind.min_age
        if ind.max_age is not None:
            outside |= frame["age"] > ind.max_age
        assert values[outside].isna().all(), ind.name
        inside = values[~outside]
        assert set(inside.dropna().unique()) <= {1, 2}
        assert inside.isna().any() == (ind.missing > 0), ind.name
    rare = [i.name for i in generate.INDICATORS if i.prevalence <= 0.03]
    assert len(rare) >= 3


def test_same_seed_same_bytes(tiny, tmp_path):
    result, _ = tiny
    again = generate.generate(tmp_path, rows=ROWS, seed=SEED, shape=generate.TINY_SHAPE, chunk_rows=1_500,
                              row_group_rows=1_000)

    def digest(path):
        return hashlib.sha256(path.read_bytes()).hexdigest()

    assert digest(again.path("persons")) == digest(result.path("persons"))
    assert generate.cached(tmp_path, rows=ROWS, seed=SEED) == again
    assert generate.cached(tmp_path, rows=ROWS + 1, seed=SEED) is None


@pytest.fixture(scope="module")
def five_run(tiny):
    result, _ = tiny
    summary = run(result.path("config_5"), release_id="tiny-5")
    cells = pq.read_table(summary.release_dir / "internal" / "cells.parquet").to_pandas()
    return summary, cells


def _by_district(result, sums: pd.DataFrame) -> pd.DataFrame:
    areas = pd.read_csv(result.path("areas"), dtype=str)
    sums = sums.copy()
    sums["district"] = sums["area"].map(dict(zip(areas["area_code"], areas["district_code"])))
    sums["sex"] = sums["sex"].map({1: "Male", 2: "Female"})
    sums["age_group"] = np.asarray(generate.AGE_LABELS)[sums["age_group"].astype(int)]
    return sums.drop(columns="area").groupby(["district", "sex", "age_group"]).sum()


def test_ratebook_runs_on_the_generated_input(five_run):
    summary, cells = five_run
    assert summary.rows_read == summary.rows_accepted == ROWS
    assert set(cells["indicator"]) == set(generate.FIVE)


def test_duckdb_baseline_computes_ratebook_sums(tiny, five_run):
    import duckdb

    result, _ = tiny
    _, cells = five_run
    spec = bench.contender_spec(result.path("persons").parent, generate.FIVE_INDICATORS)
    sums = duckdb.connect().sql(contenders.build_sql(spec)).df()
    rolled = _by_district(result, sums)
    table = cells[(cells["geo_level"] == "district") & (cells["sex"] != "all") & (cells["age_group"] != "all")]
    checked = 0
    for k, ind in enumerate(generate.FIVE_INDICATORS):
        mine = table[table["indicator"] == ind.name].set_index(["geo_code", "sex", "age_group"])
        theirs = rolled.reindex(mine.index).fillna(0)
        np.testing.assert_array_equal(mine["sample_size"], theirs[f"n_{k}"])
        np.testing.assert_array_equal(mine["respondents"], theirs[f"x_{k}"])
        np.testing.assert_array_equal(mine["item_nonresponse"], theirs[f"nr_{k}"])
        np.testing.assert_allclose(mine["weighted_base"], theirs[f"wb_{k}"], rtol=1e-9)
        np.testing.assert_allclose(mine["weighted_count"], theirs[f"wy_{k}"], rtol=1e-9)
        np.testing.assert_allclose(mine["sum_squared_weights"], theirs[f"ww_{k}"], rtol=1e-9)
        # replicate sums: the successive-difference variance (4/R)·Σ_r (p̂_r − p̂)² (Fay & Train 1995)
        base = theirs[[f"rb_{k}_{r}" for r in range(R)]].to_numpy()
        count = theirs[[f"ry_{k}_{r}" for r in range(R)]].to_numpy()
        ok = (base > 0).all(axis=1) & (theirs[f"wb_{k}"].to_numpy() > 0)
        p = theirs[f"wy_{k}"].to_numpy()[ok] / theirs[f"wb_{k}"].to_numpy()[ok]
        variance = 4 / R * ((count[ok] / base[ok] - p[:, None]) ** 2).sum(axis=1)
        np.testing.assert_allclose(mine["variance"].to_numpy()[ok], variance, rtol=1e-7, atol=1e-15)
        checked += int(ok.sum())
    assert checked > 100


def test_analyst_script_agrees_with_duckdb(tiny, tmp_path):
    import duckdb

    result, _ = tiny
    spec = bench.contender_spec(result.path("persons").parent, generate.INDICATORS)
    spec_path = tmp_path / "spec.json"
    spec_path.write_text(json.dumps(spec))
    out = tmp_path / "analyst.parquet"
    contenders.analyst(argparse.Namespace(spec=str(spec_path), out=str(out)))
    analyst = pd.read_parquet(out)
    sums = duckdb.connect().sql(contenders.build_sql(spec)).df().set_index(["area", "sex", "age_group"])
    analyst.index = analyst.index.set_levels(analyst.index.levels[2].astype(int), level=2)
    sums = sums.reindex(analyst.index)
    for k, ind in enumerate(generate.INDICATORS):
        np.testing.assert_array_equal(analyst[f"n_{ind.name}"], sums[f"n_{k}"])
        np.testing.assert_allclose(analyst[f"wt_count_{ind.name}"], sums[f"wy_{k}"], rtol=1e-9)
        np.testing.assert_allclose(analyst[f"rw80_base_{ind.name}"], sums[f"rb_{k}_79"], rtol=1e-9)
