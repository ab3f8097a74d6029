"""Tests for pipeline.stages.ingest: the geography lookup, source planning, batch reading and the
row rules.

Where the expected values come from:
* the demo lookup and microdata are checked against pandas / pyarrow reading the same files
  directly (unit counts, parents, names, row counts, column values);
* the row rules are checked on small hand-made inputs in which exactly one known row breaks one
  known rule, so the expected reject (row number, column, rule code, value) is known by
  construction; the rule codes are the stable RejectReason values of the contract;
* row numbers are 1-based data rows (the header line is not counted), as in rejects.parquet.
"""

from __future__ import annotations

import copy
import gzip
import math
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pandera.pandas as pa
import pyarrow as arrow
import pyarrow.parquet as pq
import pytest

from pipeline.config import load_config
from pipeline.errors import InputDataError
from pipeline.stages.ingest import (
    RejectReason,
    SeenIds,
    _coerce_types,
    _rules_hold,
    build_row_schema,
    iter_batches,
    plan_source,
    read_geography,
    row_rules,
)
from tests.conftest import demo_settings, write_config

LEVELS = ["nation", "region", "district", "area"]
CODE = {lv: f"{lv}_code" for lv in LEVELS}
NAME = {lv: f"{lv}_name" for lv in LEVELS}


# --------------------------------------------------------------------------------------------
# Helpers


def demo_config(tmp_path: Path, small_demo: Path, change=None, *, source: str | Path | None = None,
                lookup: str | Path | None = None):
    """The demo config with absolute paths into the session demo (or the given files)."""
    settings = copy.deepcopy(demo_settings())
    raw = small_demo / "data" / "raw"
    settings["source"]["path"] = str(source if source is not None else raw / "demo_persons.parquet")
    settings["geography"]["lookup"] = str(lookup if lookup is not None else raw / "demo_areas.csv")
    settings["output"]["dir"] = str(tmp_path / "out")
    if change is not None:
        change(settings)
    return load_config(write_config(tmp_path / "config.yaml", settings))


# A tiny lookup: two regions, three areas.
SMALL_LOOKUP = "region_code,region_name,area_code,area_name\nR1,North,A1,Alpha\nR1,North,A2,Beta\nR2,South,A3,Gamma\n"


def small_settings(tmp_path: Path, source: str | Path, *, lookup_text: str = SMALL_LOOKUP) -> dict:
    """A minimal config: id pid, key area, weight wt, two replicate weights rw1 rw2, and three
    variables (sex 1/2 required, age 0..110 required, internet 1/2/3 missing allowed)."""
    lookup = tmp_path / "areas.csv"
    lookup.write_text(lookup_text)
    return {
        "release": {"name": "t", "title": "t", "publisher": "t"},
        "source": {
            "path": str(source),
            "record_id": "pid",
            "variables": {
                "sex": {"type": "integer", "values": [1, 2]},
                "age": {"type": "integer", "min": 0, "max": 110},
                "internet": {"type": "integer", "values": [1, 2, 3], "missing": "allowed"},
            },
        },
        "geography": {
            "lookup": str(lookup),
            "key": "area",
            "levels": [{"level": "region", "code": "region_code", "name": "region_name"},
                       {"level": "area", "code": "area_code", "name": "area_name"}],
        },
        "design": {"weight": "wt", "variance": "replicate",
                   "replicates": {"prefix": "rw", "count": 2, "method": "jackknife_delete1"}},
        "indicators": {"no_internet": {"label": "x", "condition": "internet == 3"}},
        "output": {"dir": str(tmp_path / "out")},
    }


def small_config(tmp_path: Path, source: str | Path, change=None, **kwargs):
    settings = small_settings(tmp_path, source, **kwargs)
    if change is not None:
        change(settings)
    return load_config(write_config(tmp_path / "small.yaml", settings))


def persons(n: int, *, first_id: int = 1) -> pd.DataFrame:
    """n valid records for the small config; every numeric column float64 so that a test can put
    any bad value (3.5, NaN, inf) in any cell. Weights differ per row so rows are identifiable."""
    i = np.arange(n)
    return pd.DataFrame({
        "pid": np.arange(first_id, first_id + n, dtype=np.int64),
        "area": np.array(["A1", "A2", "A3"], dtype=object)[i % 3],
        "wt": 100.0 + i,
        "rw1": 200.0 + i,
        "rw2": 300.0 + i,
        "sex": (1.0 + i % 2),
        "age": (20.0 + i),
        "internet": (1.0 + i % 3),
    })


def read_all(config, geography=None):
    """Run plan_source + iter_batches; return (accepted, rejects, final FileCount by file name, batches)."""
    if geography is None:
        geography, _ = read_geography(config)
    files = plan_source(config)
    batches = list(iter_batches(config, files, geography))
    accepted = pd.concat([b.frame for b in batches], ignore_index=True)
    rejects = pd.concat([b.rejects for b in batches], ignore_index=True)
    counts = {b.count.path.name: b.count for b in batches}
    return accepted, rejects, counts, batches


def value_matches(shown, expected) -> bool:
    """The reject's `value` is text; compare it with the value that was put in the cell."""
    if isinstance(expected, str):
        return str(shown) == expected
    if isinstance(expected, float) and math.isnan(expected):
        return str(shown).lower() in ("nan", "none", "<na>")
    return float(shown) == float(expected)


def input_data_error(call) -> str:
    with pytest.raises(InputDataError) as info:
        call()
    return str(info.value)


# --------------------------------------------------------------------------------------------
# read_geography


def test_demo_lookup_gives_the_units_of_every_level_aligned_with_the_csv(tmp_path, small_demo):
    config = demo_config(tmp_path, small_demo)
    geography, manifest = read_geography(config)
    csv = pd.read_csv(small_demo / "data" / "raw" / "demo_areas.csv", dtype=str, keep_default_na=False)

    assert geography.levels == tuple(LEVELS)
    # unit counts per level, from pandas on the same file (the demo has 1/5/30/300)
    expected_counts = {lv: csv[CODE[lv]].nunique() for lv in LEVELS}
    assert expected_counts == {"nation": 1, "region": 5, "district": 30, "area": 300}
    assert {lv: len(geography.codes[lv]) for lv in LEVELS} == expected_counts
    assert manifest["rows"] == len(csv) and len(manifest["sha256"]) == 64

    for lv in LEVELS:
        # every code once, and each name is the CSV's name of that code
        assert sorted(geography.codes[lv]) == sorted(csv[CODE[lv]].unique())
        name_of = csv.drop_duplicates(CODE[lv]).set_index(CODE[lv])[NAME[lv]]
        assert list(geography.names[lv]) == list(name_of.loc[list(geography.codes[lv])])

    # unit_index maps finest unit i to its parent at each level, as the CSV row of that unit says
    row_of = csv.set_index(CODE["area"]).loc[list(geography.finest_codes)]
    for lv in LEVELS:
        idx = geography.unit_index[lv]
        assert idx.shape == (300,) and idx.min() >= 0
        assert list(geography.codes[lv][idx]) == list(row_of.index if lv == "area" else row_of[CODE[lv]])

    # finest units are ordered by the codes of every level, coarsest first (DESIGN: fixed order)
    expected_order = csv.sort_values([CODE[lv] for lv in LEVELS])[CODE["area"]].tolist()
    assert list(geography.finest_codes) == expected_order

    # population travels with its unit
    assert np.array_equal(geography.population, row_of["population"].astype(float).to_numpy())


def test_finest_units_follow_the_tree_not_their_own_codes(tmp_path):
    # Area codes whose plain sort order (A9 < B2 < Z1) differs from the tree order, which sorts
    # by region first: R1 holds Z1, R2 holds B2 and A9 (A9 before B2 within R2). Rows shuffled.
    lookup = ("region_code,region_name,area_code,area_name\n"
              "R2,South,B2,Bravo\nR1,North,Z1,Zulu\nR2,South,A9,Alpha\n")
    config = small_config(tmp_path, tmp_path / "p.parquet", lookup_text=lookup)
    geography, _ = read_geography(config)
    # worked by hand: order (R1,Z1), (R2,A9), (R2,B2)
    assert list(geography.codes["area"]) == ["Z1", "A9", "B2"]
    assert list(geography.names["area"]) == ["Zulu", "Alpha", "Bravo"]
    assert list(geography.codes["region"]) == ["R1", "R2"]
    assert list(geography.names["region"]) == ["North", "South"]
    assert geography.unit_index["region"].tolist() == [0, 1, 1]
    assert geography.unit_index["area"].tolist() == [0, 1, 2]


def write_lookup(tmp_path: Path, frame: pd.DataFrame) -> Path:
    path = tmp_path / "lookup.csv"
    frame.to_csv(path, index=False)
    return path


def demo_lookup(small_demo: Path) -> pd.DataFrame:
    return pd.read_csv(small_demo / "data" / "raw" / "demo_areas.csv", dtype=str, keep_default_na=False)


def test_a_district_under_two_regions_is_not_a_tree(tmp_path, small_demo):
    frame = demo_lookup(small_demo)
    district = frame[CODE["district"]].iloc[0]
    rows = frame.index[frame[CODE["district"]] == district]
    other_region = sorted(set(frame[CODE["region"]]) - {frame.loc[rows[0], CODE["region"]]})[0]
    other_name = frame.loc[frame[CODE["region"]] == other_region, NAME["region"]].iloc[0]
    frame.loc[rows[-1], [CODE["region"], NAME["region"]]] = [other_region, other_name]
    config = demo_config(tmp_path, small_demo, lookup=write_lookup(tmp_path, frame))
    text = input_data_error(lambda: read_geography(config))
    assert repr(district) in text and "tree" in text


def test_a_finest_code_on_two_rows_is_an_error(tmp_path, small_demo):
    frame = demo_lookup(small_demo)
    frame = pd.concat([frame, frame.iloc[[7]]], ignore_index=True)  # the same area row twice
    code = frame[CODE["area"]].iloc[7]
    config = demo_config(tmp_path, small_demo, lookup=write_lookup(tmp_path, frame))
    text = input_data_error(lambda: read_geography(config))
    assert repr(code) in text


def test_a_code_with_two_names_is_an_error(tmp_path, small_demo):
    frame = demo_lookup(small_demo)
    region = frame[CODE["region"]].iloc[0]
    frame.loc[0, NAME["region"]] = "Somewhere Else"
    config = demo_config(tmp_path, small_demo, lookup=write_lookup(tmp_path, frame))
    text = input_data_error(lambda: read_geography(config))
    assert repr(region) in text and NAME["region"] in text


def test_a_missing_lookup_column_is_named(tmp_path, small_demo):
    frame = demo_lookup(small_demo).drop(columns=[NAME["district"]])
    config = demo_config(tmp_path, small_demo, lookup=write_lookup(tmp_path, frame))
    text = input_data_error(lambda: read_geography(config))
    assert NAME["district"] in text


def test_an_empty_code_is_reported_with_its_line_number(tmp_path, small_demo):
    frame = demo_lookup(small_demo)
    frame.loc[41, CODE["area"]] = ""  # data row 42 is line 43 of the file (line 1 is the header)
    config = demo_config(tmp_path, small_demo, lookup=write_lookup(tmp_path, frame))
    text = input_data_error(lambda: read_geography(config))
    assert CODE["area"] in text and "43" in text


def test_a_negative_population_is_an_error(tmp_path, small_demo):
    frame = demo_lookup(small_demo)
    frame.loc[5, "population"] = "-12"
    config = demo_config(tmp_path, small_demo, lookup=write_lookup(tmp_path, frame))
    text = input_data_error(lambda: read_geography(config))
    assert "population" in text and "-12" in text


# --------------------------------------------------------------------------------------------
# plan_source


def test_a_missing_column_is_listed_with_its_key_path(tmp_path):
    path = tmp_path / "p.parquet"
    persons(5).drop(columns=["age", "rw2"]).to_parquet(path)
    text = input_data_error(lambda: plan_source(small_config(tmp_path, path)))
    assert "'age'" in text and "source.variables.age" in text
    assert "'rw2'" in text and "design.replicates" in text


def test_a_column_of_the_wrong_parquet_type_names_column_type_and_key_path(tmp_path):
    path = tmp_path / "p.parquet"
    frame = persons(5)
    table = arrow.Table.from_pandas(frame, preserve_index=False)
    table = table.set_column(table.schema.get_field_index("age"), "age",
                             arrow.array([str(int(a)) for a in frame["age"]], type=arrow.string()))
    pq.write_table(table, path)
    text = input_data_error(lambda: plan_source(small_config(tmp_path, path)))
    assert "'age'" in text and "string" in text and "source.variables.age" in text


def test_a_glob_reads_every_matching_file_in_sorted_order(tmp_path):
    folder = tmp_path / "parts"
    folder.mkdir()
    # written in reverse name order, so that sorted order is not creation order
    persons(7, first_id=101).to_parquet(folder / "part-b.parquet")
    persons(4, first_id=1).to_parquet(folder / "part-a.parquet")
    config = small_config(tmp_path, folder / "part-*.parquet")
    files = plan_source(config)
    assert [f.path.name for f in files] == ["part-a.parquet", "part-b.parquet"]
    assert all(f.kind == "parquet" for f in files)

    accepted, rejects, counts, batches = read_all(config)
    assert len(rejects) == 0
    assert [b.count.path.name for b in batches] == ["part-a.parquet", "part-b.parquet"]
    assert (counts["part-a.parquet"].read, counts["part-b.parquet"].read) == (4, 7)
    assert counts["part-a.parquet"].accepted + counts["part-b.parquet"].accepted == 11
    assert list(accepted["pid"]) == [str(i) for i in [1, 2, 3, 4, *range(101, 108)]]


def test_a_glob_matching_nothing_is_an_error(tmp_path):
    text = input_data_error(lambda: plan_source(small_config(tmp_path, tmp_path / "nothing-*.parquet")))
    assert "nothing-*.parquet" in text


def test_an_unsupported_file_type_is_an_error(tmp_path):
    path = tmp_path / "p.json"
    persons(3).to_json(path)
    text = input_data_error(lambda: plan_source(small_config(tmp_path, path)))
    assert "p.json" in text and "unsupported" in text


def test_a_zero_byte_csv_is_reported_empty(tmp_path):
    path = tmp_path / "p.csv"
    path.write_bytes(b"")
    text = input_data_error(lambda: plan_source(small_config(tmp_path, path)))
    assert "p.csv" in text and "empty" in text


# --------------------------------------------------------------------------------------------
# iter_batches on the demo


def test_demo_parquet_in_small_batches_accepts_every_row(tmp_path, small_demo):
    batch_rows = 700
    config = demo_config(tmp_path, small_demo,
                         lambda s: s["source"].update(batch_rows=batch_rows))
    path = small_demo / "data" / "raw" / "demo_persons.parquet"
    rows = pq.read_metadata(path).num_rows
    accepted, rejects, counts, batches = read_all(config)

    assert len(batches) == math.ceil(rows / batch_rows)
    assert [len(b.frame) for b in batches[:-1]] == [batch_rows] * (len(batches) - 1)
    assert len(rejects) == 0 and len(accepted) == rows
    count = counts[path.name]
    assert (count.read, count.accepted, count.rejected) == (rows, rows, 0)
    assert count.read == count.accepted + count.rejected
    assert sum(b.rows_read for b in batches) == rows and sum(b.rows_rejected for b in batches) == 0
    # record ids in file order, as pandas reads them
    expected_ids = pd.read_parquet(path, columns=["person_id"])["person_id"].astype(str).tolist()
    assert accepted["person_id"].tolist() == expected_ids
    # missing values where missing is allowed stay in, as NaN (the demo has some)
    direct = pd.read_parquet(path, columns=["internet", "smoker"])
    assert direct["smoker"].isna().sum() > 0
    for col in ("internet", "smoker"):
        assert np.array_equal(accepted[col].isna().to_numpy(), direct[col].isna().to_numpy())


# --------------------------------------------------------------------------------------------
# Row rules


def run_with_bad_cell(tmp_path, column, value, *, row=3, n=6):
    """n valid records with `value` put in `column` on data row `row`; returns read_all output."""
    frame = persons(n)
    if column == "area":
        frame[column] = frame[column].astype(object)
    frame.loc[row - 1, column] = value
    path = tmp_path / "p.parquet"
    frame.to_parquet(path)
    return read_all(small_config(tmp_path, path))


ROW_RULES = [
    pytest.param("wt", -1.0, RejectReason.WEIGHT_NOT_POSITIVE, id="negative-weight"),
    pytest.param("wt", 0.0, RejectReason.WEIGHT_NOT_POSITIVE, id="zero-weight"),
    pytest.param("wt", np.inf, RejectReason.WEIGHT_NOT_POSITIVE, id="infinite-weight"),
    # RejectReason: weight_not_positive covers a *missing* weight too, and
    # replicate_weight_invalid a missing replicate weight (not the generic missing_not_allowed)
    pytest.param("wt", np.nan, RejectReason.WEIGHT_NOT_POSITIVE, id="nan-weight"),
    pytest.param("rw2", np.inf, RejectReason.REPLICATE_WEIGHT_INVALID, id="infinite-replicate-weight"),
    pytest.param("rw1", -0.5, RejectReason.REPLICATE_WEIGHT_INVALID, id="negative-replicate-weight"),
    pytest.param("rw1", np.nan, RejectReason.REPLICATE_WEIGHT_INVALID, id="nan-replicate-weight"),
    pytest.param("age", 140.0, RejectReason.OUT_OF_RANGE, id="age-above-max"),
    pytest.param("age", -1.0, RejectReason.OUT_OF_RANGE, id="age-below-min"),
    pytest.param("age", 3.5, RejectReason.NOT_AN_INTEGER, id="age-fraction"),
    pytest.param("sex", 7.0, RejectReason.VALUE_NOT_ALLOWED, id="sex-not-allowed"),
    pytest.param("sex", np.nan, RejectReason.MISSING_NOT_ALLOWED, id="sex-missing"),
    pytest.param("internet", 4.0, RejectReason.VALUE_NOT_ALLOWED, id="internet-not-allowed"),
    pytest.param("area", "ZZ", RejectReason.UNKNOWN_GEOGRAPHY, id="unknown-area"),
]


@pytest.mark.parametrize("column, value, rule", ROW_RULES)
def test_a_row_breaking_one_rule_is_rejected_with_column_rule_value_and_row(tmp_path, column, value, rule):
    accepted, rejects, counts, _ = run_with_bad_cell(tmp_path, column, value, row=3)
    assert len(rejects) == 1, rejects.to_string()
    reject = rejects.iloc[0]
    assert reject["column"] == column
    assert reject["rule"] == rule.value
    assert reject["row_number"] == 3
    assert reject["record_id"] == "3"  # pid of data row 3
    assert reject["source_file"] == "p.parquet"
    assert value_matches(reject["value"], value), reject["value"]
    assert accepted["pid"].tolist() == ["1", "2", "4", "5", "6"]
    count = counts["p.parquet"]
    assert (count.read, count.accepted, count.rejected) == (6, 5, 1)


@pytest.mark.parametrize("column, value", [("rw1", 0.0), ("internet", np.nan)])
def test_values_the_rules_allow_are_accepted(tmp_path, column, value):
    # a replicate weight may be 0 (only < 0 is invalid); internet declares `missing: allowed`
    accepted, rejects, counts, _ = run_with_bad_cell(tmp_path, column, value, row=3)
    assert len(rejects) == 0 and len(accepted) == 6
    got = accepted.loc[accepted["pid"] == "3", column].iloc[0]
    assert (math.isnan(got) if math.isnan(value) else got == value)


def test_a_missing_value_in_a_nullable_integer_column_is_missing_not_allowed(tmp_path):
    # sex stored as pandas' nullable Int64 (Parquet int64 with a null), as many exports write it
    frame = persons(4)
    frame["sex"] = pd.array([1, 2, None, 1], dtype="Int64")
    frame.to_parquet(tmp_path / "p.parquet")
    accepted, rejects, counts, _ = read_all(small_config(tmp_path, tmp_path / "p.parquet"))
    assert rejects[["row_number", "column", "rule"]].values.tolist() == [[3, "sex", "missing_not_allowed"]]
    assert accepted["sex"].dtype == np.float64 and accepted["sex"].tolist() == [1.0, 2.0, 1.0]


def test_a_row_failing_two_rules_is_listed_twice_and_counted_once(tmp_path):
    frame = persons(5)
    frame.loc[1, "sex"] = 7.0      # data row 2
    frame.loc[1, "age"] = 140.0    # data row 2 again
    frame.loc[3, "wt"] = -5.0      # data row 4
    frame.to_parquet(tmp_path / "p.parquet")
    accepted, rejects, counts, batches = read_all(small_config(tmp_path, tmp_path / "p.parquet"))
    got = sorted(map(tuple, rejects[["row_number", "column", "rule"]].values.tolist()))
    assert got == [(2, "age", "out_of_range"), (2, "sex", "value_not_allowed"), (4, "wt", "weight_not_positive")]
    count = counts["p.parquet"]
    assert (count.read, count.accepted, count.rejected) == (5, 3, 2)
    assert sum(b.rows_rejected for b in batches) == 2
    assert accepted["pid"].tolist() == ["1", "3", "5"]


def test_row_numbers_count_from_the_start_of_the_file_across_batches(tmp_path):
    frame = persons(20)
    frame.loc[16, "sex"] = 7.0  # data row 17, in the fourth batch of 5
    frame.to_parquet(tmp_path / "p.parquet")
    config = small_config(tmp_path, tmp_path / "p.parquet", lambda s: s["source"].update(batch_rows=5))
    accepted, rejects, counts, batches = read_all(config)
    assert len(batches) == 4
    assert rejects[["row_number", "record_id", "rule"]].values.tolist() == [[17, "17", "value_not_allowed"]]


def test_a_duplicate_id_within_a_batch_keeps_the_first(tmp_path):
    frame = persons(6)
    frame.loc[4, "pid"] = 2  # data row 5 repeats the id of data row 2
    frame.to_parquet(tmp_path / "p.parquet")
    accepted, rejects, counts, _ = read_all(small_config(tmp_path, tmp_path / "p.parquet"))
    assert rejects[["row_number", "record_id", "column", "rule", "value"]].values.tolist() == \
        [[5, "2", "pid", "duplicate_record_id", "2"]]
    kept = accepted[accepted["pid"] == "2"]
    assert len(kept) == 1 and kept["wt"].iloc[0] == frame.loc[1, "wt"]  # row 2's weight, not row 5's


def test_a_duplicate_id_in_a_later_batch_keeps_the_first(tmp_path):
    frame = persons(10)
    frame.loc[7, "pid"] = 2  # data row 8 (second batch of 4) repeats data row 2 (first batch)
    frame.to_parquet(tmp_path / "p.parquet")
    config = small_config(tmp_path, tmp_path / "p.parquet", lambda s: s["source"].update(batch_rows=4))
    accepted, rejects, counts, batches = read_all(config)
    assert len(batches) == 3
    assert rejects[["row_number", "record_id", "rule"]].values.tolist() == [[8, "2", "duplicate_record_id"]]
    assert accepted.loc[accepted["pid"] == "2", "wt"].tolist() == [frame.loc[1, "wt"]]
    assert (counts["p.parquet"].read, counts["p.parquet"].rejected) == (10, 1)


def test_a_duplicate_id_in_a_later_file_keeps_the_first(tmp_path):
    folder = tmp_path / "parts"
    folder.mkdir()
    persons(5, first_id=1).to_parquet(folder / "a.parquet")   # ids 1..5
    persons(5, first_id=5).to_parquet(folder / "b.parquet")   # ids 5..9: id 5 again on b's row 1
    accepted, rejects, counts, _ = read_all(small_config(tmp_path, folder / "*.parquet"))
    assert rejects[["source_file", "row_number", "record_id", "rule"]].values.tolist() == \
        [["b.parquet", 1, "5", "duplicate_record_id"]]
    assert (counts["a.parquet"].read, counts["a.parquet"].rejected) == (5, 0)
    assert (counts["b.parquet"].read, counts["b.parquet"].accepted, counts["b.parquet"].rejected) == (5, 4, 1)
    assert accepted["pid"].tolist() == [str(i) for i in range(1, 10)]
    # the kept id 5 is a.parquet's last row (weight 104), not b.parquet's first (weight 100)
    assert accepted.loc[accepted["pid"] == "5", "wt"].tolist() == [104.0]


# --------------------------------------------------------------------------------------------
# CSV


def test_arrow_types_become_the_working_types(tmp_path):
    # the batch goes from Arrow to the working types without pandas in between: expected values
    # are pyarrow's own reading of each column (to_pylist), put in the working form by hand
    table = arrow.table({
        "pid": arrow.array([7, 8, 9], arrow.int64()),
        "area": arrow.array(["A1", "A2", "A3"]).dictionary_encode(),
        "wt": arrow.array([1.5, 2.0, 3.0]),
        "rw1": arrow.array([1, 2, 3], arrow.int32()),
        "rw2": arrow.array([None, None, None], arrow.null()),
        "sex": arrow.array([True, False, None]),
        "age": arrow.array([20, None, 40], arrow.int8()),
        "internet": arrow.array([1, 2, 3], arrow.uint8()),
    })
    config = small_config(tmp_path, tmp_path / "unused.parquet")
    typed, rejects = _coerce_types(config, table.to_batches()[0])
    assert len(rejects) == 0
    assert typed["pid"].tolist() == [str(v) for v in table["pid"].to_pylist()]
    assert typed["area"].tolist() == table["area"].to_pylist()
    for col in ("wt", "rw1", "rw2", "sex", "age", "internet"):
        expected = [np.nan if v is None else float(v) for v in table[col].to_pylist()]
        assert typed[col].dtype == np.float64
        np.testing.assert_array_equal(typed[col].to_numpy(), expected)


def test_demo_csv_gives_the_same_accepted_frame_as_the_parquet(tmp_path, small_demo):
    raw = small_demo / "data" / "raw"
    from_parquet, rejects_p, _, _ = read_all(demo_config(tmp_path, small_demo))
    from_csv, rejects_c, counts, _ = read_all(
        demo_config(tmp_path, small_demo, source=raw / "demo_persons.csv"))
    rows = len(pd.read_csv(raw / "demo_persons.csv", usecols=["person_id"]))
    assert len(rejects_p) == 0 and len(rejects_c) == 0
    assert len(from_csv) == rows and counts["demo_persons.csv"].read == rows
    # the same record ids, in the same order, and bit-identical numbers (the CSV holds the
    # shortest round-trip text of each double, so parsing it gives back the same double)
    assert from_csv["person_id"].tolist() == from_parquet["person_id"].tolist()
    pd.testing.assert_frame_equal(from_csv, from_parquet, check_exact=True)


def test_gzip_csv_reads_like_the_plain_csv(tmp_path, small_demo):
    raw = small_demo / "data" / "raw"
    gz = tmp_path / "demo_persons.csv.gz"
    with open(raw / "demo_persons.csv", "rb") as src, gzip.open(gz, "wb") as dst:
        shutil.copyfileobj(src, dst)
    plain, _, _, _ = read_all(demo_config(tmp_path, small_demo, source=raw / "demo_persons.csv"))
    zipped, rejects, counts, _ = read_all(demo_config(tmp_path, small_demo, source=gz))
    assert len(rejects) == 0 and counts[gz.name].read == len(plain)
    pd.testing.assert_frame_equal(zipped, plain, check_exact=True)


def write_csv(path: Path, frame: pd.DataFrame, *, edit=None) -> Path:
    """Write `frame` as CSV; `edit(lines)` may change the data lines (lines[0] is data row 1)."""
    text = frame.to_csv(index=False)
    header, *lines = text.splitlines()
    if edit is not None:
        edit(lines)
    path.write_text("\n".join([header, *lines]) + "\n")
    return path


def set_field(lines: list[str], row: int, field: int, text: str) -> None:
    parts = lines[row - 1].split(",")
    parts[field] = text
    lines[row - 1] = ",".join(parts)


CSV_FIELDS = list(persons(1).columns)  # pid, area, wt, rw1, rw2, sex, age, internet


def test_text_in_a_numeric_csv_column_rejects_that_row_only(tmp_path):
    path = write_csv(tmp_path / "p.csv", persons(6),
                     edit=lambda lines: set_field(lines, 4, CSV_FIELDS.index("internet"), "abc"))
    accepted, rejects, counts, _ = read_all(small_config(tmp_path, path))
    # internet allows missing, so the only complaint about data row 4 is the text itself
    assert rejects[["row_number", "record_id", "column", "rule", "value"]].values.tolist() == \
        [[4, "4", "internet", "not_a_number", "abc"]]
    assert accepted["pid"].tolist() == ["1", "2", "3", "5", "6"]
    assert (counts["p.csv"].read, counts["p.csv"].accepted, counts["p.csv"].rejected) == (6, 5, 1)


def test_text_in_a_required_numeric_csv_column_rejects_that_row(tmp_path):
    path = write_csv(tmp_path / "p.csv", persons(6),
                     edit=lambda lines: set_field(lines, 2, CSV_FIELDS.index("age"), " abc "))
    accepted, rejects, counts, _ = read_all(small_config(tmp_path, path))
    assert set(rejects["row_number"]) == {2}
    # one reject: the text, not a second 'missing' line for the value it could not become
    assert rejects[["column", "rule", "value"]].values.tolist() == [["age", "not_a_number", " abc "]]
    assert accepted["pid"].tolist() == ["1", "3", "4", "5", "6"]
    assert counts["p.csv"].rejected == 1


def test_a_csv_line_with_an_extra_field_is_a_malformed_row_and_the_rest_are_read(tmp_path, small_demo):
    # The demo CSV's lines are ~1.5 kB, so with batch_rows 2000 the file is read in several
    # blocks and data row 1500 lies well past the first; see below for a malformed line near the top.
    raw = small_demo / "data" / "raw"
    lines = (raw / "demo_persons.csv").read_text().splitlines()
    rows = len(lines) - 1
    bad_id = lines[1500].split(",")[0]
    lines[1500] += ",999"  # lines[0] is the header, so lines[1500] is data row 1500
    sex = lines[0].split(",").index("sex")
    for data_row in (1502, 2500):  # just after the malformed line, and several batches later
        parts = lines[data_row].split(",")
        parts[sex] = "7"
        lines[data_row] = ",".join(parts)
    sex_ids = [lines[r].split(",")[0] for r in (1502, 2500)]
    path = tmp_path / "m.csv"
    path.write_text("\n".join(lines) + "\n")
    accepted, rejects, counts, _ = read_all(
        demo_config(tmp_path, small_demo, lambda s: s["source"].update(batch_rows=2000), source=path))
    assert rejects.sort_values("row_number")[["row_number", "record_id", "rule"]].values.tolist() == [
        [1500, None, "malformed_row"], [1502, sex_ids[0], "value_not_allowed"],
        [2500, sex_ids[1], "value_not_allowed"]]
    count = counts["m.csv"]
    assert (count.read, count.accepted, count.rejected) == (rows, rows - 3, 3)
    expected_ids = pd.read_csv(raw / "demo_persons.csv", usecols=["person_id"])["person_id"].astype(str)
    assert accepted["person_id"].tolist() == [i for i in expected_ids if i not in (bad_id, *sex_ids)]


def test_a_malformed_line_near_the_top_of_a_small_csv_is_a_reject_not_a_file_error(tmp_path):
    path = write_csv(tmp_path / "p.csv", persons(6), edit=lambda lines: lines.__setitem__(1, lines[1] + ",9"))
    accepted, rejects, counts, _ = read_all(small_config(tmp_path, path))
    assert rejects[["row_number", "rule"]].values.tolist() == [[2, "malformed_row"]]
    assert accepted["pid"].tolist() == ["1", "3", "4", "5", "6"]
    assert (counts["p.csv"].read, counts["p.csv"].rejected) == (6, 1)


def test_row_numbers_after_a_malformed_line_in_the_same_batch_are_file_rows(tmp_path):
    # The reader drops malformed lines from the batch, so a later row's position in the batch is
    # one less than its row in the file; the reject must still name the file row.
    def edit(lines):
        lines[1] += ",9"                                      # data row 2: malformed
        lines[2] += ",9,9"                                    # data row 3: malformed
        set_field(lines, 5, CSV_FIELDS.index("sex"), "7")     # data row 5: sex 7
        set_field(lines, 7, CSV_FIELDS.index("age"), "3.5")   # data row 7: age 3.5

    path = write_csv(tmp_path / "p.csv", persons(8), edit=edit)
    accepted, rejects, counts, _ = read_all(small_config(tmp_path, path))
    got = sorted(map(tuple, rejects[["row_number", "record_id", "rule"]].values.tolist()))
    assert got == [(2, None, "malformed_row"), (3, None, "malformed_row"),
                   (5, "5", "value_not_allowed"), (7, "7", "not_an_integer")]
    assert accepted["pid"].tolist() == ["1", "4", "6", "8"]
    assert (counts["p.csv"].read, counts["p.csv"].accepted, counts["p.csv"].rejected) == (8, 4, 4)


# --------------------------------------------------------------------------------------------
# SeenIds


def test_seen_ids_flags_integer_repeats_within_and_across_calls():
    seen = SeenIds()
    first = seen.mark(pd.Series([5, -3, 5, 2**62, 7], dtype=np.int64))
    assert first.tolist() == [False, False, True, False, False]
    second = seen.mark(pd.Series([8, 7, -3, 9, 8, 2**62 + 1], dtype=np.int64))
    assert second.tolist() == [False, True, True, False, True, False]
    assert seen.mark(pd.Series([], dtype=np.int64)).tolist() == []
    assert seen.mark(pd.Series([10**18, 4], dtype=np.int64)).tolist() == [False, False]


def test_seen_ids_flags_string_repeats_within_and_across_calls():
    seen = SeenIds()
    first = seen.mark(pd.Series(["a", "b", "a", "A", "ab"], dtype=object))
    assert first.tolist() == [False, False, True, False, False]
    second = seen.mark(pd.Series(["c", "b", "ab", "c", "a "], dtype=object))
    assert second.tolist() == [False, True, True, True, False]


def test_seen_ids_on_many_ids_agrees_with_python_sets():
    rng = np.random.default_rng(3)
    seen, reference = SeenIds(), set()
    for _ in range(40):  # batches of varied size: the sorted runs are merged many times over
        ids = rng.integers(0, 20_000, size=int(rng.integers(0, 800)))
        expected = []
        for i in ids:  # a plain Python set, one id at a time
            expected.append(int(i) in reference)
            reference.add(int(i))
        assert seen.mark(pd.Series(ids)).tolist() == expected


# --------------------------------------------------------------------------------------------
# build_row_schema


def test_row_schema_is_a_pandera_schema_whose_checks_are_reject_reasons(tmp_path):
    config = small_config(tmp_path, tmp_path / "p.parquet")
    geography, _ = read_geography(config)
    schema = build_row_schema(config, geography)
    assert isinstance(schema, pa.DataFrameSchema)
    reasons = {r.value for r in RejectReason}
    checks = {name: {c.name for c in column.checks} for name, column in schema.columns.items()}
    assert all(names <= reasons for names in checks.values()), checks
    assert checks["area"] == {"unknown_geography"}
    assert checks["wt"] == {"weight_not_positive"}
    assert checks["rw1"] == checks["rw2"] == {"replicate_weight_invalid"}
    assert checks["age"] == {"not_an_integer", "out_of_range"}
    assert checks["sex"] == {"not_an_integer", "value_not_allowed"}
    # missing values: forbidden by default, allowed where declared
    assert not schema.columns["sex"].nullable and schema.columns["internet"].nullable
    assert not schema.columns["pid"].nullable and not schema.columns["area"].nullable


@pytest.mark.parametrize("column,value", [
    (None, None), ("area", "ZZ"), ("area", None), ("pid", None), ("wt", 0.0), ("wt", np.nan), ("rw1", -1.0),
    ("rw2", np.inf), ("sex", 3.0), ("sex", 1.5), ("sex", np.nan), ("age", 200.0), ("age", 30.5),
    ("internet", np.nan), ("internet", 7.0)])
def test_one_pass_rule_check_agrees_with_the_pandera_schema(tmp_path, column, value):
    """The vectorised pass that lets a clean batch skip the schema must say 'all rows pass'
    exactly when pandera (the reference, which reports each failure) finds none: one bad value per
    rule, and a clean frame."""
    config = small_config(tmp_path, tmp_path / "p.parquet")
    geography, _ = read_geography(config)
    frame = persons(6)
    if column is not None:
        frame[column] = frame[column].astype(object) if isinstance(value, str) or value is None else frame[column]
        frame.loc[2, column] = value
    try:
        build_row_schema(config, geography).validate(frame, lazy=True)
        pandera_passes = True
    except pa.errors.SchemaErrors:
        pandera_passes = False
    assert _rules_hold(row_rules(config, geography), frame) == pandera_passes
    assert pandera_passes == (column is None or (column == "internet" and value != 7.0 and np.isnan(value)))
