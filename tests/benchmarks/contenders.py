"""The contenders of the benchmark, each run by `bench.py` as a whole process of its own:

    python -m tests.benchmarks.contenders read_floor --input F --columns a,b,... --batch-rows N
    python -m tests.benchmarks.contenders duckdb     --spec SPEC.json
    python -m tests.benchmarks.contenders analyst    --spec SPEC.json [--out RESULT.parquet]
    python -m tests.benchmarks.contenders ratebook   --config CONFIG --release-id ID

Each prints one JSON line (what it did) as the last line of stdout. Imports are made inside each
contender so that a process loads only the libraries it uses: start-up counts in its time.

SPEC.json (written by bench.py) describes the work without importing ratebook: input path,
finest-cell keys, age breaks, weight columns and, per indicator, its item column and age
universe. The sums are those of ratebook's CellAccumulator (pipeline/stages/aggregate.py) at the
finest cell: n, x, item non-response, Σw, Σw·y, Σw² over the base, and Σw_r, Σw_r·y per replicate,
with derive's rules (pipeline/stages/derive.py): the base is the universe minus records whose
item is missing (item non-response), y is item == 1 within the base.
"""

from __future__ import annotations

import argparse
import json
import sys
import time


def _age_group_sql(breaks: list[float]) -> str:
    # [lower, upper) intervals, as ratebook's `breaks`
    whens = " ".join(f"WHEN age < {hi} THEN {i}" for i, hi in enumerate(breaks[1:-1]))
    return f"CASE {whens} ELSE {len(breaks) - 2} END"


def _universe_sql(ind: dict) -> str:
    parts = []
    if ind["min_age"] > 0:
        parts.append(f"age >= {ind['min_age']}")
    if ind["max_age"] is not None:
        parts.append(f"age <= {ind['max_age']}")
    return " AND ".join(parts) if parts else "TRUE"


def build_sql(spec: dict) -> str:
    """One GROUP BY at the finest cell (area × sex × age group) with every weighted sum of every
    indicator and replicate: what a capable analyst writes in SQL."""
    def q(name: str) -> str:
        return '"' + name.replace('"', '""') + '"'

    weights, replicates = spec["weight"], spec["replicates"]
    derived = [f"{_age_group_sql(spec['age_breaks'])} AS age_group"]
    sums = []
    for k, ind in enumerate(spec["indicators"]):
        col, universe = q(ind["column"]), _universe_sql(ind)
        # 0/1 doubles, so that every sum is one multiply-add
        derived += [f"CAST(({universe}) AND {col} IS NOT NULL AS DOUBLE) AS b{k}",
                    f"CAST(({universe}) AND COALESCE({col} = 1, FALSE) AS DOUBLE) AS y{k}",
                    f"CAST(({universe}) AND {col} IS NULL AS DOUBLE) AS m{k}"]
        sums += [f"SUM(b{k}) AS n_{k}", f"SUM(y{k}) AS x_{k}", f"SUM(m{k}) AS nr_{k}",
                 f"SUM({q(weights)} * b{k}) AS wb_{k}", f"SUM({q(weights)} * y{k}) AS wy_{k}",
                 f"SUM({q(weights)} * {q(weights)} * b{k}) AS ww_{k}"]
        for r, rep in enumerate(replicates):
            sums += [f"SUM({q(rep)} * b{k}) AS rb_{k}_{r}", f"SUM({q(rep)} * y{k}) AS ry_{k}_{r}"]
    keep = ", ".join(q(c) for c in [spec["area"], "sex", weights] + replicates)
    path = spec["input"].replace("'", "''")
    return (f"WITH r AS (SELECT {keep}, {', '.join(derived)} FROM read_parquet('{path}'))\n"
            f"SELECT {q(spec['area'])}, sex, age_group,\n  " + ",\n  ".join(sums)
            + f"\nFROM r GROUP BY {q(spec['area'])}, sex, age_group")


def read_floor(args) -> dict:
    import pyarrow.parquet as pq

    columns = args.columns.split(",")
    rows = 0
    # The same batch size as the ratebook run; batches are decoded and dropped, nothing else.
    # pre_buffer off, as ratebook reads: with it on, pyarrow caches every selected column chunk of the
    # whole file before the first batch (about the file's size in memory: 4 GiB at L), and it is
    # no faster; a floor for a streaming reader should not pay for that.
    reader = pq.ParquetFile(args.input, pre_buffer=False)
    for batch in reader.iter_batches(batch_size=args.batch_rows, columns=columns):
        rows += batch.num_rows
    return {"rows": rows, "columns": len(columns)}


def duckdb_baseline(args) -> dict:
    import duckdb

    spec = json.loads(open(args.spec).read())
    sql = build_sql(spec)
    con = duckdb.connect()
    relation = con.sql(sql)
    # the Arrow fetch was renamed in duckdb 2 (arrow -> to_arrow_table)
    result = relation.to_arrow_table() if hasattr(relation, "to_arrow_table") else relation.arrow()
    return {"cells": result.num_rows, "columns": result.num_columns,
            "threads": con.execute("SELECT current_setting('threads')").fetchone()[0]}


def analyst(args) -> dict:
    """The script an analyst writes with pandas: derive the indicator columns, then for each of
    the 81 weights one group-by over the finest cell summing weight × base and weight × y."""
    import numpy as np
    import pandas as pd

    spec = json.loads(open(args.spec).read())
    area, weight, replicates = spec["area"], spec["weight"], spec["replicates"]
    columns = [area, "sex", "age", weight] + replicates + [i["column"] for i in spec["indicators"]]
    df = pd.read_parquet(spec["input"], columns=list(dict.fromkeys(columns)))
    df["age_group"] = pd.cut(df["age"], spec["age_breaks"], right=False, labels=False)
    keys = [area, "sex", "age_group"]
    base, yes, missing = {}, {}, {}
    for ind in spec["indicators"]:
        name, item = ind["name"], df[ind["column"]]
        universe = df["age"] >= ind["min_age"]
        if ind["max_age"] is not None:
            universe &= df["age"] <= ind["max_age"]
        base[name] = (universe & item.notna()).to_numpy()
        yes[name] = (universe & item.eq(1)).to_numpy(dtype=bool, na_value=False)
        missing[name] = (universe & item.isna()).to_numpy()
    counts = pd.DataFrame({**{f"n_{n}": b for n, b in base.items()}, **{f"x_{n}": y for n, y in yes.items()},
                           **{f"nr_{n}": m for n, m in missing.items()}})
    counts[keys] = df[keys]
    parts = [counts.groupby(keys).sum()]
    squared = pd.DataFrame({f"ww_{n}": df[weight] ** 2 * b for n, b in base.items()})
    squared[keys] = df[keys]
    parts.append(squared.groupby(keys).sum())
    for w in [weight] + replicates:
        sums = pd.DataFrame({**{f"{w}_base_{n}": df[w] * b for n, b in base.items()},
                             **{f"{w}_count_{n}": df[w] * y for n, y in yes.items()}})
        sums[keys] = df[keys]
        parts.append(sums.groupby(keys).sum())
    result = pd.concat(parts, axis=1)
    if args.out:  # not in the benchmark: the DuckDB baseline keeps its result in memory too
        result.to_parquet(args.out)
    return {"cells": len(result), "columns": int(result.shape[1]), "groupbys": len(parts),
            "nonzero": bool(np.any(result.to_numpy() != 0))}


def ratebook(args) -> dict:
    """pipeline.runner.run, as `ratebook run CONFIG --release-id ID --replace` calls it, with the
    stage breakdown. RunSummary.stage_seconds lumps reading, validation, derive and accumulation
    into one figure (records are read once and pass through all four per batch), so this
    process wraps the batch reader, derive and CellAccumulator.add in timers to split it; the
    wrappers cost a few microseconds per batch."""
    import resource
    from collections import defaultdict

    started = time.perf_counter()
    from pipeline import runner
    from pipeline.stages import aggregate, derive, ingest

    timers: dict[str, float] = defaultdict(float)

    def timed_reader(reader):
        def wrapped(*a, **k):
            batches = reader(*a, **k)
            while True:
                t = time.perf_counter()
                try:
                    item = next(batches)
                except StopIteration:
                    timers["read"] += time.perf_counter() - t
                    return
                timers["read"] += time.perf_counter() - t
                yield item
        return wrapped

    def timed(name, fn):
        def wrapped(*a, **k):
            t = time.perf_counter()
            try:
                return fn(*a, **k)
            finally:
                timers[name] += time.perf_counter() - t
        return wrapped

    ingest._parquet_batches = timed_reader(ingest._parquet_batches)
    ingest._csv_batches = timed_reader(ingest._csv_batches)
    derive.derive = timed("derive", derive.derive)
    aggregate.CellAccumulator.add = timed("accumulate", aggregate.CellAccumulator.add)

    # high-water mark of this process's memory as each stage starts (ru_maxrss is KiB on Linux)
    marks = []

    def on_stage(text: str) -> None:
        marks.append({"stage": text, "at_seconds": round(time.perf_counter() - started, 3),
                      "peak_rss_mib_so_far": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1)})

    summary = runner.run(args.config, release_id=args.release_id, replace=True,
                         reporter=runner.Reporter(stage=on_stage))
    s = summary.stage_seconds
    lumped = s.get("ingest_derive_aggregate", 0.0)
    stages = {
        "read": timers["read"],
        # the rest of the batch loop: typing, row rules, duplicate ids, the lookup, rejects
        "validate": lumped - timers["read"] - timers["derive"] - timers["accumulate"],
        "derive": timers["derive"],
        "aggregate": timers["accumulate"] + s.get("roll_up", 0.0),
        "estimate": s.get("estimate", 0.0),
        "assess": s.get("assess", 0.0),
        "protect": s.get("protect", 0.0),
        "publish": s.get("publish", 0.0),
    }
    stages["other"] = summary.seconds - sum(s.values())  # config, lock, staging outside the stages
    return {"release_id": summary.release_id, "rows_read": summary.rows_read, "cells": summary.cells,
            "statuses": summary.statuses, "run_seconds": summary.seconds,
            "stage_seconds": {k: round(v, 3) for k, v in stages.items()},
            "runner_stage_seconds": {k: round(v, 3) for k, v in s.items()},
            "process_seconds": round(time.perf_counter() - started, 3),
            "memory_marks": marks}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="one benchmark contender, as a whole process")
    sub = parser.add_subparsers(dest="contender", required=True)
    p = sub.add_parser("read_floor")
    p.add_argument("--input", required=True)
    p.add_argument("--columns", required=True)
    p.add_argument("--batch-rows", type=int, default=65_536)
    p = sub.add_parser("duckdb")
    p.add_argument("--spec", required=True)
    p = sub.add_parser("analyst")
    p.add_argument("--spec", required=True)
    p.add_argument("--out", help="write the sums to this Parquet file (default: keep them in memory)")
    p = sub.add_parser("ratebook")
    p.add_argument("--config", required=True)
    p.add_argument("--release-id", required=True)
    args = parser.parse_args(argv)
    run = {"read_floor": read_floor, "duckdb": duckdb_baseline, "analyst": analyst, "ratebook": ratebook}
    result = run[args.contender](args)
    print(json.dumps(result), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
