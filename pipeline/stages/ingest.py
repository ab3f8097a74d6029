"""Ingest: read the geography lookup and the microdata in record batches, and validate them.

This is the only stage that reads files. Microdata are read batch by batch (memory follows the
batch size, not the number of records). Problems with the input as a whole (a missing column, an
uncoercible type, an unreadable or empty file, a broken lookup) raise InputDataError listing every
problem; problems with single rows set those rows aside as rejects, each with the column, the
rule (a stable reason code) and the offending value. Row rules are a pandera schema built from
the config (`row_rules`, `build_row_schema`), kept apart from the code that applies it; a batch
whose rows all pass (one vectorised pass over the same tests) skips the schema.
"""

from __future__ import annotations

import glob
import hashlib
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from enum import Enum
from pathlib import Path

import numpy as np
import pandas as pd
import pandera.pandas as pa
import pyarrow as arrow
import pyarrow.csv as arrow_csv
import pyarrow.parquet as pq

from pipeline.errors import InputDataError

SNIFF_BLOCK_BYTES = 1 << 16


class RejectReason(str, Enum):
    """Why a row was set aside. Stable codes: they appear in rejects.parquet and in metadata."""

    MALFORMED_ROW = "malformed_row"                  # CSV line with the wrong number of fields
    NOT_A_NUMBER = "not_a_number"                    # text where a number is declared
    NOT_AN_INTEGER = "not_an_integer"                # a fraction where an integer is declared
    MISSING_NOT_ALLOWED = "missing_not_allowed"      # empty where missing: forbidden
    OUT_OF_RANGE = "out_of_range"                    # outside the declared min/max
    VALUE_NOT_ALLOWED = "value_not_allowed"          # not among the declared values
    DUPLICATE_RECORD_ID = "duplicate_record_id"      # the record id was on an earlier row
    UNKNOWN_GEOGRAPHY = "unknown_geography"          # geography key not in the lookup
    WEIGHT_NOT_POSITIVE = "weight_not_positive"      # weight missing, infinite or <= 0
    REPLICATE_WEIGHT_INVALID = "replicate_weight_invalid"  # replicate weight missing, infinite or < 0


REJECT_DESCRIPTIONS = {
    RejectReason.MALFORMED_ROW: "the CSV line has a different number of fields than the header",
    RejectReason.NOT_A_NUMBER: "the value is not a number but the column is declared numeric",
    RejectReason.NOT_AN_INTEGER: "the value has a fraction but the column is declared integer",
    RejectReason.MISSING_NOT_ALLOWED: "the value is missing but the column does not allow missing values",
    RejectReason.OUT_OF_RANGE: "the value is outside the declared min/max",
    RejectReason.VALUE_NOT_ALLOWED: "the value is not one of the declared values",
    RejectReason.DUPLICATE_RECORD_ID: "the record id appeared on an earlier row of the input (accepted or not); "
                                      "only the earliest row with an id can be accepted",
    RejectReason.UNKNOWN_GEOGRAPHY: "the geography key is not a code of the finest level of the lookup",
    RejectReason.WEIGHT_NOT_POSITIVE: "the weight is missing, not finite or not greater than 0",
    RejectReason.REPLICATE_WEIGHT_INVALID: "a replicate weight is missing, not finite or negative",
}

REJECT_COLUMNS = ["source_file", "row_number", "record_id", "column", "rule", "value"]


# --------------------------------------------------------------------------------------------
# Geography lookup


@dataclass(frozen=True)
class Geography:
    """The validated geography tree. Finest units are in a fixed order (sorted by the codes of
    every level, coarsest first); `unit_index[level][i]` is the position, within that level's
    `codes`, of the unit that holds finest unit i."""

    levels: tuple[str, ...]
    codes: dict[str, np.ndarray]
    names: dict[str, np.ndarray]
    unit_index: dict[str, np.ndarray]
    population: np.ndarray | None = None

    @property
    def finest(self) -> str:
        return self.levels[-1]

    @property
    def finest_codes(self) -> np.ndarray:
        return self.codes[self.finest]


def read_geography(config) -> tuple[Geography, dict]:
    """Read and check the lookup: every level's code and name columns present, no empty codes,
    every code with one name and (below the top) one parent. Returns the tree and a manifest entry."""
    path = config.lookup_path
    geo = config.geography
    try:
        frame = pd.read_csv(path, dtype=str, keep_default_na=False)
    except FileNotFoundError:
        raise InputDataError(f"geography.lookup: file not found: {path}") from None
    except (OSError, pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise InputDataError(f"geography.lookup: cannot read {path}: {exc}") from None
    problems: list[str] = []
    wanted = [c for lv in geo.levels for c in (lv.code, lv.name)]
    if geo.population:
        wanted.append(geo.population)
    missing = [c for c in wanted if c not in frame.columns]
    if missing:
        raise InputDataError(f"geography.lookup: {path.name} lacks column(s) {missing}; "
                             f"it has {list(frame.columns)}")
    if frame.empty:
        raise InputDataError(f"geography.lookup: {path.name} has no rows")
    for lv in geo.levels:
        empty = frame[lv.code].str.strip() == ""
        if empty.any():
            problems.append(f"geography.lookup: {int(empty.sum())} row(s) have an empty {lv.code!r} "
                            f"(first at line {int(np.flatnonzero(empty)[0]) + 2})")
        names_per_code = frame.groupby(lv.code)[lv.name].nunique()
        for code in names_per_code[names_per_code > 1].index[:5]:
            problems.append(f"geography.lookup: {lv.level} code {code!r} has more than one name in {lv.name!r}")
    for upper, lower in zip(geo.levels, geo.levels[1:]):
        parents = frame.groupby(lower.code)[upper.code].nunique()
        for code in parents[parents > 1].index[:5]:
            problems.append(f"geography.lookup: {lower.level} {code!r} has more than one parent {upper.level} "
                            f"in {upper.code!r}; the lookup must be a tree")
    finest = geo.levels[-1]
    dupes = frame[finest.code].duplicated()
    if dupes.any():
        problems.append(f"geography.lookup: finest-level code {frame[finest.code][dupes].iloc[0]!r} appears "
                        f"on {int(dupes.sum()) + 1} rows; each finest unit needs exactly one row")
    population = None
    if geo.population:
        population = pd.to_numeric(frame[geo.population], errors="coerce").to_numpy(float)
        bad = ~np.isfinite(population) | (population < 0)
        if bad.any():
            problems.append(f"geography.lookup: column {geo.population!r} must hold numbers >= 0; "
                            f"row {int(np.flatnonzero(bad)[0]) + 2} has {frame[geo.population].iloc[int(np.flatnonzero(bad)[0])]!r}")
    if problems:
        raise InputDataError(f"geography.lookup: {path.name} is not a usable geography tree", problems)

    order = np.lexsort([frame[lv.code].to_numpy() for lv in reversed(geo.levels)])
    frame = frame.iloc[order].reset_index(drop=True)
    codes, names, unit_index = {}, {}, {}
    for lv in geo.levels:
        level_codes, first = np.unique(frame[lv.code].to_numpy(), return_index=True)
        # keep the tree order (codes sorted within their parents) rather than plain sort order
        by_position = np.argsort(first)
        codes[lv.level] = level_codes[by_position].astype(object)
        names[lv.level] = frame[lv.name].to_numpy()[first[by_position]].astype(object)
        unit_index[lv.level] = pd.Index(codes[lv.level]).get_indexer(frame[lv.code].to_numpy())
    if population is not None:
        population = population[order]
    geography = Geography(levels=tuple(lv.level for lv in geo.levels), codes=codes, names=names,
                          unit_index=unit_index, population=population)
    return geography, describe_file(path, rows=len(frame))


# --------------------------------------------------------------------------------------------
# Microdata: planning, schema checks, batches


@dataclass(frozen=True)
class SourceFile:
    path: Path
    kind: str  # parquet | csv


@dataclass
class FileCount:
    """Row reconciliation for one input file: read = accepted + rejected."""

    path: Path
    read: int = 0
    accepted: int = 0
    rejected: int = 0


@dataclass
class Batch:
    """One validated batch: accepted rows (typed columns) and rejects (one row per failure)."""

    frame: pd.DataFrame
    rejects: pd.DataFrame
    count: FileCount
    rows_read: int
    rows_rejected: int


def needed_columns(config) -> list[str]:
    """Exactly the columns the run reads, in a fixed order."""
    cols = [config.source.record_id, config.geography.key, config.design.weight]
    cols += config.replicate_columns
    cols += list(_design_columns(config))
    cols += list(config.source.variables)
    return list(dict.fromkeys(cols))


def _design_columns(config) -> dict[str, tuple[str, str]]:
    """The linearization design columns (when that variance method is configured), with their
    roles: strata and clusters are codes (string or integer, never missing), population_clusters
    a number (N_h, checked per stratum by `ClusterDesignCheck`)."""
    lin = config.design.linearization if config.design.variance == "linearization" else None
    if lin is None:
        return {}
    roles = {}
    if lin.strata is not None:
        roles[lin.strata] = ("design.linearization.strata", "key")
    roles[lin.clusters] = ("design.linearization.clusters", "key")
    if lin.population_clusters is not None:
        roles[lin.population_clusters] = ("design.linearization.population_clusters", "number")
    return roles


def plan_source(config) -> list[SourceFile]:
    """Expand the source path (a glob reads several files, in sorted order) and check each file's
    columns and types before any row is read, reporting every problem at once."""
    pattern = str(config.source_path)
    paths = sorted(Path(p) for p in glob.glob(pattern)) if glob.has_magic(pattern) else [Path(pattern)]
    if not paths:
        raise InputDataError(f"source.path: no file matches {pattern}")
    files, problems = [], []
    for path in paths:
        kind = _file_kind(path)
        if kind is None:
            problems.append(f"source.path: {path.name}: unsupported file type; allowed: .parquet, .csv, .csv.gz")
            continue
        if not path.is_file():
            problems.append(f"source.path: file not found: {path}")
            continue
        try:
            schema = _read_schema(path, kind)
        except InputDataError as exc:
            problems.append(exc.message)
            continue
        problems += _check_columns(config, path, kind, schema)
        files.append(SourceFile(path, kind))
    if problems:
        raise InputDataError("source: the input data cannot be read as declared", problems)
    return files


def _file_kind(path: Path) -> str | None:
    name = path.name.lower()
    if name.endswith(".parquet"):
        return "parquet"
    if name.endswith(".csv") or name.endswith(".csv.gz"):
        return "csv"
    return None


def _read_schema(path: Path, kind: str) -> arrow.Schema:
    try:
        if kind == "parquet":
            return pq.read_schema(path)
        reader = arrow_csv.open_csv(path, read_options=arrow_csv.ReadOptions(block_size=SNIFF_BLOCK_BYTES),
                                    parse_options=arrow_csv.ParseOptions(invalid_row_handler=lambda row: "skip"))
        return reader.schema
    except arrow.ArrowInvalid as exc:
        text = str(exc)
        if "Empty CSV file" in text or "empty" in text.lower():
            raise InputDataError(f"source.path: {path.name} is empty (no header line)") from None
        raise InputDataError(f"source.path: {path.name} cannot be read: {text.splitlines()[0]}") from None
    except OSError as exc:
        raise InputDataError(f"source.path: {path.name} cannot be read: {exc}") from None


def _column_roles(config) -> dict[str, tuple[str, str]]:
    """column -> (key path that declares it, declared kind: integer | number | string | id | key)."""
    roles = {config.source.record_id: ("source.record_id", "id"),
             config.geography.key: ("geography.key", "key"),
             config.design.weight: ("design.weight", "number")}
    for col in config.replicate_columns:
        roles[col] = ("design.replicates", "number")
    roles.update(_design_columns(config))
    for name, var in config.source.variables.items():
        roles[name] = (f"source.variables.{name}", var.type)
    return roles


def _check_columns(config, path: Path, kind: str, schema: arrow.Schema) -> list[str]:
    problems = []
    present = set(schema.names)
    roles = _column_roles(config)
    missing = [c for c in roles if c not in present]
    if missing:
        shown = ", ".join(f"{c!r} ({roles[c][0]})" for c in missing[:10])
        more = f" and {len(missing) - 10} more" if len(missing) > 10 else ""
        problems.append(f"{path.name}: missing column(s) {shown}{more}")
    if kind == "csv":
        return problems  # CSV text is typed row by row; bad values become rejects
    for col, (key_path, declared) in roles.items():
        if col not in present:
            continue
        t = schema.field(col).type
        if arrow.types.is_dictionary(t):
            t = t.value_type
        numeric = arrow.types.is_integer(t) or arrow.types.is_floating(t) or arrow.types.is_null(t)
        textual = arrow.types.is_string(t) or arrow.types.is_large_string(t)
        ok = {"integer": numeric, "number": numeric, "string": textual or numeric,
              "id": textual or arrow.types.is_integer(t), "key": textual or arrow.types.is_integer(t)}[declared]
        if not ok:
            allowed = {"integer": "integer or floating", "number": "integer or floating",
                       "string": "string", "id": "string or integer", "key": "string or integer"}[declared]
            problems.append(f"{path.name}: column {col!r} has type {t} but {key_path} needs {allowed}")
    return problems


def iter_batches(config, files: list[SourceFile], geography: Geography) -> Iterator[Batch]:
    """Read, type and validate every file batch by batch. Duplicate record ids are caught across
    batches and files (the first occurrence is kept)."""
    rules = row_rules(config, geography)
    schema = _schema(rules)
    # the replicate weights are most of the columns: one vectorised pass over them per batch, and
    # the schema's per-column checks of them only for a batch where that pass finds a bad value
    replicates = set(config.replicate_columns)
    without_replicates = {col: rule for col, rule in rules.items() if col not in replicates}
    schema_without_replicates = _schema(without_replicates)
    seen = SeenIds()
    design = ClusterDesignCheck.for_config(config)
    columns = needed_columns(config)
    for source in files:
        count = FileCount(source.path)
        reader = _parquet_batches if source.kind == "parquet" else _csv_batches
        for frame, malformed, row_numbers in reader(source.path, columns, config.source.batch_rows):
            rejects = [malformed] if len(malformed) else []
            frame, type_rejects = _coerce_types(config, frame)
            rejects.append(type_rejects)
            clean = (not config.replicate_columns
                     or bool(_valid_replicate_weight(frame[config.replicate_columns].to_numpy(dtype=np.float64)).all()))
            if clean and _rules_hold(without_replicates, frame):
                schema_failures = _empty_rejects()
            else:
                schema_failures = _schema_failures(schema_without_replicates if clean else schema, frame,
                                                   config.source.record_id)
            if len(type_rejects):  # text that is not a number is reported once, not again as missing
                already = set(zip(type_rejects["_position"], type_rejects["column"]))
                schema_failures = schema_failures[[(p, c) not in already for p, c in
                                                   zip(schema_failures["_position"], schema_failures["column"])]]
            rejects.append(schema_failures)
            rejects.append(_duplicate_ids(frame, config.source.record_id, seen))
            rejects = pd.concat([r for r in rejects if len(r)], ignore_index=True) if any(len(r) for r in rejects) \
                else _empty_rejects()
            bad_positions = rejects["_position"].dropna().astype(int).unique() if len(rejects) else []
            keep = np.ones(len(frame), dtype=bool)
            keep[np.asarray(bad_positions, dtype=int)] = False
            rejects["source_file"] = source.path.name
            positioned = rejects["_position"].notna().to_numpy()
            file_rows = rejects["row_number"].to_numpy(dtype=object).copy()
            file_rows[positioned] = row_numbers[rejects["_position"][positioned].astype(int).to_numpy()]
            rejects["row_number"] = pd.array(file_rows, dtype="Int64")
            rejects = rejects.drop(columns="_position")[REJECT_COLUMNS]
            n_read = len(frame) + len(malformed)
            n_rejected = int((~keep).sum()) + len(malformed)
            count.read += n_read
            count.rejected += n_rejected
            count.accepted += n_read - n_rejected
            accepted = frame if keep.all() else frame.loc[keep].reset_index(drop=True)  # no copy when all pass
            if design is not None:
                design.add(accepted)
            yield Batch(frame=accepted, rejects=rejects, count=count, rows_read=n_read, rows_rejected=n_rejected)
        if count.read == 0:
            raise InputDataError(f"source.path: {source.path.name} holds no records")
    if design is not None:
        design.raise_if_unusable()


def _empty_rejects() -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=object) for c in REJECT_COLUMNS + ["_position"]})


def _parquet_batches(path: Path, columns: list[str], batch_rows: int):
    """Yields (Arrow record batch, malformed-row rejects, the 1-based file row number of each row)."""
    first_row = 1
    try:
        # pre_buffer off: with it pyarrow caches the selected columns of the whole file, so memory
        # would follow the records
        for record_batch in pq.ParquetFile(path, pre_buffer=False).iter_batches(batch_size=batch_rows, columns=columns):
            yield record_batch, _empty_rejects(), np.arange(first_row, first_row + record_batch.num_rows)
            first_row += record_batch.num_rows
    except (arrow.ArrowException, OSError) as exc:
        raise InputDataError(f"source.path: {path.name} cannot be read: {str(exc).splitlines()[0]}") from None


def _csv_batches(path: Path, columns: list[str], batch_rows: int):
    """CSV is read as text and typed in `_coerce_types`, so a bad value rejects one row instead of
    failing the file. Lines with the wrong number of fields are set aside as malformed rows."""
    malformed: list[dict] = []

    def on_invalid_row(row) -> str:
        known = row.number is not None and row.number > 0  # physical line number; the header is line 1
        malformed.append({"row_number": row.number - 1 if known else None,
                          "record_id": None, "column": None, "rule": RejectReason.MALFORMED_ROW.value,
                          "value": f"{row.actual_columns} fields, expected {row.expected_columns}: {row.text[:200]}",
                          "_position": None})
        return "skip"

    # about batch_rows lines per block, assuming short lines; the block size only sets memory use
    read_options = arrow_csv.ReadOptions(block_size=max(SNIFF_BLOCK_BYTES, min(batch_rows * 256, 1 << 28)),
                                         use_threads=False)
    convert = arrow_csv.ConvertOptions(include_columns=columns, column_types={c: arrow.string() for c in columns},
                                       strings_can_be_null=True)
    skipped: list[int] = []  # data-row numbers of every malformed line seen so far
    try:
        reader = arrow_csv.open_csv(path, read_options=read_options, convert_options=convert,
                                    parse_options=arrow_csv.ParseOptions(invalid_row_handler=on_invalid_row))
        first_row = 1
        for record_batch in reader:
            bad = pd.DataFrame(malformed, columns=REJECT_COLUMNS + ["_position"]) if malformed else _empty_rejects()
            skipped += [r["row_number"] for r in malformed]
            malformed.clear()
            row_numbers = _rows_skipping(first_row, record_batch.num_rows, skipped)
            yield record_batch, bad, row_numbers
            first_row = int(row_numbers[-1]) + 1 if len(row_numbers) else first_row
    except (arrow.ArrowException, OSError) as exc:
        raise InputDataError(f"source.path: {path.name} cannot be read: {str(exc).splitlines()[0]}") from None
    if malformed:
        yield (pd.DataFrame(columns=columns), pd.DataFrame(malformed, columns=REJECT_COLUMNS + ["_position"]),
               np.empty(0, dtype=np.int64))


def _rows_skipping(first_row: int, count: int, skipped: list[int]) -> np.ndarray:
    """The `count` data-row numbers from `first_row` on, passing over malformed lines (which the
    CSV reader dropped from the batch), so that rejects name the row as it stands in the file."""
    later = np.array([r for r in skipped if r is not None and r >= first_row], dtype=np.int64)
    candidates = np.arange(first_row, first_row + count + len(later))
    return candidates[~np.isin(candidates, later)][:count]


def _reject_rows(frame: pd.DataFrame, id_column: str, positions: np.ndarray, column, rule, value) -> pd.DataFrame:
    """Reject rows for the records at `positions` of the batch (row numbers are filled in later)."""
    return pd.DataFrame({"row_number": None, "record_id": frame[id_column].iloc[positions].astype(str).to_numpy(),
                         "column": column, "rule": rule, "value": np.asarray(value).astype(str),
                         "_position": positions})


def _failure_rows(frame: pd.DataFrame, mask: np.ndarray, column: str, rule: RejectReason,
                  id_column: str) -> pd.DataFrame:
    positions = np.flatnonzero(mask)
    return _reject_rows(frame, id_column, positions, column, rule.value, frame[column].iloc[positions].to_numpy())


def _coerce_types(config, batch: arrow.RecordBatch | pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Give every column its working type: numbers as float64 with NaN for missing, strings and
    keys as Python str with None for missing. Text that is not a number becomes a reject. Works on
    the reader's Arrow batch directly: numeric columns go straight into one Fortran-ordered float64
    block (which pandas keeps as its own block, uncopied) and text columns become Python str in
    one pass each, without an intermediate pandas frame (on the benchmark's 2 million records of
    115 columns, reading and typing through that frame took 2.8 s, this 1.4 s)."""
    if isinstance(batch, pd.DataFrame):
        batch = arrow.RecordBatch.from_pandas(batch, preserve_index=False)
    id_col = config.source.record_id
    roles = _column_roles(config)
    ready = [col for col, (_, declared) in roles.items()
             if declared in ("integer", "number") and _arrow_numeric(batch.schema.field(col).type)]
    block = np.empty((batch.num_rows, len(ready)), dtype=np.float64, order="F")
    for j, col in enumerate(ready):
        values = batch.column(col)
        if values.null_count or arrow.types.is_boolean(values.type) or arrow.types.is_null(values.type):
            values = values.cast(arrow.float64())  # nulls become NaN below
        block[:, j] = values.to_numpy(zero_copy_only=False)
    out = {}
    failures = []
    for col, (_, declared) in roles.items():
        if col in ready:
            continue
        values = batch.column(col)
        kind = values.type.value_type if arrow.types.is_dictionary(values.type) else values.type
        if declared not in ("integer", "number") and (arrow.types.is_string(kind) or arrow.types.is_large_string(kind)
                                                       or arrow.types.is_integer(kind)):
            # text as it stands, and whole numbers in their decimal digits (what str() gives)
            out[col] = values.cast(arrow.string()).to_numpy(zero_copy_only=False)
            continue
        s = values.to_pandas()
        if declared in ("integer", "number"):
            text = s.astype(object).where(s.notna(), None)
            numbers = pd.to_numeric(pd.Series(text, dtype=object).str.strip(), errors="coerce").astype("float64")
            bad = numbers.isna().to_numpy() & s.notna().to_numpy() & (s.astype(str).str.strip() != "").to_numpy()
            if bad.any():
                raw = batch.select(list(dict.fromkeys([id_col, col]))).to_pandas()
                failures.append(_failure_rows(raw, bad, col, RejectReason.NOT_A_NUMBER, id_col))
            out[col] = numbers.to_numpy(dtype="float64", na_value=np.nan)
        else:
            text = s.astype(object)
            out[col] = np.where(pd.isna(text), None, text.astype(str)).astype(object)
    typed = pd.DataFrame(block, columns=ready, copy=False)
    for col, values in out.items():
        typed[col] = values
    typed = typed[list(roles)]
    rejects = pd.concat(failures, ignore_index=True) if failures else _empty_rejects()
    return typed, rejects


def _arrow_numeric(kind: arrow.DataType) -> bool:
    return (arrow.types.is_integer(kind) or arrow.types.is_floating(kind) or arrow.types.is_boolean(kind)
            or arrow.types.is_null(kind))


def typed_records(config, frame: pd.DataFrame) -> pd.DataFrame:
    """The columns a run reads, with exactly the working types `iter_batches` gives them, for
    records already in memory (the coverage study draws its samples in memory and writes no
    files). Only the typing is done, not the row rules: a value that cannot be typed raises
    InputDataError, since a real run would reject its row and the caller would silently differ."""
    typed, rejects = _coerce_types(config, frame)
    if len(rejects):
        first = rejects.iloc[0]
        raise InputDataError(f"{len(rejects)} value(s) cannot be typed as declared; first: column "
                             f"{first['column']!r}, value {first['value']!r}")
    return typed


# --------------------------------------------------------------------------------------------
# Row rules: defined once; a vectorised pass per batch, a pandera schema to name failures


@dataclass(frozen=True)
class RowRule:
    """The rules of one column: whether it may be missing, and checks (reason code, elementwise
    test, whether missing values skip the test)."""

    nullable: bool
    checks: tuple[tuple[str, Callable, bool], ...] = ()


def row_rules(config, geography: Geography) -> dict[str, RowRule]:
    """Row rules per column, from the config. Check names are RejectReason codes so that every
    failure maps to a stable reason. Nulls are checked by `nullable`; other checks skip nulls
    unless they say otherwise."""
    finite = np.isfinite
    rules = {
        config.source.record_id: RowRule(nullable=False),
        config.geography.key: RowRule(nullable=False, checks=(
            (RejectReason.UNKNOWN_GEOGRAPHY.value, lambda s, codes=list(geography.finest_codes): s.isin(codes), True),)),
        # weights: nullable here so that a missing weight fails the weight rule itself
        config.design.weight: RowRule(nullable=True, checks=(
            (RejectReason.WEIGHT_NOT_POSITIVE.value, lambda s: finite(s) & (s > 0), False),)),
    }
    for col, (_, kind) in _design_columns(config).items():
        # strata and cluster codes may not be missing (a row without them is rejected, like a
        # missing geography key); N_h is a property of the stratum, checked by ClusterDesignCheck
        rules[col] = RowRule(nullable=kind != "key")
    for col in config.replicate_columns:
        rules[col] = RowRule(nullable=True, checks=(
            (RejectReason.REPLICATE_WEIGHT_INVALID.value, _valid_replicate_weight, False),))
    for name, var in config.source.variables.items():
        checks = []
        if var.type == "integer":
            checks.append((RejectReason.NOT_AN_INTEGER.value, lambda s: finite(s) & (s == np.round(s)), True))
        if var.type in ("integer", "number") and (var.min is not None or var.max is not None):
            lo = -np.inf if var.min is None else var.min
            hi = np.inf if var.max is None else var.max
            checks.append((RejectReason.OUT_OF_RANGE.value, lambda s, lo=lo, hi=hi: (s >= lo) & (s <= hi), True))
        if var.values is not None:
            allowed = list(var.values) if var.type == "string" else [float(v) for v in var.values]
            checks.append((RejectReason.VALUE_NOT_ALLOWED.value, _one_of(allowed), True))
        rules[name] = RowRule(nullable=var.missing == "allowed", checks=tuple(checks))
    return rules


def _one_of(allowed: list) -> Callable:
    """Membership in the allowed values. For numbers numpy compares with each of the few allowed
    values in turn, faster than pandas hashing every value (30 indicators coded 1/2: 0.6 s of
    reading and validating 2 million records)."""
    def test(s: pd.Series) -> pd.Series:
        if s.dtype.kind == "f":
            return pd.Series(np.isin(s.to_numpy(), allowed), index=s.index)
        return s.isin(allowed)
    return test


def build_row_schema(config, geography: Geography) -> pa.DataFrameSchema:
    """The row rules as a pandera schema: it names every failing row, column and rule."""
    return _schema(row_rules(config, geography))


def _schema(rules: dict[str, RowRule]) -> pa.DataFrameSchema:
    return pa.DataFrameSchema(
        {col: pa.Column(nullable=rule.nullable,
                        checks=[pa.Check(test, name=name, ignore_na=skip_na) for name, test, skip_na in rule.checks])
         for col, rule in rules.items()}, strict=False, coerce=False)


def _rules_hold(rules: dict[str, RowRule], frame: pd.DataFrame) -> bool:
    """Whether every row passes every rule: one vectorised pass, the same tests as the schema's,
    so that the schema (which reports each failure, at a cost per column) runs only on a batch
    that has one."""
    for col, rule in rules.items():
        values = frame[col]
        missing = values.isna().to_numpy()
        if not rule.nullable and missing.any():
            return False
        for _name, test, skip_na in rule.checks:
            passed = np.asarray(test(values), dtype=bool)
            if not (passed | missing if skip_na else passed).all():
                return False
    return True


_PANDERA_NULL_CHECK = "not_nullable"


def _valid_replicate_weight(values):
    """The replicate-weight rule: finite and >= 0 (a column in the schema, or all of them at once)."""
    with np.errstate(invalid="ignore"):
        return np.isfinite(values) & (values >= 0)


def _schema_failures(schema: pa.DataFrameSchema, frame: pd.DataFrame, id_column: str) -> pd.DataFrame:
    """Apply the row schema lazily and turn pandera's failure cases into reject rows."""
    if frame.empty:
        return _empty_rejects()
    try:
        schema.validate(frame, lazy=True)
        return _empty_rejects()
    except pa.errors.SchemaErrors as exc:
        cases = exc.failure_cases
    cases = cases[cases["index"].notna()]
    positions = cases["index"].astype(int).to_numpy()
    rule = cases["check"].astype(str).map(
        lambda c: RejectReason.MISSING_NOT_ALLOWED.value if c == _PANDERA_NULL_CHECK else c)
    return _reject_rows(frame, id_column, positions, cases["column"].astype(str).to_numpy(), rule.to_numpy(),
                        cases["failure_case"].astype(str).to_numpy())


class SeenIds:
    """Record ids seen so far, as sorted runs of 64-bit keys (string ids are hashed). This is the
    one structure that grows with the number of records: 8 bytes per record. New keys form a new
    sorted run, and runs are merged like the digits of a binary counter (a run joins the one
    before it while that one is at most twice its size): O(log N) runs to search per batch, and
    each key merged O(log N) times. (Merging everything whenever there were more than 8 runs,
    with unsorted needles, took 19.9 s for 10 million random ids in batches of 50,000 against
    1.6 s for 2 million; this takes 4.7 s and 0.55 s.)"""

    def __init__(self):
        self._runs: list[np.ndarray] = []

    def mark(self, ids: pd.Series) -> np.ndarray:
        """Record `ids`; return a mask of those seen before (earlier in this batch included)."""
        if ids.dtype.kind in "iuf":
            keys = ids.to_numpy().astype(np.int64).view(np.uint64)
        else:
            keys = pd.util.hash_array(ids.astype(str).to_numpy(dtype=object))
        earlier = pd.Series(keys).duplicated().to_numpy().copy()
        # searched in sorted order: neighbouring needles walk the same part of a run (several
        # times faster than random needles once a run outgrows the cache)
        order = np.argsort(keys)
        ordered = keys[order]
        for run in self._runs:
            pos = np.searchsorted(run, ordered).clip(max=len(run) - 1)
            earlier[order] |= run[pos] == ordered
        if len(keys):
            self._runs.append(ordered)
        while len(self._runs) > 1 and len(self._runs[-2]) <= 2 * len(self._runs[-1]):
            last = self._runs.pop()
            # two sorted runs end to end: the stable sort (a merge sort) joins them in one pass
            self._runs[-1] = np.sort(np.concatenate([self._runs[-1], last]), kind="stable")
        return earlier


ONE_STRATUM = "(one stratum)"  # the stratum code of every record when design.linearization.strata is not given


class ClusterDesignCheck:
    """The linearization design over every accepted record, across batches and files: the sampled
    clusters n_h of each stratum and its N_h (population_clusters). Problems here belong to a
    stratum, not to a row, so they fail the input (InputDataError naming the stratum and values)
    instead of rejecting rows. Memory follows the number of clusters, not of records.

    Checked: N_h a number > 0, the same on every record of its stratum, and at least n_h; with
    single_cluster_strata 'error', no stratum with one sampled cluster; with 'collapse', a
    neighbouring stratum to collapse with.
    """

    SHOWN = 10  # problems listed per kind

    def __init__(self, *, strata: str | None, clusters: str, population_clusters: str | None,
                 single_cluster_strata: str):
        self.strata = strata
        self.clusters = clusters
        self.population_clusters = population_clusters
        self.single_cluster_strata = single_cluster_strata
        self._sampled: set[tuple[str, str]] = set()
        self._population: dict[str, float] = {}
        self._conflicting: dict[str, set[float]] = {}
        self._invalid: dict[str, object] = {}

    @classmethod
    def for_config(cls, config) -> "ClusterDesignCheck | None":
        lin = config.design.linearization if config.design.variance == "linearization" else None
        if lin is None:
            return None
        return cls(strata=lin.strata, clusters=lin.clusters, population_clusters=lin.population_clusters,
                   single_cluster_strata=lin.single_cluster_strata)

    def add(self, frame: pd.DataFrame) -> None:
        if not len(frame):
            return
        strata = (frame[self.strata].to_numpy(dtype=object) if self.strata is not None
                  else np.full(len(frame), ONE_STRATUM, dtype=object))
        pairs = pd.DataFrame({"s": strata, "c": frame[self.clusters].to_numpy(dtype=object)}).drop_duplicates()
        self._sampled.update(zip(pairs["s"], pairs["c"]))
        if self.population_clusters is None:
            return
        values = pd.DataFrame({"s": strata, "n": frame[self.population_clusters].to_numpy(dtype=np.float64)})
        for stratum, value in zip(*values.drop_duplicates().to_numpy().T):
            value = float(value)
            if not (np.isfinite(value) and value > 0):
                self._invalid.setdefault(stratum, value)
                continue
            first = self._population.setdefault(stratum, value)
            if value != first:
                self._conflicting.setdefault(stratum, {first}).add(value)

    def sampled_clusters(self) -> dict[str, int]:
        """n_h: the clusters with at least one accepted record, per stratum."""
        counts: dict[str, int] = {}
        for stratum, _ in self._sampled:
            counts[stratum] = counts.get(stratum, 0) + 1
        return counts

    def problems(self) -> list[str]:
        n_h = self.sampled_clusters()
        path = f"design.linearization.population_clusters ({self.population_clusters!r})"
        found: list[list[str]] = [[], [], [], []]
        for stratum in sorted(self._invalid):
            found[0].append(f"{path}: stratum {stratum!r} has {self._invalid[stratum]:g}; N_h, the clusters in "
                            "the stratum's population, must be a number > 0 on every record")
        for stratum in sorted(self._conflicting):
            shown = ", ".join(f"{v:g}" for v in sorted(self._conflicting[stratum]))
            found[1].append(f"{path}: stratum {stratum!r} has different values ({shown}); N_h must be the "
                            "same on every record of a stratum")
        for stratum in sorted(self._population):
            big_n = self._population[stratum]
            if stratum not in self._conflicting and stratum not in self._invalid and big_n < n_h[stratum]:
                found[2].append(f"{path}: stratum {stratum!r} has N_h = {big_n:g} but {n_h[stratum]} sampled "
                                "clusters; N_h must be at least the clusters sampled there")
        single = sorted(s for s, k in n_h.items() if k == 1)
        choice_path = f"design.linearization.single_cluster_strata ({self.single_cluster_strata!r})"
        if single and self.single_cluster_strata == "error":
            for stratum in single:
                cluster = next(c for s, c in self._sampled if s == stratum)
                found[3].append(f"{choice_path}: stratum {stratum!r} has one sampled cluster ({cluster!r}), so "
                                "its variance contribution cannot be estimated; choose skip, grand_mean or "
                                "collapse, or correct the strata")
        if single and self.single_cluster_strata == "collapse" and len(n_h) == 1:
            found[3].append(f"{choice_path}: the sample has one stratum ({single[0]!r}) with one cluster; "
                            "there is no neighbouring stratum to collapse it with")
        out = []
        for kind in found:
            out += kind[: self.SHOWN]
            if len(kind) > self.SHOWN:
                out.append(f"... and {len(kind) - self.SHOWN} more like the above")
        return out

    def raise_if_unusable(self) -> None:
        problems = self.problems()
        if problems:
            raise InputDataError("design.linearization: the sampling design in the input cannot be used "
                                 "for linearization", problems)


def _duplicate_ids(frame: pd.DataFrame, id_column: str, seen: SeenIds) -> pd.DataFrame:
    ids = frame[id_column]
    present = ids.notna().to_numpy()
    dup = np.zeros(len(frame), dtype=bool)
    dup[present] = seen.mark(ids[present])
    if not dup.any():
        return _empty_rejects()
    return _failure_rows(frame, dup, id_column, RejectReason.DUPLICATE_RECORD_ID, id_column)


# --------------------------------------------------------------------------------------------
# Provenance


def describe_file(path: Path, *, rows: int | None = None) -> dict:
    """sha256, size and row count of an input, for the manifest."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    entry = {"path": str(path), "sha256": digest.hexdigest(), "bytes": path.stat().st_size}
    if rows is not None:
        entry["rows"] = rows
    return entry
