"""Tests for pipeline.stages.derive: domain layout, the finest cell of every record, the indicator
arrays and the pass-through of weights.

Frames are typed as ingest hands them over (numbers float64 with NaN for missing, strings as
object). Expected values come from hand-worked small examples (worked out in the comments) and,
on the demo microdata, from a direct pandas computation of each indicator's universe and condition.
"""

from __future__ import annotations

import copy
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from pipeline.config import load_config
from pipeline.stages.derive import DomainLayout, derive, domain_layout
from pipeline.stages.ingest import Geography
from tests.conftest import demo_settings, write_config

SEX = {"column": "sex", "categories": {1: "Male", 2: "Female"}}
AGE_GROUP = {"column": "age", "breaks": [0, 15, 35, 65, 111], "labels": ["0-14", "15-34", "35-64", "65+"]}
TENURE = {"column": "tenure", "categories": {"own": "Owner", "rent": "Renter", "free": "Rent-free"}}


def settings(*, domains: dict | None = None, indicators: dict | None = None, replicates: int | None = 2) -> dict:
    """A small config: id pid, key area, weight wt, replicate weights rw1..rwR (or none)."""
    design = {"weight": "wt", "variance": "simple_random"}
    if replicates:
        design = {"weight": "wt", "variance": "replicate",
                  "replicates": {"prefix": "rw", "count": replicates, "method": "jackknife_delete1"}}
    return {
        "release": {"name": "t", "title": "t", "publisher": "t"},
        "source": {
            "path": "p.parquet",
            "record_id": "pid",
            "variables": {
                "sex": {"type": "integer", "values": [1, 2]},
                "age": {"type": "integer", "min": 0, "max": 110},
                "tenure": {"type": "string", "values": ["own", "rent", "free"]},
                "internet": {"type": "integer", "values": [1, 2, 3], "missing": "allowed"},
                "smoker": {"type": "integer", "values": [1, 2], "missing": "allowed"},
            },
        },
        "geography": {"lookup": "areas.csv", "key": "area",
                      "levels": [{"level": "area", "code": "area_code", "name": "area_name"}]},
        "design": design,
        "domains": {"sex": SEX, "age_group": AGE_GROUP} if domains is None else domains,
        "indicators": indicators or {"no_internet": {"label": "x", "condition": "internet == 3"}},
        "output": {"dir": "out"},
    }


def load(tmp_path: Path, config_settings: dict):
    return load_config(write_config(tmp_path / "c.yaml", config_settings))


def geography(codes: list[str]) -> Geography:
    """A one-level geography whose finest units are `codes`, in that order (derive only needs the
    positions of the finest codes)."""
    arr = np.array(codes, dtype=object)
    return Geography(levels=("area",), codes={"area": arr}, names={"area": arr.copy()},
                     unit_index={"area": np.arange(len(codes))})


def frame(rows: list[dict]) -> pd.DataFrame:
    """Typed as ingest gives it: numbers float64 (NaN missing), strings object."""
    df = pd.DataFrame(rows)
    out = {}
    for col in df.columns:
        if col in ("pid", "area", "tenure"):
            out[col] = pd.Series([None if pd.isna(v) else str(v) for v in df[col]], dtype=object)
        else:
            out[col] = df[col].astype("float64")
    return pd.DataFrame(out)


def row(pid, area, sex, age, *, tenure="own", internet=1.0, smoker=2.0, wt=1.0, rw=(1.0, 1.0)):
    return {"pid": pid, "area": area, "wt": wt, **{f"rw{r + 1}": v for r, v in enumerate(rw)},
            "sex": sex, "age": age, "tenure": tenure, "internet": internet, "smoker": smoker}


# --------------------------------------------------------------------------------------------
# domain_layout


def test_layout_of_categories_and_breaks(tmp_path):
    layout = domain_layout(load(tmp_path, settings()))
    assert layout.names == ("sex", "age_group")
    assert layout.labels == (("Male", "Female"), ("0-14", "15-34", "35-64", "65+"))
    assert layout.shape == (2, 4) and layout.n_cells == 2 * 4


def test_layout_of_three_domains_follows_config_order(tmp_path):
    layout = domain_layout(load(tmp_path, settings(domains={"tenure": TENURE, "age_group": AGE_GROUP, "sex": SEX})))
    assert layout.names == ("tenure", "age_group", "sex")
    assert layout.labels[0] == ("Owner", "Renter", "Rent-free")
    assert layout.shape == (3, 4, 2) and layout.n_cells == 3 * 4 * 2


def test_layout_without_domains_has_one_cell(tmp_path):
    layout = domain_layout(load(tmp_path, settings(domains={})))
    assert layout == DomainLayout((), ()) and layout.n_cells == 1


# --------------------------------------------------------------------------------------------
# Cells


SIX = [
    # pid  area  sex  age
    row(1, "A1", 1, 0),
    row(2, "A1", 2, 14),
    row(3, "A2", 1, 15),
    row(4, "A2", 2, 34),
    row(5, "A3", 1, 64),
    row(6, "A3", 2, 110),
]


def test_cell_is_geo_position_times_domain_cells_plus_mixed_radix_domain_cell(tmp_path):
    config = load(tmp_path, settings())
    layout = domain_layout(config)
    # Geography order A2, A3, A1 (not alphabetical) so that the position comes from the lookup.
    geo = geography(["A2", "A3", "A1"])
    derived = derive(config, frame(SIX), geo, layout)
    # Domains: sex (Male 0, Female 1; size 2), then age_group (size 4, the faster digit), so
    # domain cell = sex_pos * 4 + age_pos and cell = geo_pos * 8 + domain cell.
    # Age groups are [0,15) [15,35) [35,65) [65,111): 0 -> 0, 14 -> 0, 15 -> 1, 34 -> 1, 64 -> 2, 110 -> 3.
    #   pid 1: A1 geo 2, Male 0,   age 0   -> 0 : 2*8 + 0*4 + 0 = 16
    #   pid 2: A1 geo 2, Female 1, age 14  -> 0 : 2*8 + 1*4 + 0 = 20
    #   pid 3: A2 geo 0, Male 0,   age 15  -> 1 : 0*8 + 0*4 + 1 = 1
    #   pid 4: A2 geo 0, Female 1, age 34  -> 1 : 0*8 + 1*4 + 1 = 5
    #   pid 5: A3 geo 1, Male 0,   age 64  -> 2 : 1*8 + 0*4 + 2 = 10
    #   pid 6: A3 geo 1, Female 1, age 110 -> 3 : 1*8 + 1*4 + 3 = 15
    assert derived.cell.tolist() == [16, 20, 1, 5, 10, 15]
    assert derived.cell.dtype.kind == "i"


def test_the_last_domain_is_the_fastest_digit(tmp_path):
    # Same six records, domains in the other order: age_group (size 4), then sex (size 2, fastest).
    config = load(tmp_path, settings(domains={"age_group": AGE_GROUP, "sex": SEX}))
    derived = derive(config, frame(SIX), geography(["A2", "A3", "A1"]), domain_layout(config))
    # cell = geo_pos * 8 + age_pos * 2 + sex_pos
    #   pid 1: 2*8 + 0*2 + 0 = 16    pid 2: 2*8 + 0*2 + 1 = 17
    #   pid 3: 0*8 + 1*2 + 0 = 2     pid 4: 0*8 + 1*2 + 1 = 3
    #   pid 5: 1*8 + 2*2 + 0 = 12    pid 6: 1*8 + 3*2 + 1 = 15
    assert derived.cell.tolist() == [16, 17, 2, 3, 12, 15]


def test_string_categories_follow_the_config_order(tmp_path):
    # tenure categories in config order own 0, rent 1, free 2 (not alphabetical: free < own < rent)
    config = load(tmp_path, settings(domains={"tenure": TENURE}))
    records = [row(1, "A1", 1, 30, tenure="free"), row(2, "A2", 1, 30, tenure="own"),
               row(3, "A2", 1, 30, tenure="rent")]
    derived = derive(config, frame(records), geography(["A1", "A2"]), domain_layout(config))
    # cell = geo_pos * 3 + tenure_pos: A1 free -> 0*3 + 2 = 2; A2 own -> 1*3 + 0 = 3; A2 rent -> 1*3 + 1 = 4
    assert derived.cell.tolist() == [2, 3, 4]


def test_without_domains_the_cell_is_the_geo_position(tmp_path):
    config = load(tmp_path, settings(domains={}))
    derived = derive(config, frame(SIX), geography(["A3", "A1", "A2"]), domain_layout(config))
    assert derived.cell.tolist() == [1, 1, 2, 2, 0, 0]


@pytest.mark.parametrize("age, label", [(0, "0-14"), (14, "0-14"), (15, "15-34"), (34, "15-34"),
                                        (35, "35-64"), (64, "35-64"), (65, "65+"), (110, "65+")])
def test_break_intervals_are_closed_below_and_open_above(tmp_path, age, label):
    config = load(tmp_path, settings(domains={"age_group": AGE_GROUP}))
    layout = domain_layout(config)
    derived = derive(config, frame([row(1, "A1", 1, age)]), geography(["A1"]), layout)
    assert layout.labels[0][int(derived.cell[0])] == label


def test_a_value_beyond_the_last_break_is_never_put_in_the_last_group(tmp_path):
    # 111 is outside [0, 111); the config and ingest keep such values out, so meeting one is a
    # bug that must stop the run rather than be counted silently as "65+"
    config = load(tmp_path, settings(domains={"age_group": AGE_GROUP}))
    with pytest.raises(AssertionError, match="age"):
        derive(config, frame([row(1, "A1", 1, 111)]), geography(["A1"]), domain_layout(config))


# --------------------------------------------------------------------------------------------
# Indicators


INDICATORS = {
    "no_internet": {"label": "x", "condition": "internet == 3"},
    "smoker": {"label": "x", "universe": "age >= 15", "condition": "smoker == 1"},
}


def test_universe_missing_condition_and_characteristic(tmp_path):
    config = load(tmp_path, settings(indicators=INDICATORS))
    nan = np.nan
    records = [
        row(1, "A1", 1, 40, internet=3, smoker=1),      # adult smoker, no internet
        row(2, "A1", 2, 40, internet=1, smoker=2),      # adult non-smoker, internet
        row(3, "A1", 1, 40, internet=nan, smoker=nan),  # adult, both items missing
        row(4, "A1", 2, 10, internet=3, smoker=1),      # child "smoker": outside the smoker universe
        row(5, "A1", 1, 10, internet=2, smoker=nan),    # child, smoker missing: neither base nor non-response
        row(6, "A1", 2, 15, internet=nan, smoker=1),    # 15 is in the universe (age >= 15)
    ]
    derived = derive(config, frame(records), geography(["A1"]), domain_layout(config))
    assert list(config.indicators) == ["no_internet", "smoker"]
    # no_internet: universe everyone; base = internet not missing; has = internet == 3
    assert derived.in_base[:, 0].tolist() == [True, True, False, True, True, False]
    assert derived.item_nonresponse[:, 0].tolist() == [False, False, True, False, False, True]
    assert derived.has_characteristic[:, 0].tolist() == [True, False, False, True, False, False]
    # smoker: universe age >= 15 (pids 1, 2, 3, 6); base also needs smoker not missing
    assert derived.in_base[:, 1].tolist() == [True, True, False, False, False, True]
    assert derived.item_nonresponse[:, 1].tolist() == [False, False, True, False, False, False]
    assert derived.has_characteristic[:, 1].tolist() == [True, False, False, False, False, True]
    for arr in (derived.in_base, derived.has_characteristic, derived.item_nonresponse):
        assert arr.dtype == bool and arr.shape == (6, 2)


def test_a_condition_that_is_decided_despite_a_missing_value_stays_in_the_base(tmp_path):
    # "smoker == 1 or age >= 65": for a 70-year-old with smoker missing, unknown or true = true
    # (Kleene logic), so the record is in the base and has the characteristic; for a 30-year-old
    # it is unknown or false = unknown: item non-response.
    indicators = {"either": {"label": "x", "condition": "smoker == 1 or age >= 65"}}
    config = load(tmp_path, settings(indicators=indicators))
    records = [row(1, "A1", 1, 70, smoker=np.nan), row(2, "A1", 1, 30, smoker=np.nan)]
    derived = derive(config, frame(records), geography(["A1"]), domain_layout(config))
    assert derived.in_base[:, 0].tolist() == [True, False]
    assert derived.has_characteristic[:, 0].tolist() == [True, False]
    assert derived.item_nonresponse[:, 0].tolist() == [False, True]


# --------------------------------------------------------------------------------------------
# The demo: every indicator of configs/demo.yaml against pandas


def demo_frame(small_demo: Path, n: int = 2_000) -> pd.DataFrame:
    """The first n demo records typed as ingest gives them, read with pandas directly."""
    raw = pd.read_parquet(small_demo / "data" / "raw" / "demo_persons.parquet").head(n)
    out = {}
    for col in raw.columns:
        if raw[col].dtype.kind in "iuf":
            out[col] = raw[col].to_numpy(dtype="float64", na_value=np.nan)
        else:
            out[col] = np.array([None if pd.isna(v) else str(v) for v in raw[col]], dtype=object)
    return pd.DataFrame(out)


# The demo's indicators written out by hand in pandas: (universe, condition column, value).
DEMO_INDICATORS = {
    "no_internet": (lambda f: pd.Series(True, index=f.index), "internet", 3),
    "smoker": (lambda f: f["age"] >= 15, "smoker", 1),
    "employed": (lambda f: (f["age"] >= 15) & (f["age"] <= 64), "employed", 1),
    "home_owner": (lambda f: pd.Series(True, index=f.index), "home_owner", 1),
    "housing_burden": (lambda f: pd.Series(True, index=f.index), "housing_burden", 1),
    "chronic_condition": (lambda f: pd.Series(True, index=f.index), "chronic", 1),
    "unmet_care": (lambda f: f["age"] >= 15, "unmet_care", 1),
    "addiction_treatment": (lambda f: f["age"] >= 15, "addiction_treatment", 1),
}


@pytest.fixture
def demo(tmp_path, small_demo):
    s = copy.deepcopy(demo_settings())
    s["source"]["path"] = str(small_demo / "data" / "raw" / "demo_persons.parquet")
    s["geography"]["lookup"] = str(small_demo / "data" / "raw" / "demo_areas.csv")
    config = load_config(write_config(tmp_path / "demo.yaml", s))
    lookup = pd.read_csv(small_demo / "data" / "raw" / "demo_areas.csv", dtype=str, keep_default_na=False)
    geo = geography(lookup["area_code"].tolist())  # lookup order; derive must use whatever order it is given
    f = demo_frame(small_demo)
    return config, geo, f, derive(config, f, geo, domain_layout(config))


def test_demo_indicators_match_pandas(demo):
    config, geo, f, derived = demo
    assert set(config.indicators) == set(DEMO_INDICATORS), "configs/demo.yaml changed: update DEMO_INDICATORS"
    assert len(f) == 2_000
    nonresponse_seen = outside_missing_seen = False
    for k, name in enumerate(config.indicators):
        universe_of, column, yes = DEMO_INDICATORS[name]
        universe = universe_of(f).to_numpy()
        answered = f[column].notna().to_numpy()
        in_base = universe & answered
        assert np.array_equal(derived.in_base[:, k], in_base), name
        assert np.array_equal(derived.item_nonresponse[:, k], universe & ~answered), name
        assert np.array_equal(derived.has_characteristic[:, k], in_base & (f[column] == yes).to_numpy()), name
        # has_characteristic implies in_base; non-response and base never overlap
        assert not (derived.has_characteristic[:, k] & ~derived.in_base[:, k]).any(), name
        assert not (derived.in_base[:, k] & derived.item_nonresponse[:, k]).any(), name
        nonresponse_seen |= bool((universe & ~answered).any())
        outside_missing_seen |= bool((~universe & ~answered).any())
    # the sample exercises both kinds of missing condition value (else this test would prove little)
    assert nonresponse_seen and outside_missing_seen


def test_demo_cells_match_pandas(demo):
    config, geo, f, derived = demo
    geo_pos = pd.Index(geo.finest_codes).get_indexer(f["area"])
    sex_pos = f["sex"].map({1.0: 0, 2.0: 1}).to_numpy()
    age_pos = pd.cut(f["age"], [0, 15, 35, 65, 111], right=False, labels=False).to_numpy()
    assert (geo_pos >= 0).all() and not np.isnan(sex_pos).any() and not np.isnan(age_pos).any()
    expected = geo_pos * 8 + sex_pos.astype(int) * 4 + age_pos.astype(int)
    assert np.array_equal(derived.cell, expected)


def test_demo_weights_and_replicate_weights_pass_through(demo):
    config, geo, f, derived = demo
    reps = [f"rw{r}" for r in range(1, 81)]
    assert np.array_equal(derived.weight, f["wt"].to_numpy())
    assert derived.replicate_weights.shape == (2_000, 80)
    assert np.array_equal(derived.replicate_weights, f[reps].to_numpy())


def test_weights_pass_through_and_no_replicates_without_a_replicate_design(tmp_path):
    records = [row(1, "A1", 1, 30, wt=12.5, rw=(0.0, 25.0)), row(2, "A1", 2, 30, wt=7.25, rw=(14.5, 0.0))]
    config = load(tmp_path, settings())
    derived = derive(config, frame(records), geography(["A1"]), domain_layout(config))
    assert derived.weight.tolist() == [12.5, 7.25]
    assert derived.replicate_weights.tolist() == [[0.0, 25.0], [14.5, 0.0]]

    config = load(tmp_path, settings(replicates=None))
    derived = derive(config, frame(records), geography(["A1"]), domain_layout(config))
    assert derived.weight.tolist() == [12.5, 7.25] and derived.replicate_weights is None
