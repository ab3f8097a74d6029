"""Coverage study: how often the pipeline's intervals contain the true population proportion.

    python -m pipeline.coverage --samples 500 --persons 40000 --workers 2 --out data/out/coverage
    run_coverage(samples=..., persons=..., seed=..., workers=..., out_dir=...) -> CoverageResult

The demo population (`pipeline.demo.build_population`) is built once; the demo design then draws
`samples` independent samples from it (sample i uses seed `seed + 1 + i`; the population uses
`seed`). Every sample goes through the pipeline's own stages in memory — ingest typing, derive,
aggregate, roll-up, estimate, assess, protect — once per variance method and interval method,
with configs made from configs/demo.yaml. No file is written per sample.

For every variance method × interval method × band of effective sample size the study counts the
cell-samples with an interval and the ones whose interval contains the truth (the demo's truth
table), for all cells and for the cells the reliability rules publish (status not `suppressed`).

Definitions (also written into coverage.json and coverage_summary.md):
* Bands are by the cell's effective sample size as the pipeline estimated it in that sample under
  that variance method (the figure a reader of the release sees, rounded to 6 decimals against
  floating-point noise), not by a fixed property of the cell: <30, 30-99, 100-299, 300-999, >=1000.
* A cell-sample counts when the truth is defined (its universe is not empty in the population) and
  the interval has finite bounds; covered means ci_lower <= truth <= ci_upper.
* Published cells: status not suppressed under the rules of configs/demo.yaml (`standard: custom`)
  for every interval except korn_graubard, which the config only accepts with
  `reliability.standard: nchs_2017`, so its published cells are those of that standard.
* Monte Carlo standard error: the cells of one sample share that sample's clusters and weights, so
  they are not independent; the samples are. The covered share is P = Σ_s c_s / Σ_s n_s (c_s
  covered of n_s cell-samples in sample s) and its standard error is the between-sample ratio
  estimate √(S/(S−1) · Σ_s (c_s − P·n_s)²) / Σ_s n_s, i.e. computed from the per-sample coverage
  shares c_s/n_s weighted by n_s, never from the cell count. The binomial figure √(P(1−P)/Σn),
  which ignores that correlation, is given beside it for comparison.
* Enough cells to judge: at least 1,000 cell-samples and a Monte Carlo standard error under
  0.5 percentage points. Target for 95% intervals: 93.5% to 97.5%.
"""

from __future__ import annotations

import argparse
import copy
import hashlib
import json
import multiprocessing
import os
import platform
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

from pipeline import demo
from pipeline.config import Config, load_config
from pipeline.errors import ConfigError
from pipeline.flags import Status
from pipeline.methods.intervals import IntervalMethod
from pipeline.stages import aggregate, assess, derive, estimate, ingest, protect

__all__ = [
    "BANDS",
    "CHART_EDGES",
    "CoverageResult",
    "INTERVAL_METHODS",
    "VARIANCE_METHODS",
    "main",
    "run_coverage",
    "sample_seed",
]

ROOT = Path(__file__).resolve().parents[1]
DEMO_CONFIG = ROOT / "configs" / "demo.yaml"
LINEARIZATION_CONFIG = ROOT / "configs" / "demo_linearization.yaml"
DEFAULT_SEED = 20261202  # the demo's population, so the truth is that of `ratebook demo`

VARIANCE_METHODS = ("simple_random", "kish", "replicate", "linearization")
INTERVAL_METHODS = tuple(m.value for m in IntervalMethod)
# The only interval the nchs_2017 standard judges; every other interval runs under the custom rules.
NCHS_INTERVAL = IntervalMethod.KORN_GRAUBARD.value
SUBSETS = ("all", "published")

# Bands of effective sample size, [from, to).
BANDS: tuple[tuple[str, float, float], ...] = (
    ("<30", 0.0, 30.0), ("30-99", 30.0, 100.0), ("100-299", 100.0, 300.0),
    ("300-999", 300.0, 1000.0), (">=1000", 1000.0, np.inf))
# Finer bins for the chart only.
CHART_EDGES = (0.0, 10.0, 20.0, 30.0, 50.0, 75.0, 100.0, 150.0, 200.0, 300.0, 500.0, 750.0,
               1000.0, 2000.0, 5000.0, np.inf)
_BAND_EDGES = np.array([b[1] for b in BANDS] + [np.inf])

TARGET = (0.935, 0.975)
MIN_CELL_SAMPLES = 1_000
MAX_MC_SE = 0.005
CONFIDENCE = 0.95
TARGET_METHODS = ("wilson", "clopper_pearson", "korn_graubard")
HEADLINE_METHODS = ("wilson", "clopper_pearson", "korn_graubard", "wald")
HEADLINE_DESIGNS = ("replicate", "linearization")

# Counts kept per (variance, interval, bin, subset): cell-samples, covered, truth below the lower
# bound (the rest of the misses have the truth above the upper bound).
_CELLS, _COVERED, _BELOW = 0, 1, 2


def sample_seed(seed: int, i: int) -> int:
    """Seed of sample i (0-based) in a study whose population uses `seed`. Different seeds feed
    numpy's SeedSequence, which makes their streams independent however close the integers are."""
    return seed + 1 + i


@dataclass(frozen=True)
class CoverageResult:
    """What one study found.

    table: one row per variance × interval × subset × band (plus band 'all'), see `_table`.
    by_effective_n: the same counts on the finer chart bins.
    per_sample: raw counts, shape (samples, variance methods, interval methods, bands, subsets,
    3) with the last axis (cell-samples, covered, truth below the interval), in the order of
    `variance_methods`, INTERVAL_METHODS, BANDS, SUBSETS.
    parameters: what was run (also coverage.json). unavailable: variance methods not run, with why.
    """

    table: pd.DataFrame
    by_effective_n: pd.DataFrame
    per_sample: np.ndarray
    variance_methods: tuple[str, ...]
    sample_seeds: tuple[int, ...]
    parameters: dict
    unavailable: dict[str, str] = field(default_factory=dict)
    files: dict[str, Path] = field(default_factory=dict)

    def coverage(self, variance: str, interval: str, band: str = "all", subset: str = "published") -> float:
        """The covered share of one row of the table."""
        t = self.table
        row = t[(t["variance"] == variance) & (t["interval"] == interval) & (t["band"] == band)
                & (t["subset"] == subset)]
        return float(row["covered_share"].iloc[0])


# --------------------------------------------------------------------------------------------
# Configs


def _settings(variance: str, interval: str, *, base: dict, folder: Path, linearization: dict) -> dict:
    s = copy.deepcopy(base)
    # Only the lookup is read (once, for the geography); the microdata never touch a file.
    s["source"]["path"] = str(folder / "demo_persons.parquet")
    s["geography"]["lookup"] = str(folder / "demo_areas.csv")
    s["output"]["dir"] = str(folder / "out")
    if variance == "replicate":
        s["design"] = {"weight": base["design"]["weight"], "variance": "replicate",
                       "replicates": copy.deepcopy(base["design"]["replicates"])}
    elif variance == "linearization":
        s["design"] = copy.deepcopy(linearization)
    else:
        s["design"] = {"weight": base["design"]["weight"], "variance": variance}
    s["estimation"]["interval"] = interval
    s["estimation"]["confidence"] = CONFIDENCE
    if interval == NCHS_INTERVAL:
        s["reliability"]["standard"] = "nchs_2017"
    return s


def _linearization_design(base: dict, microdata_columns: list[str], notes: list[str]) -> dict:
    """The demo's linearization design: from configs/demo_linearization.yaml when it exists (its
    authors' choice of strata, clusters and single-cluster handling), else strata = stratum and
    clusters = psu, with N_h from psu_count when the microdata carry it."""
    if LINEARIZATION_CONFIG.is_file():
        design = yaml.safe_load(LINEARIZATION_CONFIG.read_text())["design"]
        shown = (LINEARIZATION_CONFIG.relative_to(ROOT) if LINEARIZATION_CONFIG.is_relative_to(ROOT)
                 else LINEARIZATION_CONFIG)
        notes.append(f"linearization design taken from {shown}")
    else:
        design = {"weight": base["design"]["weight"], "variance": "linearization",
                  "linearization": {"strata": "stratum", "clusters": "psu",
                                    "population_clusters": "psu_count"}}
        notes.append("linearization design built here (strata: stratum, clusters: psu, "
                     "population_clusters: psu_count); configs/demo_linearization.yaml did not exist")
    lin = design.get("linearization") or {}
    column = lin.get("population_clusters")
    if column is not None and column not in microdata_columns:
        # Without N_h the variance has no finite population correction: slightly conservative.
        lin.pop("population_clusters")
        notes.append(f"the demo microdata have no {column!r} column, so linearization ran without "
                     "a finite population correction")
    return design


# --------------------------------------------------------------------------------------------
# One sample through the stages. Workers inherit this state by fork, so the population (tens of MB)
# and the compiled configs are built once.


@dataclass
class _Study:
    population: demo.DemoPopulation
    persons: int
    configs: dict[tuple[str, str], Config]
    variance_methods: tuple[str, ...]
    geography: dict[str, ingest.Geography]
    layout: derive.DomainLayout
    truth: np.ndarray  # aligned with the rows of the rolled-up cell table
    keys: pd.DataFrame  # the key columns of that table, to check the alignment


_STUDY: _Study | None = None

# The estimators of simple_random and kish read only the scalar cell sums, which derive and
# aggregate compute the same way whatever the variance method; so they reuse the table
# aggregated for replicate weights (that table merely carries replicate sums as well).
# `_check_shortcuts` compares this with their own aggregation on the first sample of every run.
_AGGREGATED_WITH = {"simple_random": "replicate", "kish": "replicate", "replicate": "replicate",
                    "linearization": "linearization"}
_KEY_COLUMNS = ["indicator", "geo_level", "geo_code"]


def _aggregate(config: Config, microdata: pd.DataFrame, geography: ingest.Geography,
               layout: derive.DomainLayout) -> aggregate.CellTable:
    """What `runner.run` does with the accepted batches, on one in-memory batch."""
    typed = ingest.typed_records(config, microdata)
    acc = aggregate.CellAccumulator(indicators=len(config.indicators),
                                    cells=len(geography.finest_codes) * layout.n_cells,
                                    replicates=len(config.replicate_columns))
    acc.add(derive.derive(config, typed, geography, layout))
    return aggregate.roll_up(acc, config, geography, layout)


def _status(frame: pd.DataFrame, config: Config) -> np.ndarray:
    frame, severity, reasons = assess.assess(frame, config)
    return protect.protect(frame, severity, reasons, config)["status"].to_numpy()


def _estimates(study: _Study, microdata: pd.DataFrame, variances: tuple[str, ...]):
    """Yield (variance, interval, estimate frame, status) for one sample."""
    tables: dict[str, aggregate.CellTable] = {}
    for variance in variances:
        source = _AGGREGATED_WITH[variance]
        if source not in tables:
            config = study.configs[(source, INTERVAL_METHODS[0])]
            tables[source] = _aggregate(config, microdata, study.geography[source], study.layout)
        first = estimate.estimate(tables[source], study.configs[(variance, INTERVAL_METHODS[0])])
        custom_status = None
        for interval in INTERVAL_METHODS:
            config = study.configs[(variance, interval)]
            frame = first if interval == INTERVAL_METHODS[0] else estimate.with_interval(first, config)
            if config.reliability.standard != "custom":
                status = _status(frame, config)
            else:
                # The custom rules read n, p̂, the effective n, the cv and the counts, never the
                # interval, so their outcome is the same for every interval method (checked by
                # `_check_shortcuts`) and is computed once.
                if custom_status is None:
                    custom_status = _status(frame, config)
                status = custom_status
            yield variance, interval, frame, status


def _bin_counts(edges: np.ndarray, effective_n: np.ndarray, usable: np.ndarray, covered: np.ndarray,
                below: np.ndarray, published: np.ndarray) -> np.ndarray:
    """(bins, subsets, 3) counts."""
    bins = len(edges) - 1
    where = np.clip(np.searchsorted(edges, effective_n, side="right") - 1, 0, bins - 1)
    out = np.zeros((bins, len(SUBSETS), 3), dtype=np.int64)
    for j, subset in enumerate((usable, usable & published)):
        for k, flag in ((_CELLS, subset), (_COVERED, subset & covered), (_BELOW, subset & below)):
            out[:, j, k] = np.bincount(where[flag], minlength=bins)
    return out


def _run_sample(index_and_seed: tuple[int, int]) -> tuple[int, np.ndarray, np.ndarray]:
    """Counts for one sample: (index, band counts, chart-bin counts), each shaped
    (variance methods, interval methods, bins, subsets, 3)."""
    index, seed = index_and_seed
    study = _STUDY
    microdata = demo.draw_survey(study.population, seed=seed, persons=study.persons)
    n_v, n_i = len(study.variance_methods), len(INTERVAL_METHODS)
    bands = np.zeros((n_v, n_i, len(BANDS), len(SUBSETS), 3), dtype=np.int64)
    fine = np.zeros((n_v, n_i, len(CHART_EDGES) - 1, len(SUBSETS), 3), dtype=np.int64)
    chart_edges = np.array(CHART_EDGES)
    truth = study.truth
    for variance, interval, frame, status in _estimates(study, microdata, study.variance_methods):
        if len(frame) != len(truth):
            raise AssertionError("coverage: the cell table no longer lines up with the truth table")
        lower = frame["ci_lower"].to_numpy(dtype=np.float64)
        upper = frame["ci_upper"].to_numpy(dtype=np.float64)
        # Rounded before banding: p̂q̂ / (p̂q̂/n) can come out as 29.999999999999996 for n = 30,
        # which would put a cell that shows an effective n of 30 in the band below.
        effective_n = np.round(frame["effective_n"].to_numpy(dtype=np.float64), 6)
        usable = np.isfinite(truth) & np.isfinite(lower) & np.isfinite(upper)
        with np.errstate(invalid="ignore"):
            covered = usable & (lower <= truth) & (truth <= upper)
            below = usable & (truth < lower)
        published = status != Status.SUPPRESSED.value
        v, i = study.variance_methods.index(variance), INTERVAL_METHODS.index(interval)
        bands[v, i] = _bin_counts(_BAND_EDGES, effective_n, usable, covered, below, published)
        fine[v, i] = _bin_counts(chart_edges, effective_n, usable, covered, below, published)
    return index, bands, fine


def _check_shortcuts(study: _Study, seed: int) -> None:
    """On one sample, every shortcut against the plain path: each config aggregated on its own,
    estimated by estimate.estimate and assessed and protected on its own must give the same
    frame and the same status as the shared aggregation, the re-computed intervals and the
    once-per-design custom-rule status."""
    microdata = demo.draw_survey(study.population, seed=seed, persons=study.persons)
    own_tables: dict[str, aggregate.CellTable] = {}
    for variance, interval, frame, status in _estimates(study, microdata, study.variance_methods):
        config = study.configs[(variance, interval)]
        if variance not in own_tables:
            own_tables[variance] = _aggregate(config, microdata, study.geography[variance], study.layout)
            keys = own_tables[variance].frame[study.keys.columns].reset_index(drop=True)
            if not keys.equals(study.keys):
                raise AssertionError("coverage: cell keys differ from the truth alignment")
        own = estimate.estimate(own_tables[variance], config)
        pd.testing.assert_frame_equal(own, frame, check_exact=True)
        # With equal frames only a shared status can differ: the custom-rule status computed once
        # for the first interval and reused for the others.
        reused = config.reliability.standard == "custom" and interval != INTERVAL_METHODS[0]
        if reused and not np.array_equal(_status(own, config), status):
            raise AssertionError(f"coverage: the status of {variance}/{interval} depends on the "
                                 "interval under the custom rules; compute it per interval")


# --------------------------------------------------------------------------------------------
# Tables


def _share_and_se(counts: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """counts (samples, ..., 3) -> covered share, Monte Carlo SE (between samples), binomial SE."""
    n_s = counts[..., _CELLS].astype(np.float64)
    c_s = counts[..., _COVERED].astype(np.float64)
    total = n_s.sum(axis=0)
    samples = counts.shape[0]
    with np.errstate(invalid="ignore", divide="ignore"):
        share = c_s.sum(axis=0) / total
        spread = ((c_s - share * n_s) ** 2).sum(axis=0)
        mc_se = np.sqrt(samples / (samples - 1) * spread) / total if samples > 1 else np.full_like(total, np.nan)
        binomial = np.sqrt(share * (1.0 - share) / total)
    return share, mc_se, binomial


def _table(per_sample: np.ndarray, variances: tuple[str, ...], bins: list[tuple[str, float, float]],
           *, with_all: bool) -> pd.DataFrame:
    """One row per variance × interval × subset × bin. per_sample: (samples, V, I, bins, 2, 3)."""
    if with_all:
        per_sample = np.concatenate([per_sample, per_sample.sum(axis=3, keepdims=True)], axis=3)
        bins = list(bins) + [("all", 0.0, np.inf)]
    share, mc_se, binomial = _share_and_se(per_sample)
    totals = per_sample.sum(axis=0)
    with_cells = (per_sample[..., _CELLS] > 0).sum(axis=0)
    rows = []
    for v, variance in enumerate(variances):
        for i, interval in enumerate(INTERVAL_METHODS):
            rules = "nchs_2017" if interval == NCHS_INTERVAL else "custom"
            for j, subset in enumerate(SUBSETS):
                for b, (label, low, high) in enumerate(bins):
                    cells = int(totals[v, i, b, j, _CELLS])
                    covered = int(totals[v, i, b, j, _COVERED])
                    below = int(totals[v, i, b, j, _BELOW])
                    judged = bool(cells >= MIN_CELL_SAMPLES and mc_se[v, i, b, j] < MAX_MC_SE)
                    p = share[v, i, b, j]
                    rows.append({
                        "variance": variance, "interval": interval, "rules": rules,
                        "subset": subset, "band": label, "effective_n_from": low, "effective_n_to": high,
                        "cell_samples": cells, "samples_with_cells": int(with_cells[v, i, b, j]),
                        "covered_share": p if cells else np.nan,
                        "mc_se": mc_se[v, i, b, j] if cells else np.nan,
                        "mc_se_binomial": binomial[v, i, b, j] if cells else np.nan,
                        "miss_truth_below": below / cells if cells else np.nan,
                        "miss_truth_above": (cells - covered - below) / cells if cells else np.nan,
                        "enough_to_judge": judged,
                        "within_target": bool(judged and TARGET[0] <= p <= TARGET[1]),
                    })
    return pd.DataFrame(rows)


def _fmt(row: pd.Series) -> str:
    if not row["cell_samples"]:
        return "–"
    text = f"{100 * row['covered_share']:.1f} ± {100 * row['mc_se']:.2f}"
    if not row["enough_to_judge"]:
        return f"({text})"
    return text if row["within_target"] else f"**{text}**"


def _summary_markdown(table: pd.DataFrame, parameters: dict, unavailable: dict[str, str]) -> str:
    pub = table[(table["subset"] == "published")].set_index(["variance", "interval", "band"])
    lines = [
        "Coverage of 95% intervals, published cells, by effective sample size "
        f"({parameters['samples']} samples of about {parameters['persons']:,} persons; "
        f"population seed {parameters['seed']}).",
        "",
        "Covered share in percent ± Monte Carlo standard error (between samples). **Bold**: enough "
        f"cells to judge (≥ {MIN_CELL_SAMPLES:,} cell-samples and MC SE < {100 * MAX_MC_SE:.1f} "
        f"points) and outside {100 * TARGET[0]:.1f}–{100 * TARGET[1]:.1f}%. (Parentheses): not "
        "enough cells to judge. Cell-samples: published cells summed over samples, under the custom "
        "rules (wilson, clopper_pearson, wald) and under nchs_2017 (korn_graubard).",
        "",
    ]
    header = "| design | effective n | cell-samples (custom) | cell-samples (nchs_2017) | " + \
        " | ".join(HEADLINE_METHODS) + " |"
    lines += [header, "|" + "---|" * (4 + len(HEADLINE_METHODS))]
    for design in HEADLINE_DESIGNS:
        if design in unavailable:
            lines.append(f"| {design} | not run: {unavailable[design]} |"
                         + " |" * (2 + len(HEADLINE_METHODS)))
            continue
        if design not in set(table["variance"]):
            continue
        for band in [b[0] for b in BANDS] + ["all"]:
            rows = {m: pub.loc[(design, m, band)] for m in HEADLINE_METHODS}
            lines.append(f"| {design} | {band} | {int(rows['wilson']['cell_samples']):,} | "
                         f"{int(rows[NCHS_INTERVAL]['cell_samples']):,} | "
                         + " | ".join(_fmt(rows[m]) for m in HEADLINE_METHODS) + " |")
    misses = table[(table["subset"] == "published") & table["enough_to_judge"] & ~table["within_target"]
                   & (table["band"] != "all")]
    lines += ["", "Judged rows outside the target, published cells (every variance and interval method):", ""]
    if len(misses):
        for _, r in misses.iterrows():
            side = "truth above the interval" if r["miss_truth_above"] > r["miss_truth_below"] else \
                "truth below the interval"
            lines.append(f"* {r['variance']} / {r['interval']} / n_eff {r['band']}: "
                         f"{100 * r['covered_share']:.1f}% (± {100 * r['mc_se']:.2f}; most misses: {side})")
    else:
        lines.append("* none")
    for name, why in unavailable.items():
        lines.append(f"\nVariance method {name!r} was not run: {why}")
    return "\n".join(lines) + "\n"


def _chart(by_effective_n: pd.DataFrame, variances: tuple[str, ...], path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")  # files only, no display
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(len(SUBSETS), len(variances), figsize=(4.2 * len(variances), 7.6),
                             sharex=True, sharey=True, squeeze=False)
    colours = plt.get_cmap("tab10")
    for row, subset in enumerate(SUBSETS):
        for col, variance in enumerate(variances):
            ax = axes[row, col]
            ax.axhspan(TARGET[0], TARGET[1], color="0.88", zorder=0)
            ax.axhline(CONFIDENCE, color="0.3", linewidth=0.8, zorder=1)
            for k, interval in enumerate(INTERVAL_METHODS):
                d = by_effective_n[(by_effective_n["variance"] == variance) & (by_effective_n["interval"] == interval)
                                   & (by_effective_n["subset"] == subset)
                                   & (by_effective_n["cell_samples"] >= 200)]  # fewer: too noisy to draw
                # plot at the geometric middle of each bin; the open top bin at twice its start
                low = d["effective_n_from"].to_numpy()
                high = d["effective_n_to"].to_numpy()
                x = np.where(np.isfinite(high), np.sqrt(np.maximum(low, 1.0) * high), 2.0 * low)
                style = "--" if interval in ("wald", "agresti_coull", "logit") else "-"
                ax.plot(x, d["covered_share"], style, marker="o", markersize=3, linewidth=1.2,
                        color=colours(k), label=interval)
            ax.set_xscale("log")
            ax.set_ylim(0.70, 1.0)
            ax.grid(True, which="major", color="0.92", linewidth=0.6)
            title = f"{variance}\n" if row == 0 else ""
            ax.set_title(title + ("all cells with an interval" if subset == "all" else "published cells"),
                         fontsize=9)
            if row == len(SUBSETS) - 1:
                ax.set_xlabel("effective sample size of the cell")
            if col == 0:
                ax.set_ylabel("share of 95% intervals covering the truth")
    handles, labels = axes[0, 0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="lower center", ncol=len(INTERVAL_METHODS), fontsize=8, frameon=False)
    fig.suptitle("Coverage of 95% intervals in the demo design (grey band: 93.5–97.5%; points below "
                 "0.70 are cut off)", fontsize=10)
    fig.tight_layout(rect=(0, 0.04, 1, 0.97))
    fig.savefig(path, dpi=110)
    plt.close(fig)


# --------------------------------------------------------------------------------------------
# Public functions


def _sources_sha256() -> str:
    """One digest of every pipeline source file, so a result can be tied to the code that made it
    (the study may run on a working tree with changes not yet committed)."""
    digest = hashlib.sha256()
    for path in sorted(Path(__file__).resolve().parent.rglob("*.py")):
        digest.update(path.relative_to(ROOT).as_posix().encode() + b"\0" + path.read_bytes())
    return digest.hexdigest()


def _machine() -> dict:
    cpu = platform.processor() or ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return {"cpu": cpu, "cpus": os.cpu_count(), "load_average_at_end": [round(x, 2) for x in os.getloadavg()],
            "system": platform.platform(),
            "python": platform.python_version(), "numpy": np.__version__, "pandas": pd.__version__}


def run_coverage(*, samples: int = 500, persons: int = 40_000, seed: int = DEFAULT_SEED, workers: int = 2,
                 out_dir: Path | str = Path("data/out/coverage"), progress=None) -> CoverageResult:
    """Run the study and write coverage.csv, coverage_by_effective_n.csv, coverage.png,
    coverage_summary.md and coverage.json to `out_dir`. `progress(done, total)` is called as
    samples finish."""
    global _STUDY
    for name, value, least in (("samples", samples, 2), ("persons", persons, 1000), ("workers", workers, 1)):
        if isinstance(value, bool) or not isinstance(value, int) or value < least:
            raise ValueError(f"{name} ({value!r}) must be an integer >= {least}")
    started = time.perf_counter()
    sources = _sources_sha256()  # before anything runs: the code this study is made with
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    base = yaml.safe_load(DEMO_CONFIG.read_text())
    # coverage judges the reliability rules; complementary suppression hides cells for disclosure
    # reasons, unrelated to how well an interval covers, and would cost an optimisation per sample
    base["disclosure"]["complementary"] = False
    notes: list[str] = []
    unavailable: dict[str, str] = {}

    population = demo.build_population(seed)
    seeds = tuple(sample_seed(seed, i) for i in range(samples))
    first = demo.draw_survey(population, seed=seeds[0], persons=persons)
    with tempfile.TemporaryDirectory(prefix="ratebook-coverage-") as tmp:
        folder = Path(tmp)
        population.areas.to_csv(folder / "demo_areas.csv", index=False, lineterminator="\n")
        linearization = _linearization_design(base, list(first.columns), notes)
        configs: dict[tuple[str, str], Config] = {}
        variances = []
        for variance in VARIANCE_METHODS:
            try:
                for interval in INTERVAL_METHODS:
                    settings = _settings(variance, interval, base=base, folder=folder, linearization=linearization)
                    path = folder / f"{variance}-{interval}.yaml"
                    path.write_text(yaml.safe_dump(settings, sort_keys=False))
                    configs[(variance, interval)] = load_config(path)
            except ConfigError as exc:
                if variance != "linearization":
                    raise
                unavailable[variance] = f"pipeline.config refuses it ({exc.message}: {'; '.join(exc.problems[:2])})"
                continue
            variances.append(variance)
        some = configs[("replicate", INTERVAL_METHODS[0])]
        geography = {v: ingest.read_geography(configs[(v, INTERVAL_METHODS[0])])[0] for v in variances}
        layout = derive.domain_layout(some)

    # The truth, aligned once with the rows of the cell table (their order depends on the config
    # and the lookup only, so it is the same for every sample).
    keys_table = _aggregate(some, first, geography["replicate"], layout).frame
    key_columns = _KEY_COLUMNS + list(layout.names)
    keys = keys_table[key_columns].reset_index(drop=True)
    truth = keys.merge(population.truth[key_columns + ["true_proportion"]], on=key_columns,
                       how="left", validate="one_to_one")["true_proportion"].to_numpy(dtype=np.float64)
    _STUDY = _Study(population=population, persons=persons, configs=configs, variance_methods=tuple(variances),
                    geography=geography, layout=layout, truth=truth, keys=keys)

    if "linearization" in variances:
        try:  # in development: a failure is reported and the study goes on without it
            next(_estimates(_STUDY, first, ("linearization",)))
        except Exception as exc:  # noqa: BLE001 - reported in the outputs, never hidden
            unavailable["linearization"] = f"the stages fail on it ({type(exc).__name__}: {exc})"
            variances.remove("linearization")
            _STUDY.variance_methods = tuple(variances)
    _check_shortcuts(_STUDY, seeds[0])

    setup_seconds = time.perf_counter() - started
    loop_started = time.perf_counter()
    shape = (samples, len(variances), len(INTERVAL_METHODS))
    bands = np.zeros(shape + (len(BANDS), len(SUBSETS), 3), dtype=np.int64)
    fine = np.zeros(shape + (len(CHART_EDGES) - 1, len(SUBSETS), 3), dtype=np.int64)
    jobs = list(enumerate(seeds))
    pool = None
    try:
        if workers == 1:
            results = map(_run_sample, jobs)
        else:
            # fork: workers share the population and the compiled configs instead of rebuilding them
            pool = multiprocessing.get_context("fork").Pool(workers)
            results = pool.imap_unordered(_run_sample, jobs, chunksize=2)
        for done, (index, b, f) in enumerate(results, start=1):
            bands[index], fine[index] = b, f
            if progress is not None:
                progress(done, samples)
        if pool is not None:
            pool.close()
            pool.join()
    finally:
        if pool is not None:
            pool.terminate()  # a no-op after a clean close/join; stops the workers after an error
        _STUDY = None
    loop_seconds = time.perf_counter() - loop_started

    variances_t = tuple(variances)
    table = _table(bands, variances_t, list(BANDS), with_all=True)
    chart_bins = [(f"{lo:g}-{hi:g}", lo, hi) for lo, hi in zip(CHART_EDGES[:-1], CHART_EDGES[1:])]
    by_effective_n = _table(fine, variances_t, chart_bins, with_all=False)
    parameters = {
        "samples": samples, "persons": persons, "seed": seed,
        "sample_seeds": f"sample i (0-based) uses seed {seed} + 1 + i",
        "workers": workers, "variance_methods": list(variances_t), "interval_methods": list(INTERVAL_METHODS),
        "unavailable": unavailable, "notes": notes, "confidence": CONFIDENCE,
        "bands_effective_n": [[label, low, None if np.isinf(high) else high] for label, low, high in BANDS],
        "target": list(TARGET), "enough_to_judge": {"min_cell_samples": MIN_CELL_SAMPLES, "max_mc_se": MAX_MC_SE},
        "published": "status not suppressed; custom rules of configs/demo.yaml, nchs_2017 for korn_graubard",
        "mc_se": "between-sample ratio standard error of Σc_s/Σn_s (samples independent, cells within a "
                 "sample not)",
        "sampled_persons_first_sample": len(first),
        "runtime_seconds": round(time.perf_counter() - started, 1),
        "setup_seconds": round(setup_seconds, 1), "samples_seconds": round(loop_seconds, 1),
        "machine": _machine(),
        "pipeline_sources_sha256": sources,
    }
    files = {"csv": out / "coverage.csv", "by_effective_n": out / "coverage_by_effective_n.csv",
             "png": out / "coverage.png", "summary": out / "coverage_summary.md", "json": out / "coverage.json"}
    table.to_csv(files["csv"], index=False, lineterminator="\n", float_format="%.6g")
    by_effective_n.to_csv(files["by_effective_n"], index=False, lineterminator="\n", float_format="%.6g")
    _chart(by_effective_n, variances_t, files["png"])
    files["summary"].write_text(_summary_markdown(table, parameters, unavailable))
    files["json"].write_text(json.dumps(parameters, indent=2) + "\n")
    return CoverageResult(table=table, by_effective_n=by_effective_n, per_sample=bands,
                          variance_methods=variances_t, sample_seeds=seeds, parameters=parameters,
                          unavailable=unavailable, files=files)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m pipeline.coverage",
                                     description="Coverage study of the pipeline's intervals on the demo design.")
    parser.add_argument("--samples", type=int, default=500, help="independent samples (default: 500)")
    parser.add_argument("--persons", type=int, default=40_000, help="persons per sample, about (default: 40000)")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help=f"population seed (default: {DEFAULT_SEED})")
    parser.add_argument("--workers", type=int, default=2, help="processes (default: 2)")
    parser.add_argument("--out", default="data/out/coverage", help="output folder (default: data/out/coverage)")
    args = parser.parse_args(argv)
    step = max(1, args.samples // 20)

    def progress(done: int, total: int) -> None:
        if done % step == 0 or done == total:
            print(f"coverage: {done}/{total} samples", file=sys.stderr, flush=True)

    try:
        result = run_coverage(samples=args.samples, persons=args.persons, seed=args.seed, workers=args.workers,
                              out_dir=Path(args.out), progress=progress)
    except ValueError as exc:
        parser.error(str(exc))
    p = result.parameters
    print(f"coverage: {p['samples']} samples of about {p['persons']:,} persons in {p['runtime_seconds']:.0f} s "
          f"({p['workers']} workers); variance methods: {', '.join(p['variance_methods'])}")
    for name, why in result.unavailable.items():
        print(f"coverage: {name} not run: {why}")
    for path in result.files.values():
        print(f"  {path}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
