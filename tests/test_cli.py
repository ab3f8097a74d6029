"""The real command in a subprocess: `python -m pipeline run|check ...`, from a working directory
outside the project, so every path must resolve against the config file's folder.

Exit codes and error wording come from DESIGN §3: 0 success; 2 usage or config error; 3 input data
failed validation; 4 release refused; one clear line naming the problem and no traceback unless
--debug; a failed or killed run leaves previous releases and `latest` exactly as they were.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import threading
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

from pipeline.runner import run
from tests.conftest import demo_settings, write_config

EXIT_OK, EXIT_USAGE, EXIT_INPUT, EXIT_REFUSED = 0, 2, 3, 4  # DESIGN §3
BAD_ROW = 100  # 0-based record of the demo that the bad-input tests spoil


def ratebook(*args: str, cwd: Path, timeout: float = 120) -> subprocess.CompletedProcess:
    """The real command line; stderr is a pipe, not a terminal."""
    return subprocess.run([sys.executable, "-m", "pipeline", *map(str, args)], cwd=cwd,
                          capture_output=True, text=True, timeout=timeout)


def tree(root: Path) -> dict[str, str]:
    """Every file under root (hidden ones too) with its sha256, and every folder."""
    if not root.exists():
        return {}
    out = {}
    for p in sorted(root.rglob("*")):
        rel = str(p.relative_to(root))
        out[rel] = hashlib.sha256(p.read_bytes()).hexdigest() if p.is_file() else "<dir>"
    return out


def number(text: str) -> int:
    return int(text.replace(",", ""))


@pytest.fixture
def elsewhere(tmp_path_factory) -> Path:
    """A working directory that is not the project."""
    return tmp_path_factory.mktemp("cwd")


@pytest.fixture(scope="module")
def released_demo(tmp_path_factory, small_demo) -> Path:
    """A project (configs/demo.yaml + data/) whose data/out already holds one complete release,
    'baseline', made by a successful run, and `latest` naming it."""
    root = tmp_path_factory.mktemp("released")
    shutil.copytree(small_demo / "data", root / "data")
    (root / "configs").mkdir()
    write_config(root / "configs" / "demo.yaml", demo_settings())
    run(root / "configs" / "demo.yaml", release_id="baseline")
    return root


@pytest.fixture
def released(tmp_path, released_demo) -> Path:
    """A fresh copy of `released_demo` for one test to spoil."""
    root = tmp_path / "proj"
    shutil.copytree(released_demo, root)
    assert (root / "data" / "out" / "latest").read_text().strip() == "baseline"
    return root


def bad_config(root: Path, change, name: str = "bad.yaml") -> Path:
    settings = demo_settings()
    change(settings)
    return write_config(root / "configs" / name, settings)


def spoil_parquet(root: Path, change) -> Path:
    """Write data/raw/bad.parquet: the demo microdata changed by `change(table) -> table`."""
    table = pq.read_table(root / "data" / "raw" / "demo_persons.parquet")
    path = root / "data" / "raw" / "bad.parquet"
    pq.write_table(change(table), path)
    return path


def with_value(table: pa.Table, column: str, row: int, value) -> pa.Table:
    values = table[column].to_pylist()
    values[row] = value
    i = table.schema.get_field_index(column)
    return table.set_column(i, table.schema.field(i), pa.array(values, type=table.schema.field(i).type))


def use_source(path: str, **source):
    def change(settings):
        settings["source"]["path"] = path
        settings["source"].update(source)
    return change


# --------------------------------------------------------------------------------------------
# Success


def test_run_publishes_and_prints_the_release_and_a_reconciled_summary(project, elsewhere):
    config = project / "configs" / "demo.yaml"
    result = ratebook("run", config, "--release-id", "cli-1", cwd=elsewhere)
    assert result.returncode == EXIT_OK, result.stderr
    assert "Traceback" not in result.stderr
    release_dir = project / "data" / "out" / "cli-1"
    assert release_dir.is_dir() and not (elsewhere / "data").exists()  # resolved against the config
    assert str(release_dir) in result.stdout and "cli-1" in result.stdout

    cells = re.search(r"([\d,]+) published, ([\d,]+) caution, ([\d,]+) suppressed", result.stdout)
    rows = re.search(r"([\d,]+) read = ([\d,]+) accepted \+ ([\d,]+) rejected", result.stdout)
    assert cells and rows, result.stdout
    read, accepted, rejected = map(number, rows.groups())
    assert read == accepted + rejected
    assert read == pq.ParquetFile(project / "data" / "raw" / "demo_persons.parquet").metadata.num_rows
    # the printed status counts are those of the published table
    statuses = pd.read_parquet(release_dir / "public" / "estimates.parquet")["status"].value_counts()
    assert [number(x) for x in cells.groups()] == [int(statuses.get(s, 0))
                                                   for s in ("published", "caution", "suppressed")]
    assert (project / "data" / "out" / "latest").read_text().strip() == "cli-1"


def test_check_prints_counts_and_publishes_nothing(project, elsewhere):
    result = ratebook("check", project / "configs" / "demo.yaml", cwd=elsewhere)
    assert result.returncode == EXIT_OK, result.stderr
    rows = re.search(r"demo_persons\.parquet: ([\d,]+) read = ([\d,]+) accepted \+ ([\d,]+) rejected",
                     result.stdout)
    assert rows, result.stdout
    read, accepted, rejected = map(number, rows.groups())
    assert read == accepted + rejected
    assert read == pq.ParquetFile(project / "data" / "raw" / "demo_persons.parquet").metadata.num_rows
    out = project / "data" / "out"
    assert not out.exists() or not any(out.iterdir()), list(out.iterdir())  # no release, no latest
    assert not (elsewhere / "data").exists()


# --------------------------------------------------------------------------------------------
# Bad input: each gives its documented exit code and changes nothing already published.
#
# Each case below prepares its own copy of `released_demo` (a previous release and `latest` in
# data/out, made by a successful run) and returns the command line to run. Each command has its
# own project and output folder, so `bad_runs` runs them as many at a time as there are cores
# (start-up imports dominate each run); each test then checks its own outcome.

MALFORMED_AT = 50  # 1-based data row; line MALFORMED_AT + 1 of the file


def write_malformed_csv(root: Path) -> Path:
    lines = (root / "data" / "raw" / "demo_persons.csv").read_text().splitlines(keepends=True)
    lines[MALFORMED_AT] = lines[MALFORMED_AT].rstrip("\n") + ",999\n"  # one field too many
    path = root / "data" / "raw" / "malformed.csv"
    path.write_text("".join(lines))
    return path


def run_args(config: Path, *extra: str) -> list[str]:
    return ["run", str(config), "--release-id", "bad", *extra]


def case_missing_column(root: Path, *extra: str) -> list[str]:
    spoil_parquet(root, lambda t: t.drop_columns(["age"]))
    return run_args(bad_config(root, use_source("../data/raw/bad.parquet")), *extra)


def case_wrong_type(root: Path) -> list[str]:
    def ages_as_text(t):
        i = t.schema.get_field_index("age")
        return t.set_column(i, "age", pc.cast(t["age"], pa.string()))
    spoil_parquet(root, ages_as_text)
    return run_args(bad_config(root, use_source("../data/raw/bad.parquet")))


DUPLICATE = object()  # stands for: the id of the record before


def case_bad_row(column: str, value):
    """One bad record of about 3,000 is below the default share (0.1%), so these allow none."""
    def prepare(root: Path) -> list[str]:
        def change(t):
            v = t["person_id"][BAD_ROW - 1].as_py() if value is DUPLICATE else value
            return with_value(t, column, BAD_ROW, v)
        spoil_parquet(root, change)
        return run_args(bad_config(root, use_source("../data/raw/bad.parquet", max_rejected_share=0)))
    return prepare


def case_empty_file(root: Path) -> list[str]:
    (root / "data" / "raw" / "empty.csv").write_bytes(b"")
    return run_args(bad_config(root, use_source("../data/raw/empty.csv")))


def case_malformed_line(root: Path) -> list[str]:
    write_malformed_csv(root)
    return run_args(bad_config(root, use_source("../data/raw/malformed.csv", max_rejected_share=0)))


def case_config_typo(root: Path) -> list[str]:
    def typo(settings):
        settings["estimation"]["intervall"] = settings["estimation"].pop("interval")
    return run_args(bad_config(root, typo))


def case_expression_call(root: Path) -> list[str]:
    marker = root / "expression-ran"  # what the expression would create if it ever ran
    def call(settings):
        settings["indicators"]["no_internet"]["condition"] = f"__import__('os').system('touch {marker}')"
    return run_args(bad_config(root, call))


def case_unknown_option(root: Path) -> list[str]:
    return run_args(root / "configs" / "demo.yaml", "--no-such-option")


BAD_CASES = {
    "missing_column": case_missing_column,
    "missing_column_debug": lambda root: case_missing_column(root, "--debug"),
    "wrong_type": case_wrong_type,
    "negative_weight": case_bad_row("wt", -5.0),
    "duplicate_id": case_bad_row("person_id", DUPLICATE),
    "unknown_area": case_bad_row("area", "ZZ999"),
    "empty_file": case_empty_file,
    "malformed_line": case_malformed_line,
    "config_typo": case_config_typo,
    "expression_call": case_expression_call,
    "unknown_option": case_unknown_option,
}


@dataclass
class Outcome:
    result: subprocess.CompletedProcess
    root: Path               # the project copy the command ran on
    before: dict[str, str]   # tree(data/out) just before the command


@pytest.fixture(scope="module")
def bad_runs(tmp_path_factory, released_demo) -> dict[str, Outcome]:
    cwd = tmp_path_factory.mktemp("cwd")
    prepared = {}
    for name, prepare in BAD_CASES.items():
        root = tmp_path_factory.mktemp(name) / "proj"
        shutil.copytree(released_demo, root)
        args = prepare(root)
        assert (root / "data" / "out" / "latest").read_text().strip() == "baseline"
        prepared[name] = (args, root, tree(root / "data" / "out"))
    # as many at a time as there are cores: each run is mostly start-up imports
    with ThreadPoolExecutor(max_workers=os.cpu_count() or 2) as pool:
        results = dict(zip(prepared, pool.map(lambda item: ratebook(*item[0], cwd=cwd), prepared.values())))
    return {name: Outcome(results[name], root, before) for name, (_, root, before) in prepared.items()}


def assert_refused_cleanly(outcome: Outcome, code: int, *must_name: str) -> None:
    """The documented exit code, an error naming the problem, no traceback, nothing published
    and the previous release and `latest` byte-for-byte unchanged."""
    result = outcome.result
    assert result.returncode == code, (result.returncode, result.stderr)
    assert "Traceback" not in result.stderr
    for text in must_name:
        assert text in result.stderr, (text, result.stderr)
    after = tree(outcome.root / "data" / "out")
    assert after == outcome.before
    assert "baseline/manifest.json" in after and "bad" not in after


def test_missing_column_is_exit_3(bad_runs):
    assert_refused_cleanly(bad_runs["missing_column"], EXIT_INPUT, "'age'", "bad.parquet", "missing")


def test_wrong_column_type_is_exit_3(bad_runs):
    assert_refused_cleanly(bad_runs["wrong_type"], EXIT_INPUT, "'age'", "type", "bad.parquet")


@pytest.mark.parametrize("case,column,rule", [
    ("negative_weight", "wt", "weight_not_positive"),
    ("duplicate_id", "person_id", "duplicate_record_id"),
    ("unknown_area", "area", "unknown_geography"),
])
def test_rejected_rows_beyond_the_allowed_share_are_exit_3(bad_runs, case, column, rule):
    # names the rule, the column, the file, the record (1-based, as CSV lines are counted) and the limit
    assert_refused_cleanly(bad_runs[case], EXIT_INPUT, rule, f"'{column}'", "bad.parquet",
                           f"row {BAD_ROW + 1}", "max_rejected_share")


def test_unknown_area_names_the_offending_code(bad_runs):
    assert "ZZ999" in bad_runs["unknown_area"].result.stderr


def test_empty_file_is_exit_3(bad_runs):
    assert_refused_cleanly(bad_runs["empty_file"], EXIT_INPUT, "empty.csv", "empty")


def test_malformed_csv_line_beyond_the_allowed_share_is_exit_3_naming_the_line(bad_runs):
    assert_refused_cleanly(bad_runs["malformed_line"], EXIT_INPUT, "malformed_row", "malformed.csv",
                           f"row {MALFORMED_AT}")


def test_config_key_typo_is_exit_2_with_a_close_match(bad_runs):
    assert_refused_cleanly(bad_runs["config_typo"], EXIT_USAGE, "estimation.intervall",
                           "did you mean 'interval'?")


def test_expression_calling_a_function_is_exit_2_naming_the_key_path(bad_runs):
    outcome = bad_runs["expression_call"]
    assert_refused_cleanly(outcome, EXIT_USAGE, "indicators.no_internet.condition")
    assert not (outcome.root / "expression-ran").exists()


def test_unknown_command_line_option_is_exit_2(bad_runs):
    assert_refused_cleanly(bad_runs["unknown_option"], EXIT_USAGE, "--no-such-option")


def test_debug_shows_a_traceback_and_plain_mode_does_not(bad_runs):
    plain, debug = bad_runs["missing_column"].result, bad_runs["missing_column_debug"].result
    assert plain.returncode == debug.returncode == EXIT_INPUT
    assert "Traceback" not in plain.stderr
    assert "Traceback (most recent call last)" in debug.stderr
    assert "'age'" in plain.stderr and "'age'" in debug.stderr
    outcome = bad_runs["missing_column_debug"]
    assert tree(outcome.root / "data" / "out") == outcome.before


def test_malformed_csv_line_within_the_allowed_share_is_a_reject(released, elsewhere):
    path = write_malformed_csv(released)
    config = bad_config(released, use_source("../data/raw/malformed.csv"))  # default share 0.001
    baseline = tree(released / "data" / "out" / "baseline")
    result = ratebook("run", config, "--release-id", "with-malformed", cwd=elsewhere)
    assert result.returncode == EXIT_OK, result.stderr
    rel = released / "data" / "out" / "with-malformed"
    rejects = pd.read_parquet(rel / "internal" / "rejects.parquet")
    assert list(rejects["rule"]) == ["malformed_row"]
    assert int(rejects["row_number"].iloc[0]) == MALFORMED_AT
    assert rejects["source_file"].iloc[0] == "malformed.csv"
    data_lines = len(path.read_text().splitlines()) - 1
    rec = json.loads((rel / "manifest.json").read_text())["reconciliation"]
    assert rec["rows_read"] == data_lines == rec["rows_accepted"] + rec["rows_rejected"]
    assert rec["rows_rejected"] == 1
    assert tree(released / "data" / "out" / "baseline") == baseline  # another id: untouched


# --------------------------------------------------------------------------------------------
# Refusal and a killed run


def test_existing_release_is_exit_4_and_replace_is_exit_0(released, elsewhere):
    config = released / "configs" / "demo.yaml"
    before = tree(released / "data" / "out")
    refused = ratebook("run", config, "--release-id", "baseline", cwd=elsewhere)
    assert_refused_cleanly(Outcome(refused, released, before), EXIT_REFUSED, "baseline", "--replace")
    replaced = ratebook("run", config, "--release-id", "baseline", "--replace", cwd=elsewhere)
    assert replaced.returncode == EXIT_OK, replaced.stderr
    rel = released / "data" / "out" / "baseline"
    manifest = json.loads((rel / "manifest.json").read_text())
    # rewritten by this run: the baseline was made from the project this one was copied from
    assert manifest["config"]["path"] == str(config.resolve())
    for o in manifest["outputs"]:
        assert o["sha256"] == hashlib.sha256((rel / o["path"]).read_bytes()).hexdigest()
    assert (released / "data" / "out" / "latest").read_text().strip() == "baseline"


def test_a_killed_run_leaves_the_previous_release_and_latest_untouched(released, elsewhere):
    raw, out = released / "data" / "raw", released / "data" / "out"
    # about 18,000 records (the demo six times, fresh ids) read 500 at a time: a few seconds
    table = pq.read_table(raw / "demo_persons.parquet")
    offset = 10 ** (len(str(pc.max(table["person_id"]).as_py())) + 1)
    copies = [table.set_column(table.schema.get_field_index("person_id"), "person_id",
                               pc.add(table["person_id"], pa.scalar(k * offset, table["person_id"].type)))
              for k in range(6)]
    pq.write_table(pa.concat_tables(copies), raw / "big.parquet")
    config = bad_config(released, use_source("../data/raw/big.parquet", batch_rows=500), name="big.yaml")
    previous = tree(out / "baseline")
    latest = (out / "latest").read_bytes()

    proc = subprocess.Popen([sys.executable, "-m", "pipeline", "run", str(config), "--release-id", "killed"],
                            cwd=elsewhere, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    watchdog = threading.Timer(120, proc.kill)
    watchdog.start()
    try:
        seen = []
        for line in proc.stderr:
            seen.append(line)
            if "reading record batches" in line:
                proc.send_signal(signal.SIGKILL)
                break
        proc.communicate(timeout=60)
    finally:
        watchdog.cancel()
        if proc.poll() is None:
            proc.kill()
    # if the run finished before the kill landed, the test proves nothing: fail
    assert proc.returncode == -signal.SIGKILL, (proc.returncode, "".join(seen))

    assert tree(out / "baseline") == previous
    assert (out / "latest").read_bytes() == latest
    assert not (out / "killed").exists()

    # the next run is not blocked by a leftover lock or staging folder, and cleans up
    summary = run(config, release_id="killed")
    assert summary.rows_read == 6 * table.num_rows
    assert (out / "latest").read_text().strip() == "killed"
    assert sorted(p.name for p in out.iterdir() if p.is_dir()) == ["baseline", "killed"]
    assert tree(out / "baseline") == previous


def test_flags_work_before_or_after_the_command(tmp_path):
    # DESIGN §3: errors are one line without a traceback unless --debug, wherever the flag stands
    import subprocess
    import sys

    missing = str(tmp_path / "absent.yaml")
    for argv in (["--debug", "run", missing], ["run", missing, "--debug"]):
        done = subprocess.run([sys.executable, "-m", "pipeline", *argv], capture_output=True, text=True)
        assert done.returncode == 2 and "Traceback" in done.stderr, argv
    done = subprocess.run([sys.executable, "-m", "pipeline", "run", missing], capture_output=True, text=True)
    assert done.returncode == 2 and "Traceback" not in done.stderr and "absent.yaml" in done.stderr
