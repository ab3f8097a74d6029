"""Aggregation: streaming cell sums and the roll-up, checked against pandas group-bys computed
straight from the microdata (an independent path through a general-purpose library)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipeline.config import load_config
from pipeline.stages import aggregate, derive, ingest


@pytest.fixture(scope="module")
def demo(small_demo_module):
    return small_demo_module


@pytest.fixture(scope="module")
def small_demo_module(tmp_path_factory, small_demo):
    from tests.conftest import demo_settings, write_config

    settings = demo_settings()
    settings["source"]["batch_rows"] = 700  # several batches, so streaming is exercised
    (small_demo / "configs").mkdir(exist_ok=True)
    config = load_config(write_config(small_demo / "configs" / "agg.yaml", settings))
    geography, _ = ingest.read_geography(config)
    layout = derive.domain_layout(config)
    files = ingest.plan_source(config)
    batches = [derive.derive(config, b.frame, geography, layout) for b in ingest.iter_batches(config, files, geography)]
    micro = pd.read_parquet(config.source_path)
    return config, geography, layout, batches, micro


@pytest.fixture(scope="module")
def rolled(demo):
    config, geography, layout, batches, _ = demo
    return aggregate.roll_up(accumulate(config, geography, layout, batches), config, geography, layout)


def accumulate(config, geography, layout, batches):
    acc = aggregate.CellAccumulator(indicators=len(config.indicators),
                                    cells=len(geography.finest_codes) * layout.n_cells,
                                    replicates=len(config.replicate_columns))
    for b in batches:
        acc.add(b)
    return acc


def direct_sums(config, micro: pd.DataFrame, indicator: str, by: list[str], level: str) -> pd.DataFrame:
    """Σw, Σw·y, n, x and Σ rw1 by (geography at `level`, by...) computed with pandas alone."""
    lookup = pd.read_csv(config.lookup_path, dtype=str)
    level_code = {lv.level: lv.code for lv in config.geography.levels}[level]
    columns = ["area_code"] if level_code == "area_code" else ["area_code", level_code]
    frame = micro.merge(lookup[columns], left_on="area", right_on="area_code")
    frame["sex"] = frame["sex"].map({1: "Male", 2: "Female"})
    frame["age_group"] = pd.cut(frame["age"], [0, 15, 35, 65, 111], right=False,
                                labels=["0-14", "15-34", "35-64", "65+"]).astype(str)
    # universe and condition of configs/demo.yaml, written out in pandas
    universe = {"no_internet": frame["age"] >= 0, "smoker": frame["age"] >= 15,
                "employed": (frame["age"] >= 15) & (frame["age"] <= 64)}[indicator]
    column, yes = {"no_internet": ("internet", 3), "smoker": ("smoker", 1), "employed": ("employed", 1)}[indicator]
    base = frame[universe & frame[column].notna()].copy()
    base["y"] = (base[column] == yes).astype(float)
    base["wy"] = base["wt"] * base["y"]
    base["rw1y"] = base["rw1"] * base["y"]
    grouped = base.groupby([level_code] + by)
    return pd.DataFrame({"sample_size": grouped.size(), "respondents": grouped["y"].sum(),
                         "weighted_base": grouped["wt"].sum(), "weighted_count": grouped["wy"].sum(),
                         "rw1": grouped["rw1"].sum(), "rw1y": grouped["rw1y"].sum()})


@pytest.mark.parametrize("indicator", ["no_internet", "smoker", "employed"])
@pytest.mark.parametrize("by,level", [([], "nation"), ([], "area"), (["sex"], "region"),
                                      (["age_group"], "district"), (["sex", "age_group"], "district")])
def test_roll_up_equals_pandas_group_by(demo, rolled, indicator, by, level):
    config, geography, layout, batches, micro = demo
    cells = rolled
    f = cells.frame
    f = f.assign(rw1=cells.replicate_base[:, 0], rw1y=cells.replicate_count[:, 0])
    others = [d for d in layout.names if d not in by]
    mine = f[(f["indicator"] == indicator) & (f["geo_level"] == level) & (f[others] == "all").all(axis=1)
             & (f[by] != "all").all(axis=1)]
    mine = mine.set_index(["geo_code"] + by)
    expected = direct_sums(config, micro, indicator, by, level).add_suffix("_direct")
    sampled = mine[mine["sample_size"] > 0]
    assert len(sampled) == len(expected)
    expected.index = expected.index.set_names(["geo_code"] + by)
    joined = sampled.join(expected, how="inner")
    assert len(joined) == len(expected)
    for col in ("sample_size", "respondents"):
        np.testing.assert_array_equal(joined[col], joined[f"{col}_direct"])
    for col in ("weighted_base", "weighted_count", "rw1", "rw1y"):
        # sums of the same float64 numbers in a different order: agree to rounding
        np.testing.assert_allclose(joined[col], joined[f"{col}_direct"], rtol=1e-10)


def test_every_unit_and_category_gets_a_row(rolled):
    f = rolled.frame
    one = f[f["indicator"] == "smoker"]
    # tables of configs/demo.yaml: overall, sex (2), age_group (4) at 1+5+30+300 units; sex x age (8) to district
    units = {"nation": 1, "region": 5, "district": 30, "area": 300}
    expected = sum(units.values()) * (1 + 2 + 4) + (1 + 5 + 30) * 8
    assert len(one) == expected
    assert not one.duplicated(["geo_level", "geo_code", "sex", "age_group"]).any()


def test_batches_add_up_like_one_batch(demo):
    config, geography, layout, batches, _ = demo
    streamed = accumulate(config, geography, layout, batches)
    halves = [accumulate(config, geography, layout, batches[: len(batches) // 2]),
              accumulate(config, geography, layout, batches[len(batches) // 2:])]
    halves[0].merge(halves[1])
    np.testing.assert_allclose(halves[0].scalars, streamed.scalars, rtol=1e-12)
    np.testing.assert_allclose(halves[0].replicate_base, streamed.replicate_base, rtol=1e-12)
    np.testing.assert_allclose(halves[0].replicate_count, streamed.replicate_count, rtol=1e-12)


def test_additive_relations_hold(rolled):
    """Each parent equals the sum of its children; each 'all' equals the sum of its categories."""
    f = rolled.frame
    f = f[f["indicator"] == "no_internet"]
    overall = f[(f["sex"] == "all") & (f["age_group"] == "all")]
    regions = overall[overall["geo_level"] == "region"]["weighted_count"].sum()
    nation = overall[overall["geo_level"] == "nation"]["weighted_count"].iloc[0]
    assert regions == pytest.approx(nation, rel=1e-12)
    by_sex = f[(f["geo_level"] == "nation") & (f["sex"] != "all") & (f["age_group"] == "all")]
    assert by_sex["sample_size"].sum() == overall[overall["geo_level"] == "nation"]["sample_size"].iloc[0]


def test_a_cell_where_everyone_has_the_characteristic_gives_exactly_one():
    # the base is summed as everyone minus the records left out, the count directly; where every
    # base record has the characteristic the two must still agree to the bit (p̂ = 1, not 1 + ε),
    # here with weights whose sums round differently in the two orders
    rng = np.random.default_rng(7)
    n = 1000
    weight = rng.uniform(0.1, 1000.0, n) * (1 + 1e-9 * rng.standard_normal(n))
    in_base = rng.random(n) < 0.7
    batch = derive.DerivedBatch(cell=np.zeros(n, dtype=np.int64), weight=weight,
                                replicate_weights=weight[:, None] * rng.uniform(0.5, 1.5, (n, 4)),
                                in_base=in_base[:, None], has_characteristic=in_base[:, None],
                                item_nonresponse=np.zeros((n, 1), dtype=bool))
    acc = aggregate.CellAccumulator(indicators=1, cells=1, replicates=4)
    acc.add(batch)
    s = acc.scalars[0, 0]
    assert s[0] == s[1] == in_base.sum()
    assert s[4] == s[3]  # weighted count == weighted base, exactly
    assert s[3] == pytest.approx(weight[in_base].sum(), rel=1e-12)  # and both are the direct sum (numpy)
    np.testing.assert_array_equal(acc.replicate_count[0, 0], acc.replicate_base[0, 0])
