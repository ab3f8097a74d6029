"""Performance benchmark of ratebook (`make bench`; not part of `make test`).

    python -m tests.benchmarks.bench [--sizes S M L] [--repeats S=3,M=3,L=1] [--seed N] [--timeout S]
                                     [--commit REF | --live]

For each size, the scaled fictional survey of tests/benchmarks/generate.py (80 replicate weights,
30 items, 4 geography levels with 2,000 small areas, sex × 5 age groups) is generated once and
cached under data/bench/ by size and seed. Then every contender runs as a separate whole process,
several times, round-robin (so that a slow spell of the shared machine hits all of them alike),
after one untimed read of the input to warm the page cache:

1. read_floor: pyarrow reading exactly the columns the ratebook run needs, nothing else;
2. duckdb: one GROUP BY computing the same weighted sums at the finest cell;
3. analyst (S only): pandas, one group-by per weight;
4. ratebook: the whole run (30 indicators) — and at M also with 5 indicators;

The code measured is a copy of pipeline/ taken at the start (see `snapshot_code`; --commit REF
measures a commit, --live the working tree as it changes).

Wall time is measured around the child; peak memory is the child's own ru_maxrss from
os.wait4 (not RUSAGE_CHILDREN, whose maximum mixes all children). The table, the target ratios
and the ratebook stage breakdown are printed and written as JSON to
data/bench/results-<UTC timestamp>.json and data/bench/results-latest.json.
"""

from __future__ import annotations

import argparse
import datetime as dt
import hashlib
import io
import json
import os
import platform
import shutil
import signal
import statistics
import subprocess
import sys
import tarfile
import threading
import time
from dataclasses import asdict
from importlib import metadata
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
BENCH_DIR = ROOT / "data" / "bench"
SIZES = {"S": 200_000, "M": 2_000_000, "L": 10_000_000}
DEFAULT_REPEATS = {"S": 3, "M": 3, "L": 1}
DEFAULT_SEED = 20261202
GIB = 1024.0  # MiB

STAGES = ("read", "validate", "derive", "aggregate", "estimate", "assess", "protect", "publish", "other")


# --------------------------------------------------------------------------------------------
# Measuring one whole process


def pipeline_digest(root: Path = ROOT) -> str:
    """Hash of the pipeline's source under `root`."""
    digest = hashlib.sha256()
    for path in sorted((root / "pipeline").rglob("*.py")):
        digest.update(str(path.relative_to(root)).encode() + b"\0" + path.read_bytes())
    return digest.hexdigest()[:12]


def snapshot_code(commit: str | None = None) -> Path:
    """A copy of pipeline/ and configs/demo.yaml, under data/bench/code/<digest>/, taken when the
    benchmark starts: from the working tree, or with `commit` from that commit (`git archive`,
    read-only). Every child process runs with that folder as its working directory, so `import
    pipeline` finds the copy first (sys.path[0] comes before the editable install's finder): the
    pipeline may be edited while a long benchmark runs, and all runs must measure one version of
    it. tests/benchmarks/ is copied from the working tree each time (it is the harness)."""
    ignore = shutil.ignore_patterns("__pycache__", "*.pyc")
    dest = None
    if commit is not None:
        sha = subprocess.run(["git", "rev-parse", "--verify", f"{commit}^{{commit}}"], cwd=ROOT,
                             capture_output=True, text=True)
        if sha.returncode != 0:
            raise SystemExit(f"--commit: {commit!r} is not a commit: {sha.stderr.strip()}")
        dest = BENCH_DIR / "code" / f"git-{sha.stdout.strip()[:12]}"
        if not (dest / ".complete").is_file():
            shutil.rmtree(dest, ignore_errors=True)
            dest.mkdir(parents=True)
            archive = subprocess.run(["git", "archive", "--format=tar", sha.stdout.strip(), "pipeline",
                                      "configs/demo.yaml"], cwd=ROOT, capture_output=True, check=True).stdout
            with tarfile.open(fileobj=io.BytesIO(archive)) as tar:
                tar.extractall(dest, filter="data")
    else:
        for _ in range(5):
            digest = pipeline_digest()
            dest = BENCH_DIR / "code" / digest
            if (dest / ".complete").is_file():
                break
            shutil.rmtree(dest, ignore_errors=True)
            shutil.copytree(ROOT / "pipeline", dest / "pipeline", ignore=ignore)
            (dest / "configs").mkdir()
            shutil.copyfile(ROOT / "configs" / "demo.yaml", dest / "configs" / "demo.yaml")
            if pipeline_digest(dest) == digest:  # else an edit landed during the copy: take it again
                break
        else:
            raise SystemExit("pipeline/ kept changing while it was being copied; try again")
    shutil.rmtree(dest / "tests", ignore_errors=True)
    shutil.copytree(ROOT / "tests" / "benchmarks", dest / "tests" / "benchmarks", ignore=ignore)
    check = subprocess.run([sys.executable, "-c", "import pipeline.runner, tests.benchmarks.contenders"],
                           cwd=dest, capture_output=True, text=True)
    if check.returncode != 0:
        raise SystemExit(f"the pipeline source in {dest} does not import:\n{check.stderr[-1500:]}")
    (dest / ".complete").write_text(pipeline_digest(dest) + "\n")
    return dest


def measure(cmd: list[str], *, log_stem: Path, timeout: float | None, cwd: Path = ROOT) -> dict:
    """Run `cmd` as a child in its own session; wall time, the child's own peak RSS and CPU times
    (os.wait4 on its pid), exit code and the JSON of its last stdout line."""
    log_stem.parent.mkdir(parents=True, exist_ok=True)
    out_path, err_path = log_stem.with_suffix(".out"), log_stem.with_suffix(".err")
    killed = threading.Event()
    code = pipeline_digest(cwd)
    with open(out_path, "w") as out, open(err_path, "w") as err:
        started = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=out, stderr=err, cwd=cwd, start_new_session=True)

        def kill() -> None:  # only the child's own process group
            killed.set()
            try:
                os.killpg(proc.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass

        timer = threading.Timer(timeout, kill) if timeout else None
        if timer:
            timer.start()
        try:
            _, status, usage = os.wait4(proc.pid, 0)
        finally:
            if timer:
                timer.cancel()
        seconds = time.perf_counter() - started
    proc.returncode = os.waitstatus_to_exitcode(status)  # reaped here; Popen must not wait again
    result = None
    lines = out_path.read_text().strip().splitlines()
    if lines:
        try:
            result = json.loads(lines[-1])
        except ValueError:
            result = None
    entry = {"seconds": round(seconds, 3), "peak_rss_mib": round(usage.ru_maxrss / 1024, 1),
             "user_seconds": round(usage.ru_utime, 2), "system_seconds": round(usage.ru_stime, 2),
             "exit_code": proc.returncode, "timed_out": killed.is_set(), "pipeline_digest": code,
             "result": result}
    if proc.returncode != 0:
        entry["stderr_tail"] = err_path.read_text()[-2000:]
    return entry


# --------------------------------------------------------------------------------------------
# Inputs


def size_rows(token: str) -> tuple[str, int]:
    """'S', 'M', 'L' or a number of records (labelled N<rows>, for trying the harness out)."""
    if token.upper() in SIZES:
        return token.upper(), SIZES[token.upper()]
    rows = int(token.replace("_", ""))
    return f"N{rows}", rows


def parse_repeats(text: str | None) -> dict[str, int]:
    repeats = dict(DEFAULT_REPEATS)
    if not text:
        return repeats
    for part in text.split(","):
        if "=" in part:
            key, value = part.split("=", 1)
            repeats[key.strip().upper()] = int(value)
        else:  # one number for every size
            repeats = {"*": int(part)}
    return repeats


def ensure_input(label: str, rows: int, seed: int, *, timeout: float | None, code: Path) -> dict:
    """Generate the input of a size unless a complete one with the same rows and seed is cached.
    Generation runs as a child process too, so its time and peak memory are on record."""
    from tests.benchmarks import generate

    folder = BENCH_DIR / f"{label}-{rows}-seed{seed}"
    found = generate.cached(folder, rows=rows, seed=seed)
    if found is not None:
        generate.write_configs(folder, rows=rows, seed=seed, demo_config=code / "configs" / "demo.yaml")
        print(f"[{label}] input cached: {folder.relative_to(ROOT)} ({found.parquet_bytes / 2**20:,.0f} MiB, "
              f"generated in {found.seconds:.1f} s)", flush=True)
        return {"folder": str(folder), "cached": True, **asdict(found)}
    print(f"[{label}] generating {rows:,} records into {folder.relative_to(ROOT)} ...", flush=True)
    run = measure([sys.executable, "-m", "tests.benchmarks.generate", "--rows", str(rows), "--seed", str(seed),
                   "--out", str(folder)], log_stem=folder.parent / "logs" / f"generate-{label}", timeout=timeout,
                  cwd=code)
    if run["exit_code"] != 0:
        raise SystemExit(f"[{label}] generation failed (exit {run['exit_code']}):\n{run.get('stderr_tail', '')}")
    found = generate.cached(folder, rows=rows, seed=seed)
    print(f"[{label}] generated in {run['seconds']:.1f} s, peak {run['peak_rss_mib']:,.0f} MiB, "
          f"{found.parquet_bytes / 2**20:,.0f} MiB on disk", flush=True)
    return {"folder": str(folder), "cached": False, "process": run, **asdict(found)}


def contender_spec(folder: Path, indicators) -> dict:
    """What the DuckDB and pandas contenders compute, from the generator's own definitions."""
    from tests.benchmarks import generate

    return {"input": str(folder / generate.FILES["persons"]), "area": "area", "weight": "wt",
            "replicates": [f"rw{r + 1}" for r in range(generate.REPLICATES)],
            "age_breaks": list(generate.AGE_BREAKS),
            "indicators": [{"name": i.name, "column": i.name, "min_age": i.min_age, "max_age": i.max_age}
                           for i in indicators]}


def warm_page_cache(path: Path) -> None:
    with open(path, "rb") as fh:
        while fh.read(1 << 24):
            pass


# --------------------------------------------------------------------------------------------
# One size


def run_size(label: str, rows: int, *, seed: int, repeats: int, timeout: float | None, code: Path) -> dict:
    from tests.benchmarks import generate

    gen = ensure_input(label, rows, seed, timeout=timeout, code=code)
    folder = Path(gen["folder"])
    config_30 = folder / generate.FILES["config_30"]
    config_5 = folder / generate.FILES["config_5"]
    # the columns the measured code reads, asked of the measured code itself (the snapshot)
    columns, batch_rows = json.loads(subprocess.run(
        [sys.executable, "-c", "import json, sys; from pipeline.config import load_config; "
         "from pipeline.stages.ingest import needed_columns; c = load_config(sys.argv[1]); "
         "print(json.dumps([needed_columns(c), c.source.batch_rows]))", str(config_30)],
        cwd=code, capture_output=True, text=True, check=True).stdout)
    spec_path = folder / "contender-spec.json"
    spec_path.write_text(json.dumps(contender_spec(folder, generate.INDICATORS), indent=1))
    py = sys.executable
    contenders = {
        "read_floor": [py, "-m", "tests.benchmarks.contenders", "read_floor", "--input",
                       str(folder / generate.FILES["persons"]), "--columns", ",".join(columns),
                       "--batch-rows", str(batch_rows)],
        "duckdb": [py, "-m", "tests.benchmarks.contenders", "duckdb", "--spec", str(spec_path)],
    }
    if label == "S":
        contenders["analyst"] = [py, "-m", "tests.benchmarks.contenders", "analyst", "--spec", str(spec_path)]
    contenders["ratebook"] = [py, "-m", "tests.benchmarks.contenders", "ratebook", "--config", str(config_30),
                              "--release-id", "bench-30"]
    if label == "M":
        contenders["ratebook_5"] = [py, "-m", "tests.benchmarks.contenders", "ratebook", "--config", str(config_5),
                                    "--release-id", "bench-5"]

    warm_page_cache(folder / generate.FILES["persons"])
    runs: dict[str, list[dict]] = {name: [] for name in contenders}
    for rep in range(repeats):
        for name, cmd in contenders.items():
            print(f"[{label}] run {rep + 1}/{repeats} {name} ...", end=" ", flush=True)
            entry = measure(cmd, log_stem=folder / "logs" / f"{name}-{rep + 1}", timeout=timeout, cwd=code)
            runs[name].append(entry)
            state = "ok" if entry["exit_code"] == 0 else f"FAILED (exit {entry['exit_code']}" + (
                ", timed out)" if entry["timed_out"] else ")")
            print(f"{entry['seconds']:.2f} s, {entry['peak_rss_mib']:,.0f} MiB {state}", flush=True)
            if entry["exit_code"] != 0:
                print("    " + "\n    ".join(entry.get("stderr_tail", "").strip().splitlines()[-3:]), flush=True)
    summary = {name: summarise(entries) for name, entries in runs.items()}
    return {"rows": rows, "input": gen, "columns_read": len(columns), "repeats": repeats,
            "contenders": summary, "runs": runs}


def summarise(entries: list[dict]) -> dict:
    ok = [e for e in entries if e["exit_code"] == 0]
    out = {"runs": len(entries), "ok_runs": len(ok),
           "pipeline_digests": sorted({e["pipeline_digest"] for e in entries})}
    if not ok:
        return out | {"failed": True}
    seconds = [e["seconds"] for e in ok]
    out |= {"median_seconds": round(statistics.median(seconds), 3), "min_seconds": min(seconds),
            "max_seconds": max(seconds), "peak_rss_mib": max(e["peak_rss_mib"] for e in ok),
            "median_cpu_seconds": round(statistics.median(e["user_seconds"] + e["system_seconds"] for e in ok), 2)}
    stage_runs = [e["result"]["stage_seconds"] for e in ok if e["result"] and "stage_seconds" in e["result"]]
    if stage_runs:
        out["median_stage_seconds"] = {s: round(statistics.median(r.get(s, 0.0) for r in stage_runs), 3)
                                       for s in STAGES}
        out["median_startup_seconds"] = round(statistics.median(
            e["seconds"] - e["result"]["run_seconds"] for e in ok if e["result"]), 3)
        last = ok[-1]["result"]
        out["cells"], out["statuses"] = last["cells"], last["statuses"]
        out["memory_marks"] = last["memory_marks"]
    return out


# --------------------------------------------------------------------------------------------
# Targets


def _median(results: dict, size: str, contender: str) -> float | None:
    return results.get(size, {}).get("contenders", {}).get(contender, {}).get("median_seconds")


def targets(results: dict) -> list[dict]:
    """The ratios of the requirement, each measured in this run; None where a size or contender
    was not run (or failed)."""
    def ratio(a, b):
        return None if a is None or b is None or b == 0 else a / b

    rows = []

    def add(name, value, bound, kind, note=""):
        if value is None:
            verdict = "n/a"
        elif kind == "max":
            verdict = "pass" if value <= bound else "MISS"
        elif kind == "min":
            verdict = "pass" if value >= bound else "MISS"
        else:  # within: |value − 1| <= bound
            verdict = "pass" if abs(value - 1) <= bound else "MISS"
        target = {"max": f"<= {bound:g}", "min": f">= {bound:g}", "within": f"1 ± {bound:g}"}[kind]
        rows.append({"target": name, "value": None if value is None else round(value, 3), "goal": target,
                     "verdict": verdict, "note": note})

    for size in ("M", "L"):
        add(f"ratebook / read floor at {size}", ratio(_median(results, size, "ratebook"),
                                                      _median(results, size, "read_floor")), 1.5, "max")
    add("ratebook / one-query baseline at M", ratio(_median(results, "M", "ratebook"),
                                                    _median(results, "M", "duckdb")), 0.5, "max")
    add("analyst's script / ratebook at S", ratio(_median(results, "S", "analyst"),
                                                  _median(results, "S", "ratebook")), 30, "min")
    peak_l = results.get("L", {}).get("contenders", {}).get("ratebook", {}).get("peak_rss_mib")
    add("ratebook peak memory at L (GiB)", None if peak_l is None else peak_l / GIB, 2.0, "max")
    add("ratebook 30 / 5 indicators at M", ratio(_median(results, "M", "ratebook"),
                                                 _median(results, "M", "ratebook_5")), 1.5, "max")
    per_record = {s: ratio(_median(results, s, "ratebook"), results.get(s, {}).get("rows")) for s in ("M", "L")}
    add("ratebook time per record L / M", ratio(per_record["L"], per_record["M"]), 0.25, "within",
        "below 0.75 means fixed costs dominate at M")
    # context, not targets: the same ratios at the other sizes
    for size in ("S", "L"):
        add(f"(info) ratebook / one-query baseline at {size}", ratio(_median(results, size, "ratebook"),
                                                                     _median(results, size, "duckdb")), 0.5, "max")
    add("(info) ratebook / read floor at S", ratio(_median(results, "S", "ratebook"),
                                                   _median(results, "S", "read_floor")), 1.5, "max")
    for size in ("S", "M"):
        peak = results.get(size, {}).get("contenders", {}).get("ratebook", {}).get("peak_rss_mib")
        add(f"(info) ratebook peak memory at {size} (GiB)", None if peak is None else peak / GIB, 2.0, "max",
            "cell arrays do not grow with records")
    return rows


# --------------------------------------------------------------------------------------------
# Report


def _fmt(value, spec: str, empty: str = "-") -> str:
    return empty if value is None else format(value, spec)


def _mark_name(stage_text: str) -> str:
    """A short name for a runner stage line ('ingest + aggregate: reading record batches' -> 'batches')."""
    for key, name in (("lookup", "lookup"), ("columns", "columns"), ("batches", "batches"),
                      ("rolling up", "roll_up")):
        if key in stage_text:
            return name
    return stage_text.split(":")[0]


def report(results: dict, target_rows: list[dict]) -> str:
    lines = ["", "Times (median of runs, seconds), peak memory of the process (MiB), CPU (user + system, s)", ""]
    header = f"{'size':<6}{'records':>12}  {'contender':<12}{'runs':>5}{'median s':>10}{'min s':>9}{'max s':>9}" \
             f"{'peak MiB':>10}{'CPU s':>8}{'s / Mrec':>10}"
    lines += [header, "-" * len(header)]
    for size, res in results.items():
        for name, c in res["contenders"].items():
            if c.get("failed"):
                lines.append(f"{size:<6}{res['rows']:>12,}  {name:<12}{c['runs']:>5}   FAILED (see logs)")
                continue
            per_m = c["median_seconds"] / (res["rows"] / 1e6)
            lines.append(f"{size:<6}{res['rows']:>12,}  {name:<12}{c['ok_runs']:>5}{c['median_seconds']:>10.2f}"
                         f"{c['min_seconds']:>9.2f}{c['max_seconds']:>9.2f}{c['peak_rss_mib']:>10,.0f}"
                         f"{c['median_cpu_seconds']:>8.1f}{per_m:>10.2f}")
    changed = [f"{size} {name}" for size, res in results.items() for name, c in res["contenders"].items()
               if name.startswith("ratebook") and len(c.get("pipeline_digests", [])) > 1]
    if changed:
        lines += ["", "WARNING: pipeline/ source changed between runs of: " + ", ".join(changed)
                  + " (medians mix code versions; see pipeline_digest per run in the JSON)"]
    lines += ["", "Inputs (generated by tests/benchmarks/generate.py; cached ones show their first generation)", ""]
    for size, res in results.items():
        gen = res["input"]
        process = gen.get("process")
        made = (f"generated in {process['seconds']:.1f} s (peak {process['peak_rss_mib']:,.0f} MiB)" if process
                else f"cached, generated in {gen['seconds']:.1f} s")
        lines.append(f"  {size}: {gen['rows']:,} records, {gen['households']:,} households, {gen['clusters']:,} "
                     f"clusters, {gen['areas']:,} areas; {gen['parquet_bytes'] / 2**20:,.0f} MiB Parquet in "
                     f"{gen['row_groups']} row groups; {made}; ratebook reads {res['columns_read']} columns")
    lines += ["", "Targets (ratios within this run)", ""]
    width = max(len(t["target"]) for t in target_rows)
    for t in target_rows:
        lines.append(f"  {t['target']:<{width}}  {_fmt(t['value'], '8.3f', '     n/a'):>8}  {t['goal']:<9} "
                     f"{t['verdict']:<5} {t['note']}")
    lines += ["", "ratebook stage breakdown (median seconds per stage; startup = process wall time − run time)", ""]
    header = f"{'size':<6}{'config':<12}" + "".join(f"{s:>10}" for s in STAGES) + f"{'startup':>10}{'total':>9}"
    lines += [header, "-" * len(header)]
    for size, res in results.items():
        for name, c in res["contenders"].items():
            if "median_stage_seconds" not in c:
                continue
            st = c["median_stage_seconds"]
            lines.append(f"{size:<6}{name:<12}" + "".join(f"{st[s]:>10.2f}" for s in STAGES)
                         + f"{c['median_startup_seconds']:>10.2f}{c['median_seconds']:>9.2f}")
    lines += ["", "ratebook memory high-water mark as each stage starts (last run, MiB)", ""]
    for size, res in results.items():
        for name, c in res["contenders"].items():
            if "memory_marks" in c:
                marks = ", ".join(f"{_mark_name(m['stage'])} {m['peak_rss_mib_so_far']:,.0f}"
                                  for m in c["memory_marks"])
                lines.append(f"  {size} {name}: {marks}; end {c['peak_rss_mib']:,.0f}")
    return "\n".join(lines)


def _git(*args: str) -> str | None:
    """A read-only git query in the repository, or None."""
    try:
        return subprocess.run(["git", *args], cwd=ROOT, capture_output=True, text=True, timeout=10).stdout.rstrip()
    except (OSError, subprocess.SubprocessError):
        return None


def machine_info() -> dict:
    def first(path: str, key: str) -> str | None:
        try:
            for line in open(path):
                if line.startswith(key):
                    return line.split(":", 1)[1].strip()
        except OSError:
            return None
        return None

    def version(dist: str) -> str | None:
        try:
            return metadata.version(dist)
        except metadata.PackageNotFoundError:
            return None

    mem_kib = first("/proc/meminfo", "MemTotal")
    return {
        "cpu_count": os.cpu_count(),
        "cpus_usable": len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else None,
        "cpu_model": first("/proc/cpuinfo", "model name"),
        "ram_gib": round(int(mem_kib.split()[0]) / 2**20, 1) if mem_kib else None,
        "load_average": os.getloadavg(),
        "platform": platform.platform(),
        "python": platform.python_version(),
        "versions": {d: version(d) for d in ("ratebook", "numpy", "pandas", "pyarrow", "duckdb", "scipy", "pandera")},
        "git_commit": _git("rev-parse", "HEAD"),
        "git_uncommitted": (_git("status", "--porcelain") or "").splitlines(),
        "pipeline_digest": pipeline_digest(),
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="ratebook performance benchmark")
    parser.add_argument("--sizes", nargs="+", default=["S", "M", "L"],
                        help="S (200k), M (2M), L (10M) or a number of records; default: S M L")
    parser.add_argument("--repeats", help="runs per contender: one number, or e.g. S=3,M=3,L=1 (default)")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED)
    parser.add_argument("--timeout", type=float, default=None, help="seconds before a process is killed")
    code_choice = parser.add_mutually_exclusive_group()
    code_choice.add_argument("--live", action="store_true",
                             help="run the working tree as it is at each run, not a copy taken at the start")
    code_choice.add_argument("--commit", help="measure the pipeline of this commit (e.g. HEAD), not the working tree")
    args = parser.parse_args(argv)
    sizes = [size_rows(token) for token in " ".join(args.sizes).replace(",", " ").split()]
    repeats = parse_repeats(args.repeats)

    started = dt.datetime.now(dt.timezone.utc)
    info = machine_info()
    print(f"ratebook benchmark, {info['cpu_count']} CPUs ({info['cpu_model']}), {info['ram_gib']} GiB, "
          f"load {info['load_average'][0]:.2f}; commit {(info['git_commit'] or '?')[:10]}, "
          f"pipeline source {info['pipeline_digest']}", flush=True)
    if info["git_uncommitted"]:
        print(f"note: uncommitted changes in the working tree: {', '.join(info['git_uncommitted'])}", flush=True)
    code = ROOT if args.live else snapshot_code(args.commit)
    info["measured_code"] = "live working tree" if args.live else str(code.relative_to(ROOT))
    info["measured_pipeline_digest"] = pipeline_digest(code)
    print(f"measuring {info['measured_code']}", flush=True)
    results = {}
    for label, rows in sizes:
        n = repeats.get(label, repeats.get("*", 1))
        results[label] = run_size(label, rows, seed=args.seed, repeats=n, timeout=args.timeout, code=code)
    target_rows = targets(results)
    text = report(results, target_rows)
    print(text, flush=True)

    info["load_average_end"] = os.getloadavg()
    info["git_commit_end"] = _git("rev-parse", "HEAD")
    info["pipeline_digest_end"] = pipeline_digest()  # of the working tree: others may have edited it
    document = {"started": started.isoformat(timespec="seconds"),
                "finished": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
                "command": sys.argv, "seed": args.seed, "machine": info, "targets": target_rows,
                "sizes": results}
    BENCH_DIR.mkdir(parents=True, exist_ok=True)
    path = BENCH_DIR / f"results-{started:%Y%m%dT%H%M%SZ}.json"
    path.write_text(json.dumps(document, indent=1) + "\n")
    shutil.copyfile(path, BENCH_DIR / "results-latest.json")
    print(f"\nload average at start {info['load_average'][0]:.2f}, at end {info['load_average_end'][0]:.2f} "
          "(the machine is shared: other work inflates single runs)")
    print(f"results written to {path.relative_to(ROOT)} and results-latest.json")
    return 0


if __name__ == "__main__":
    sys.exit(main())
