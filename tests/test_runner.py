"""The runner end to end, in-process, on the small demo: the release layout and columns of
DESIGN §3, estimates recomputed independently with pandas from the microdata, byte-for-byte
reproducibility, refusal of an existing release and of a locked output folder, and rejects.

Expected values come from the DESIGN contract, from identities (read = accepted + rejected;
sha256 of the file on disk) or from a direct pandas recomputation on the input microdata, never
from an earlier output of ratebook itself.
"""

from __future__ import annotations

import csv
import fcntl
import hashlib
import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from pipeline.config import load_config
from pipeline.errors import ReleaseRefused
from pipeline.runner import LOCK_NAME, check_inputs, run
from tests.conftest import demo_settings, write_config

# DESIGN §3, "Public estimates columns, in this order", with the demo's two domains (sex, age_group)
PUBLIC_COLUMNS = ["indicator", "geo_level", "geo_code", "geo_name", "sex", "age_group", "estimate",
                  "std_error", "ci_lower", "ci_upper", "margin_of_error", "cv", "sample_size", "weighted_base",
                  "weighted_count", "design_effect", "effective_n", "status", "reasons", "note"]
FIGURE_COLUMNS = PUBLIC_COLUMNS[PUBLIC_COLUMNS.index("estimate"): PUBLIC_COLUMNS.index("effective_n") + 1]
STATUSES = {"published", "caution", "suppressed"}
RELEASE_FILES = {"public/estimates.parquet", "public/estimates.csv", "public/metadata.json",
                 "internal/cells.parquet", "manifest.json"}


def make_project(root: Path, small_demo: Path, settings: dict | None = None) -> Path:
    """What the `project` fixture builds, for module-scoped use: configs/demo.yaml + data/."""
    shutil.copytree(small_demo / "data", root / "data")
    (root / "configs").mkdir(parents=True)
    write_config(root / "configs" / "demo.yaml", settings or demo_settings())
    return root


def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def files_under(root: Path) -> set[str]:
    return {str(p.relative_to(root)) for p in root.rglob("*") if p.is_file()}


@pytest.fixture(scope="module")
def release(tmp_path_factory, small_demo):
    """One complete release of the small demo, shared by the read-only checks below."""
    root = make_project(tmp_path_factory.mktemp("e2e"), small_demo)
    summary = run(root / "configs" / "demo.yaml", release_id="e2e-1")
    return {"root": root, "summary": summary, "dir": root / "data" / "out" / "e2e-1",
            "input": root / "data" / "raw" / "demo_persons.parquet"}


# --------------------------------------------------------------------------------------------
# End to end: layout, columns, statuses, manifest, metadata


def test_release_folder_layout_is_as_in_design(release):
    rel = release["dir"]
    out = rel.parent
    assert release["summary"].release_dir == rel
    # no rejects in the clean demo, so no rejects.parquet (DESIGN §3: "only when there are any")
    assert files_under(rel) == RELEASE_FILES
    assert release["summary"].rows_rejected == 0
    # `latest` is a text file naming the newest complete release
    assert (out / "latest").read_text().strip() == "e2e-1"
    # nothing left from staging
    assert sorted(p.name for p in out.iterdir() if not p.name.startswith(".ratebook")) == ["e2e-1", "latest"]


def test_public_columns_are_exactly_the_contract_in_order(release):
    parquet = pq.read_table(release["dir"] / "public" / "estimates.parquet")
    assert parquet.column_names == PUBLIC_COLUMNS
    with open(release["dir"] / "public" / "estimates.csv", newline="", encoding="utf-8") as fh:
        header = next(csv.reader(fh))
    assert header == PUBLIC_COLUMNS


def test_status_values_reasons_and_published_figures(release):
    est = pd.read_parquet(release["dir"] / "public" / "estimates.parquet")
    metadata = json.loads((release["dir"] / "public" / "metadata.json").read_text())
    assert set(est["status"]) <= STATUSES
    assert (est["status"] == "published").any()  # the demo is big enough to publish something

    # reasons: ';'-joined known codes (the codes metadata.json explains), no empty parts
    known = set(metadata["reason_codes"])
    for text in est["reasons"].fillna("").unique():
        if text:
            parts = text.split(";")
            assert all(parts), text
            assert set(parts) <= known, text
    # a withheld or flagged row always says why
    assert (est.loc[est["status"] != "published", "reasons"].fillna("") != "").all()

    pub = est[est["status"] == "published"]
    assert pub["estimate"].between(0, 1).all()
    assert (pub["ci_lower"] <= pub["estimate"]).all() and (pub["estimate"] <= pub["ci_upper"]).all()
    assert (pub["ci_lower"] >= 0).all() and (pub["ci_upper"] <= 1).all()


def test_suppressed_rows_have_every_figure_empty_in_parquet_and_csv(release):
    est = pd.read_parquet(release["dir"] / "public" / "estimates.parquet")
    suppressed = est["status"] == "suppressed"
    assert suppressed.any()
    assert est.loc[suppressed, FIGURE_COLUMNS].isna().all().all()
    # the rows that are printed do carry their figures (what suppression empties is only theirs)
    shown = est.loc[~suppressed, ["estimate", "std_error", "sample_size"]]
    assert shown.notna().all().all()

    # CSV read as raw text: the figure fields of suppressed rows are the empty string
    with open(release["dir"] / "public" / "estimates.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == len(est)
    n_suppressed = 0
    for row in rows:
        if row["status"] == "suppressed":
            n_suppressed += 1
            assert all(row[c] == "" for c in FIGURE_COLUMNS), row
    assert n_suppressed == int(suppressed.sum())


def test_manifest_reconciles_rows_and_hashes_outputs(release):
    rel = release["dir"]
    manifest = json.loads((rel / "manifest.json").read_text())
    rec = manifest["reconciliation"]
    assert rec["rows_read"] == rec["rows_accepted"] + rec["rows_rejected"]
    # rows read = rows in the input file, counted by pyarrow directly
    rows_in_file = pq.ParquetFile(release["input"]).metadata.num_rows
    assert rec["rows_read"] == rows_in_file
    files = manifest["inputs"]["microdata"]
    assert len(files) == 1
    for entry in files:
        assert entry["rows_read"] == entry["rows_accepted"] + entry["rows_rejected"]
        assert entry["rows_read"] == pq.ParquetFile(entry["path"]).metadata.num_rows
        assert entry["sha256"] == sha256(Path(entry["path"]))
    assert sum(e["rows_read"] for e in files) == rec["rows_read"]
    assert sum(e["rows_rejected"] for e in files) == rec["rows_rejected"]
    # every output file listed with the sha256 of the bytes on disk; every file but the manifest listed
    listed = {o["path"]: o["sha256"] for o in manifest["outputs"]}
    assert set(listed) == files_under(rel) - {"manifest.json"}
    for path, digest in listed.items():
        assert digest == sha256(rel / path), path


def test_metadata_explains_every_public_column_and_every_reason_code_used(release):
    metadata = json.loads((release["dir"] / "public" / "metadata.json").read_text())
    est = pd.read_parquet(release["dir"] / "public" / "estimates.parquet")
    for column in PUBLIC_COLUMNS:
        assert metadata["columns"].get(column, "").strip(), f"column {column!r} is not explained"
    used = {code for text in est["reasons"].fillna("") if text for code in text.split(";")}
    assert used, "the demo release should use some reason codes"
    for code in used:
        assert metadata["reason_codes"].get(code, "").strip(), f"reason code {code!r} is not explained"
    for status in set(est["status"]):
        assert metadata["status_codes"].get(status, "").strip()


def test_check_inputs_counts_every_row_and_writes_nothing(project):
    config = load_config(project / "configs" / "demo.yaml")
    found = check_inputs(config)
    rows_in_file = pq.ParquetFile(project / "data" / "raw" / "demo_persons.parquet").metadata.num_rows
    assert found.read == rows_in_file == found.accepted + found.rejected
    assert [c.path.name for c in found.files] == ["demo_persons.parquet"]
    assert len(found.rejects) == found.rejected == 0
    assert not config.output_dir.exists()


# --------------------------------------------------------------------------------------------
# Independent recomputation from the microdata (pandas)

# configs/demo.yaml's definitions, written out in pandas; the test checks the config still says so
INDICATORS = {
    "no_internet": {"universe": lambda d: pd.Series(True, index=d.index), "column": "internet", "code": 3,
                    "config": {"condition": "internet == 3"}},
    "smoker": {"universe": lambda d: d["age"] >= 15, "column": "smoker", "code": 1,
               "config": {"universe": "age >= 15", "condition": "smoker == 1"}},
}


def base_and_y(micro: pd.DataFrame, indicator: str) -> tuple[pd.Series, pd.Series]:
    """Records in the base (universe, condition column present) and y (condition holds)."""
    spec = INDICATORS[indicator]
    base = spec["universe"](micro).astype(bool) & micro[spec["column"]].notna()
    y = (micro[spec["column"]] == spec["code"]).fillna(False).astype(float)
    return base, y


def nation_code(root: Path) -> str:
    codes = pd.read_csv(root / "data" / "raw" / "demo_areas.csv", dtype=str)["nation_code"].unique()
    assert len(codes) == 1
    return codes[0]


def published_cell(est: pd.DataFrame, indicator: str, level: str, code: str) -> pd.Series:
    rows = est[(est["indicator"] == indicator) & (est["geo_level"] == level) & (est["geo_code"] == code)
               & (est["sex"] == "all") & (est["age_group"] == "all")]
    assert len(rows) == 1
    return rows.iloc[0]


def test_demo_config_defines_the_indicators_recomputed_here():
    settings = demo_settings()
    for name, spec in INDICATORS.items():
        for key, text in spec["config"].items():
            assert settings["indicators"][name][key] == text
        if "universe" not in spec["config"]:
            assert "universe" not in settings["indicators"][name]  # default: everybody


@pytest.mark.parametrize("indicator", ["no_internet", "smoker"])
def test_estimate_and_sample_size_match_pandas_recomputation(release, indicator):
    micro = pd.read_parquet(release["input"])
    areas = pd.read_csv(release["root"] / "data" / "raw" / "demo_areas.csv", dtype=str)
    micro = micro.merge(areas[["area_code", "region_code", "nation_code"]], left_on="area",
                        right_on="area_code", how="left", validate="many_to_one")
    assert micro["region_code"].notna().all()
    est = pd.read_parquet(release["dir"] / "public" / "estimates.parquet")
    internal = pd.read_parquet(release["dir"] / "internal" / "cells.parquet")
    base, y = base_and_y(micro, indicator)

    # the nation, and the region with the most records (surely published)
    region = micro.loc[base, "region_code"].value_counts().idxmax()
    nation = micro["nation_code"].iloc[0]
    for level, code, in_unit in (("nation", nation, micro["nation_code"] == nation),
                                 ("region", region, micro["region_code"] == region)):
        sel = base & in_unit
        w = micro.loc[sel, "wt"].astype(float)
        p_hat = float((w * y[sel]).sum() / w.sum())
        cell = published_cell(est, indicator, level, code)
        exact = published_cell(internal, indicator, level, code)  # unrounded internal cells
        assert cell["status"] != "suppressed", (indicator, level, code)
        assert exact["estimate"] == pytest.approx(p_hat, rel=1e-12, abs=0), (indicator, level, code)
        # the public file prints estimates to disclosure.decimals (4) places
        assert cell["estimate"] == round(exact["estimate"], 4), (indicator, level, code)
        assert int(cell["sample_size"]) == int(sel.sum()), (indicator, level, code)


def test_successive_difference_replicate_variance_matches_direct_computation(release):
    """DESIGN §4: v = 4/R · Σ_r (p̂_r − p̂)², p̂_r with replicate weight r (Fay & Train 1995)."""
    replicates = demo_settings()["design"]["replicates"]
    assert replicates == {"prefix": "rw", "count": 80, "method": "successive_difference"}
    micro = pd.read_parquet(release["input"])
    est = pd.read_parquet(release["dir"] / "public" / "estimates.parquet")
    base, y = base_and_y(micro, "smoker")
    sub, y = micro[base], y[base].to_numpy()
    p_hat = np.sum(sub["wt"] * y) / np.sum(sub["wt"])
    R = replicates["count"]
    reps = sub[[f"rw{r}" for r in range(1, R + 1)]].to_numpy(float)
    p_r = (reps * y[:, None]).sum(axis=0) / reps.sum(axis=0)
    v = 4.0 / R * np.sum((p_r - p_hat) ** 2)
    internal = pd.read_parquet(release["dir"] / "internal" / "cells.parquet")
    exact = published_cell(internal, "smoker", "nation", nation_code(release["root"]))
    assert exact["std_error"] ** 2 == pytest.approx(v, rel=1e-9)
    cell = published_cell(est, "smoker", "nation", nation_code(release["root"]))
    assert cell["std_error"] == round(exact["std_error"], 4)  # printed to 4 places


def test_csv_form_of_the_demo_gives_the_same_estimates_as_the_parquet_form(release, tmp_path, small_demo):
    """The demo writes the same records as Parquet and as CSV; reading either must give the same
    public table (CSV text is typed by ratebook itself, Parquet carries its types)."""
    settings = demo_settings()
    settings["source"]["path"] = "../data/raw/demo_persons.csv"
    other = make_project(tmp_path / "csv", small_demo, settings)
    summary = run(other / "configs" / "demo.yaml", release_id="from-csv")
    assert summary.rows_rejected == 0
    from_csv = pd.read_parquet(summary.release_dir / "public" / "estimates.parquet")
    from_parquet = pd.read_parquet(release["dir"] / "public" / "estimates.parquet")
    pd.testing.assert_frame_equal(from_csv, from_parquet, check_exact=False, rtol=1e-12, atol=0)


# --------------------------------------------------------------------------------------------
# Reproducibility, refusal, lock


def test_same_inputs_and_config_give_byte_identical_data_files(release, tmp_path, small_demo):
    """A second project folder holding the same inputs and the same config text, released under
    the same id into its own output folder."""
    other = make_project(tmp_path / "second", small_demo)
    assert (other / "configs" / "demo.yaml").read_bytes() == (release["root"] / "configs" / "demo.yaml").read_bytes()
    run(other / "configs" / "demo.yaml", release_id="e2e-1")
    again = other / "data" / "out" / "e2e-1"
    assert again != release["dir"]
    for name in ("public/estimates.parquet", "public/estimates.csv", "internal/cells.parquet",
                 "public/metadata.json"):
        assert (again / name).read_bytes() == (release["dir"] / name).read_bytes(), name


def test_existing_release_is_refused_without_replace_and_replaced_with_it(project):
    config = project / "configs" / "demo.yaml"
    out = project / "data" / "out"
    run(config, release_id="r1")
    run(config, release_id="r2")
    assert (out / "latest").read_text().strip() == "r2"
    before = {p: sha256(out / "r1" / p) for p in files_under(out / "r1")}

    with pytest.raises(ReleaseRefused) as info:
        run(config, release_id="r1")
    assert info.value.exit_code == 4  # DESIGN §3: release refused
    assert "r1" in str(info.value)
    assert {p: sha256(out / "r1" / p) for p in files_under(out / "r1")} == before
    assert (out / "latest").read_text().strip() == "r2"

    summary = run(config, release_id="r1", replace=True)
    assert summary.release_dir == out / "r1"
    assert (out / "latest").read_text().strip() == "r1"
    assert files_under(out / "r1") == RELEASE_FILES
    manifest = json.loads((out / "r1" / "manifest.json").read_text())
    for o in manifest["outputs"]:  # the replaced release is complete and consistent
        assert o["sha256"] == sha256(out / "r1" / o["path"])
    # no leftover aside/staging folder
    assert sorted(p.name for p in out.iterdir() if p.is_dir()) == ["r1", "r2"]


def test_a_second_run_on_a_locked_output_folder_is_refused(project):
    config = project / "configs" / "demo.yaml"
    out = project / "data" / "out"
    out.mkdir(parents=True, exist_ok=True)
    with open(out / LOCK_NAME, "a+") as fh:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)  # as another run would hold it
        with pytest.raises(ReleaseRefused) as info:
            run(config, release_id="blocked")
        assert info.value.exit_code == 4
        assert "lock" in str(info.value)
    # nothing was published: only the lock file is there
    assert sorted(p.name for p in out.iterdir()) == [LOCK_NAME]


# --------------------------------------------------------------------------------------------
# Rejects


def with_values(table: pa.Table, column: str, changes: dict[int, object]) -> pa.Table:
    values = table[column].to_pylist()
    for row, value in changes.items():
        values[row] = value
    i = table.schema.get_field_index(column)
    return table.set_column(i, table.schema.field(i), pa.array(values, type=table.schema.field(i).type))


def test_bad_rows_are_rejected_with_column_rule_and_value_and_left_out_of_estimates(project):
    raw = project / "data" / "raw"
    table = pq.read_table(raw / "demo_persons.parquet")
    ids = table["person_id"].to_pylist()
    # each bad row on its own record; 0-based positions in the file
    bad = {100: ("wt", -5.0, "weight_not_positive"),
           200: ("age", 140, "out_of_range"),
           300: ("sex", 7, "value_not_allowed"),
           400: ("person_id", ids[399], "duplicate_record_id"),  # the later copy is the one set aside
           500: ("area", "ZZ999", "unknown_geography")}
    assert len(set(ids)) == len(ids)
    for row, (column, value, _) in bad.items():
        table = with_values(table, column, {row: value})
    pq.write_table(table, raw / "bad.parquet")
    settings = demo_settings()
    settings["source"]["path"] = "../data/raw/bad.parquet"
    settings["source"]["max_rejected_share"] = 0.01
    config = write_config(project / "configs" / "bad.yaml", settings)

    summary = run(config, release_id="with-rejects")
    rel = summary.release_dir
    assert files_under(rel) == RELEASE_FILES | {"internal/rejects.parquet"}
    rejects = pd.read_parquet(rel / "internal" / "rejects.parquet")
    assert len(rejects) == len(bad)
    ids_after = table["person_id"].to_pylist()
    for row, (column, value, rule) in bad.items():
        hit = rejects[(rejects["column"] == column) & (rejects["rule"] == rule)]
        assert len(hit) == 1, (column, rule, rejects)
        hit = hit.iloc[0]
        assert hit["record_id"] == str(ids_after[row])
        assert hit["source_file"] == "bad.parquet"
        assert int(hit["row_number"]) == row + 1  # 1-based record number, as for CSV lines
        if isinstance(value, str):
            assert hit["value"] == value
        else:
            assert float(hit["value"]) == float(value)

    # reconciliation still balances, and counts what was broken
    manifest = json.loads((rel / "manifest.json").read_text())
    rec = manifest["reconciliation"]
    assert rec["rows_read"] == table.num_rows == rec["rows_accepted"] + rec["rows_rejected"]
    assert rec["rows_rejected"] == len(bad)
    assert (summary.rows_read, summary.rows_accepted, summary.rows_rejected) == (
        rec["rows_read"], rec["rows_accepted"], rec["rows_rejected"])

    # rejected rows are counted nowhere: nation 'all' cells equal a pandas recomputation on the
    # accepted rows only
    micro = table.to_pandas()
    accepted = micro.drop(index=list(bad)).reset_index(drop=True)
    est = pd.read_parquet(rel / "public" / "estimates.parquet")
    for indicator in INDICATORS:
        base, y = base_and_y(accepted, indicator)
        cell = published_cell(est, indicator, "nation", nation_code(project))
        assert int(cell["sample_size"]) == int(base.sum()), indicator
        w = accepted.loc[base, "wt"]
        assert cell["estimate"] == pytest.approx(float((w * y[base]).sum() / w.sum()), rel=0,
                                                 abs=0.5e-4 + 1e-12)  # printed to 4 places
    # the rejects file is listed in the manifest with its hash
    listed = {o["path"]: o["sha256"] for o in manifest["outputs"]}
    assert listed["internal/rejects.parquet"] == sha256(rel / "internal" / "rejects.parquet")


def test_a_glob_of_files_reconciles_per_file_and_catches_a_duplicate_across_files(project):
    raw = project / "data" / "raw"
    table = pq.read_table(raw / "demo_persons.parquet")
    half = table.num_rows // 2
    first, second = table.slice(0, half), pa.concat_tables([table.slice(half), table.slice(10, 1)])
    pq.write_table(first, raw / "part_1.parquet")
    pq.write_table(second, raw / "part_2.parquet")  # its last record repeats record 11 of part 1
    settings = demo_settings()
    settings["source"].update(path="../data/raw/part_*.parquet", max_rejected_share=0.01)
    summary = run(write_config(project / "configs" / "parts.yaml", settings), release_id="parts")
    manifest = json.loads((summary.release_dir / "manifest.json").read_text())
    files = {Path(e["path"]).name: e for e in manifest["inputs"]["microdata"]}
    assert sorted(files) == ["part_1.parquet", "part_2.parquet"]
    for name, expected_rejected in (("part_1.parquet", 0), ("part_2.parquet", 1)):
        entry = files[name]
        assert entry["rows_read"] == pq.ParquetFile(raw / name).metadata.num_rows
        assert entry["rows_read"] == entry["rows_accepted"] + entry["rows_rejected"]
        assert entry["rows_rejected"] == expected_rejected
    rec = manifest["reconciliation"]
    assert rec["rows_read"] == table.num_rows + 1 == rec["rows_accepted"] + rec["rows_rejected"]
    rejects = pd.read_parquet(summary.release_dir / "internal" / "rejects.parquet")
    assert list(zip(rejects["source_file"], rejects["rule"], rejects["record_id"])) == [
        ("part_2.parquet", "duplicate_record_id", str(table["person_id"][10].as_py()))]
    assert int(rejects["row_number"].iloc[0]) == second.num_rows  # the last record of part 2


@pytest.mark.parametrize("batch_rows", [65_536, 500])
def test_reject_row_numbers_stay_right_after_a_malformed_csv_line(project, batch_rows):
    """Row numbers name the data row as it stands in the file, also for rows after a malformed
    line the CSV reader skipped, and when that line falls near a batch boundary (batch_rows 500
    gives blocks of about 100 lines here)."""
    raw = project / "data" / "raw"
    # the first 1,200 records are enough: the malformed line then sits well inside the file
    lines = (raw / "demo_persons.csv").read_text().splitlines(keepends=True)[:1201]
    header = lines[0].rstrip("\n").split(",")
    wt = header.index("wt")
    malformed_at, negative_at = 1000, [990, 1010, 1150]  # 1-based data rows (line k + 1 of the file)
    lines[malformed_at] = lines[malformed_at].rstrip("\n") + ",999\n"
    for k in negative_at:
        fields = lines[k].rstrip("\n").split(",")
        fields[wt] = "-3"
        lines[k] = ",".join(fields) + "\n"
    (raw / "mixed.csv").write_text("".join(lines))
    settings = demo_settings()
    settings["source"].update(path="../data/raw/mixed.csv", max_rejected_share=0.01, batch_rows=batch_rows)
    summary = run(write_config(project / "configs" / "mixed.yaml", settings), release_id="mixed")
    rejects = pd.read_parquet(summary.release_dir / "internal" / "rejects.parquet")
    expected = {malformed_at: "malformed_row", **{k: "weight_not_positive" for k in negative_at}}
    got = dict(zip(rejects["row_number"].astype(int), rejects["rule"]))
    assert got == expected
