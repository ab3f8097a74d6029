"""Run the stages, hold the output lock, stage the release and move it into place.

A release is built in a staging folder inside the output folder and renamed into place only when
complete; `latest` is then replaced atomically. A failed or killed run leaves the previous
releases and `latest` exactly as they were (a leftover staging folder is removed by the next run).
"""

from __future__ import annotations

import datetime as dt
import fcntl
import os
import platform
import re
import shutil
import time
from collections.abc import Callable
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline import __version__
from pipeline.config import RELEASE_NAME_PATTERN, Config, load_config
from pipeline.errors import ConfigError, InputDataError, ReleaseRefused
from pipeline.flags import Status
from pipeline.metadata import build_metadata
from pipeline.stages import aggregate, assess, derive, estimate, ingest, protect, publish

LOCK_NAME = ".ratebook.lock"
STAGING_PREFIX = ".staging-"


def _quiet(_: str) -> None:
    pass


@dataclass
class Reporter:
    """Where the runner says what it is doing. The CLI plugs in a terminal progress display."""

    stage: Callable[[str], None] = _quiet
    rows: Callable[[int], None] = lambda n: None


@dataclass
class InputCheck:
    """What validation found: counts per file and every reject."""

    files: list[ingest.FileCount]
    rejects: pd.DataFrame
    lookup: dict
    geography: ingest.Geography

    @property
    def read(self) -> int:
        return sum(c.read for c in self.files)

    @property
    def accepted(self) -> int:
        return sum(c.accepted for c in self.files)

    @property
    def rejected(self) -> int:
        return sum(c.rejected for c in self.files)

    def reject_summary(self, limit: int = 10) -> list[str]:
        """One line per (column, rule): how many rows, and the first example."""
        if not len(self.rejects):
            return []
        lines = []
        grouped = self.rejects.groupby(["column", "rule"], dropna=False, sort=True)
        for (column, rule), rows in list(grouped)[:limit]:
            first = rows.iloc[0]
            where = f"column {column!r}" if isinstance(column, str) else "whole line"
            lines.append(f"{rule}: {len(rows)} row(s), {where}; first: {first['source_file']} row "
                         f"{first['row_number']}, value {first['value']!r}")
        return lines


@dataclass(frozen=True)
class RunSummary:
    release_id: str
    release_dir: Path
    rows_read: int
    rows_accepted: int
    rows_rejected: int
    cells: int
    statuses: dict[str, int]
    seconds: float
    stage_seconds: dict[str, float] = field(default_factory=dict)


# --------------------------------------------------------------------------------------------


def check_inputs(config: Config, reporter: Reporter = Reporter(), *, on_batch=None) -> InputCheck:
    """Read and validate every input. Raises InputDataError for schema failures and for more
    rejects than allowed; `on_batch(frame, geography)` receives each accepted batch (the run
    derives and aggregates there, so records are read once)."""
    reporter.stage("ingest: geography lookup")
    geography, lookup_entry = ingest.read_geography(config)
    reporter.stage("ingest: checking input columns")
    files = ingest.plan_source(config)
    reporter.stage("ingest + aggregate: reading record batches")
    counts: dict[Path, ingest.FileCount] = {}
    rejects = []
    for batch in ingest.iter_batches(config, files, geography):
        counts[batch.count.path] = batch.count
        if len(batch.rejects):
            rejects.append(batch.rejects)
        if on_batch is not None and len(batch.frame):
            on_batch(batch.frame, geography)
        reporter.rows(batch.rows_read)
    result = InputCheck(files=list(counts.values()),
                        rejects=pd.concat(rejects, ignore_index=True) if rejects else
                        pd.DataFrame(columns=ingest.REJECT_COLUMNS),
                        lookup=lookup_entry, geography=geography)
    _enforce_reject_policy(config, result)
    return result


def _enforce_reject_policy(config: Config, found: InputCheck) -> None:
    src = config.source
    if found.read == 0:
        raise InputDataError("source: the input holds no records")
    share = found.rejected / found.read
    if found.rejected and src.invalid_rows == "fail":
        raise InputDataError(f"source: {found.rejected} of {found.read} rows failed validation and "
                             "source.invalid_rows is 'fail'", found.reject_summary())
    if share > src.max_rejected_share:
        raise InputDataError(f"source: {found.rejected} of {found.read} rows rejected ({share:.2%}), more than "
                             f"source.max_rejected_share ({src.max_rejected_share:.2%}); nothing is published",
                             found.reject_summary())
    if found.accepted == 0:
        raise InputDataError("source: no record passed validation")


def run(config_path: str | Path, *, release_id: str | None = None, replace: bool = False,
        reporter: Reporter = Reporter()) -> RunSummary:
    started = time.perf_counter()
    timings: dict[str, float] = {}
    config = load_config(config_path)
    release_id = release_id or f"{config.release.name}-{dt.datetime.now(dt.timezone.utc):%Y%m%d}"
    if not re.match(RELEASE_NAME_PATTERN, release_id) or release_id == "latest":
        raise ConfigError(f"--release-id: {release_id!r} is not allowed; use letters, digits, '.', '_' "
                          "and '-', starting with a letter or digit (and not 'latest')")
    out_dir = config.output_dir
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ConfigError(f"output.dir: cannot create {out_dir}: {exc.strerror or exc}") from None
    final = out_dir / release_id
    with _output_lock(out_dir):
        _refuse_existing(final, replace)
        layout = derive.domain_layout(config)
        accumulators: dict[str, aggregate.CellAccumulator] = {}

        def add_batch(frame: pd.DataFrame, geography: ingest.Geography) -> None:
            if not accumulators:  # sized once the lookup has told how many finest units there are
                accumulators["all"] = aggregate.CellAccumulator(
                    indicators=len(config.indicators), cells=len(geography.finest_codes) * layout.n_cells,
                    replicates=len(config.replicate_columns))
            accumulators["all"].add(derive.derive(config, frame, geography, layout))

        t = time.perf_counter()
        found = check_inputs(config, reporter, on_batch=add_batch)
        timings["ingest_derive_aggregate"] = time.perf_counter() - t
        reporter.stage("aggregate: rolling up to every level and breakdown")
        t = time.perf_counter()
        cells = aggregate.roll_up(accumulators["all"], config, found.geography, layout)
        accumulators.clear()  # the finest sums are in `cells` now; free them before estimation
        timings["roll_up"] = time.perf_counter() - t
        reporter.stage("estimate")
        t = time.perf_counter()
        frame = estimate.estimate(cells, config)
        timings["estimate"] = time.perf_counter() - t
        reporter.stage("assess")
        t = time.perf_counter()
        frame, severity, reasons = assess.assess(frame, config)
        timings["assess"] = time.perf_counter() - t
        reporter.stage("protect: disclosure control and audit")
        t = time.perf_counter()
        # raises ReleaseRefused (exit 4) when the audit fails: nothing is staged or published
        frame, disclosure = protect.protect_release(frame, severity, reasons, config, geography=found.geography)
        public = protect.public_estimates(frame, config, layout.names)
        timings["protect"] = time.perf_counter() - t

        reporter.stage("publish")
        t = time.perf_counter()
        manifest = _manifest(config, release_id, found)
        manifest["disclosure"] = disclosure
        staging = out_dir / f"{STAGING_PREFIX}{release_id}-{os.getpid()}"
        try:
            manifest = publish.write_release(staging, public=public, cells=frame, rejects=found.rejects,
                                             metadata=build_metadata(config, layout.names), manifest=manifest,
                                             formats=list(config.output.formats))
            _refuse_existing(final, replace)
            _move_into_place(staging, final)
        finally:
            shutil.rmtree(staging, ignore_errors=True)
        publish.write_text_atomically(out_dir / "latest", release_id + "\n")
        timings["publish"] = time.perf_counter() - t
    statuses = {s.value: int((frame["status"] == s.value).sum()) for s in Status}
    return RunSummary(release_id=release_id, release_dir=final, rows_read=found.read,
                      rows_accepted=found.accepted, rows_rejected=found.rejected, cells=len(frame),
                      statuses=statuses, seconds=time.perf_counter() - started, stage_seconds=timings)


def _refuse_existing(final: Path, replace: bool) -> None:
    if final.exists() and not replace:
        raise ReleaseRefused(f"release {final.name!r} already exists in {final.parent}; "
                             "give --replace to overwrite it or --release-id to choose another id")


def _move_into_place(staging: Path, final: Path) -> None:
    """Rename the complete staging folder into place; an old release being replaced is first
    moved aside, so at every moment the release id names a complete folder or none."""
    if final.exists():
        aside = final.with_name(f"{STAGING_PREFIX}old-{final.name}-{os.getpid()}")
        os.rename(final, aside)
        os.rename(staging, final)
        shutil.rmtree(aside, ignore_errors=True)
    else:
        os.rename(staging, final)


@contextmanager
def _output_lock(out_dir: Path):
    """One run at a time per output folder. flock is released by the kernel if the process dies,
    so a killed run never leaves a stale lock."""
    path = out_dir / LOCK_NAME
    fh = open(path, "a+")
    try:
        try:
            fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise ReleaseRefused(f"another ratebook run holds the lock on {out_dir} ({LOCK_NAME}); "
                                 "wait for it to finish") from None
        for leftover in out_dir.glob(f"{STAGING_PREFIX}*"):
            shutil.rmtree(leftover, ignore_errors=True)  # from a killed run; we hold the lock
        yield
    finally:
        fh.close()


def _manifest(config: Config, release_id: str, found: InputCheck) -> dict:
    import pandera
    import pyarrow
    import scipy

    files = []
    for count in found.files:
        entry = ingest.describe_file(count.path)
        entry.update(rows_read=count.read, rows_accepted=count.accepted, rows_rejected=count.rejected)
        files.append(entry)
    return {
        "release_id": release_id,
        "created_at": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
        "config": {"path": str(config.path), "sha256": config.sha256},
        "inputs": {"microdata": files, "geography_lookup": found.lookup},
        "reconciliation": {"rows_read": found.read, "rows_accepted": found.accepted,
                           "rows_rejected": found.rejected,
                           "balanced": found.read == found.accepted + found.rejected},
        "versions": {"ratebook": __version__, "python": platform.python_version(), "numpy": np.__version__,
                     "pandas": pd.__version__, "pyarrow": pyarrow.__version__, "scipy": scipy.__version__,
                     "pandera": pandera.__version__},
    }
