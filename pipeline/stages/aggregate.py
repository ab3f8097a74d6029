"""Aggregate: additive cell statistics, accumulated batch by batch, then rolled up.

`CellAccumulator` holds one row of sums per indicator x finest geography unit x finest domain
cell; memory follows the number of cells, never the number of records. The sums are additive, so
accumulators from separate batches (or machines) simply add (`CellAccumulator.merge`). `roll_up`
then sums the finest cells to every geography level and every breakdown listed in `tables`, so
records are read once.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import sparse

from pipeline.stages.derive import DerivedBatch, DomainLayout
from pipeline.stages.ingest import Geography

# Scalar statistics per cell, in this order. Replicate sums are kept apart (cells x R).
STATISTICS = ("sample_size",        # n: records in the base
              "respondents",        # x: records in the base with the characteristic
              "item_nonresponse",   # records in the universe whose condition columns are missing
              "weighted_base",      # Σw over the base
              "weighted_count",     # Σw·y
              "sum_squared_weights")  # Σw² over the base (Kish effective n)


class CellAccumulator:
    def __init__(self, *, indicators: int, cells: int, replicates: int):
        self.cells = cells
        self.scalars = np.zeros((indicators, cells, len(STATISTICS)))
        self.replicate_base = np.zeros((indicators, cells, replicates))
        self.replicate_count = np.zeros((indicators, cells, replicates))

    def add(self, batch: DerivedBatch) -> None:
        C = self.cells
        for k in range(batch.in_base.shape[1]):
            rows = np.flatnonzero(batch.in_base[:, k])
            cell = batch.cell[rows]
            y = batch.has_characteristic[rows, k].astype(np.float64)
            w = batch.weight[rows]
            s = self.scalars[k]
            s[:, 0] += np.bincount(cell, minlength=C)
            s[:, 1] += np.bincount(cell, weights=y, minlength=C)
            s[:, 2] += np.bincount(batch.cell[batch.item_nonresponse[:, k]], minlength=C)
            s[:, 3] += np.bincount(cell, weights=w, minlength=C)
            s[:, 4] += np.bincount(cell, weights=w * y, minlength=C)
            s[:, 5] += np.bincount(cell, weights=w * w, minlength=C)
            if batch.replicate_weights is not None and len(rows):
                reps = batch.replicate_weights[rows]
                # one sparse-by-dense product sums every replicate column per cell at once
                members = sparse.csr_matrix((np.ones(len(rows)), (cell, np.arange(len(rows)))), shape=(C, len(rows)))
                self.replicate_base[k] += members @ reps
                self.replicate_count[k] += members @ (reps * y[:, None])

    def merge(self, other: "CellAccumulator") -> None:
        self.scalars += other.scalars
        self.replicate_base += other.replicate_base
        self.replicate_count += other.replicate_count


@dataclass
class CellTable:
    """Rolled-up cells: `frame` holds keys and scalar statistics (one row per published cell);
    the replicate sums are row-aligned arrays (cells x R), or None without replicate weights."""

    frame: pd.DataFrame
    replicate_base: np.ndarray | None
    replicate_count: np.ndarray | None


def roll_up(acc: CellAccumulator, config, geography: Geography, layout: DomainLayout) -> CellTable:
    """Sum the finest cells to every (indicator, table, geography level, breakdown) that the
    config publishes. Every geography unit and every category combination gets a row, sampled
    or not, so the tables are complete and their additive relations hold."""
    indicators = list(config.indicators)
    K, G, D = len(indicators), len(geography.finest_codes), layout.n_cells
    R = acc.replicate_base.shape[2]
    has_reps = bool(config.replicate_columns)
    # (G, K, D, stats) so that one sparse product rolls every statistic up a geography level
    finest = np.concatenate([acc.scalars, acc.replicate_base, acc.replicate_count], axis=2)
    finest = finest.reshape(K, G, D, -1).transpose(1, 0, 2, 3)
    S = finest.shape[3]
    levels = list(geography.levels)
    by_level = {}
    for level in levels:
        idx = geography.unit_index[level]
        n_units = len(geography.codes[level])
        membership = sparse.csr_matrix((np.ones(G), (idx, np.arange(G))), shape=(n_units, G))
        by_level[level] = (membership @ finest.reshape(G, -1)).reshape(n_units, K, D, S)

    blocks, keys = [], []
    for k, indicator in enumerate(indicators):
        for table in config.tables:
            deepest = levels.index(table.down_to) if table.down_to else len(levels) - 1
            by_axes = [layout.names.index(name) for name in table.by]
            for level in levels[: deepest + 1]:
                stats = by_level[level][:, k].reshape((len(geography.codes[level]),) + layout.shape + (S,))
                drop = tuple(1 + a for a in range(len(layout.names)) if a not in by_axes)
                stats = stats.sum(axis=drop) if drop else stats
                # remaining domain axes are in config order; put them in the table's `by` order
                kept = sorted(by_axes)
                stats = np.moveaxis(stats, [1 + kept.index(a) for a in by_axes], list(range(1, 1 + len(by_axes))))
                blocks.append(stats.reshape(-1, S))
                keys.append(_keys(indicator, level, geography, layout, by_axes))
    values = np.concatenate(blocks, axis=0)
    frame = pd.concat(keys, ignore_index=True)
    n_scalar = len(STATISTICS)
    for j, name in enumerate(STATISTICS):
        frame[name] = values[:, j]
    for name in ("sample_size", "respondents", "item_nonresponse"):
        frame[name] = np.rint(frame[name]).astype(np.int64)
    if geography.population is not None:
        frame["population"] = _population_of_whole_units(frame, geography, layout)
    rep_base = values[:, n_scalar: n_scalar + R] if has_reps else None
    rep_count = values[:, n_scalar + R:] if has_reps else None
    return CellTable(frame=frame, replicate_base=rep_base, replicate_count=rep_count)


def _population_of_whole_units(frame: pd.DataFrame, geography: Geography, layout: DomainLayout) -> np.ndarray:
    """The lookup's population of the geography unit for cells whose every domain is 'all'; NaN
    for domain cells, whose population the lookup does not give. For an indicator whose universe
    is narrower than everyone this is an upper bound, so a correction based on it is conservative."""
    out = np.full(len(frame), np.nan)
    whole = np.ones(len(frame), dtype=bool)
    for name in layout.names:
        whole &= frame[name].to_numpy() == "all"
    for level in geography.levels:
        per_unit = np.bincount(geography.unit_index[level], weights=geography.population,
                               minlength=len(geography.codes[level]))
        rows = whole & (frame["geo_level"].to_numpy() == level)
        position = pd.Index(geography.codes[level]).get_indexer(frame["geo_code"].to_numpy()[rows])
        out[rows] = per_unit[position]
    return out


def _keys(indicator: str, level: str, geography: Geography, layout: DomainLayout, by_axes: list[int]) -> pd.DataFrame:
    """Key columns for one block, in the same row order as the reshaped statistics
    (geography slowest, then the `by` domains in order, last fastest)."""
    n_units = len(geography.codes[level])
    sizes = [layout.shape[a] for a in by_axes]
    n_combos = int(np.prod(sizes, dtype=np.int64)) if sizes else 1
    unit = np.repeat(np.arange(n_units), n_combos)
    keys = {"indicator": np.full(n_units * n_combos, indicator, dtype=object),
            "geo_level": np.full(n_units * n_combos, level, dtype=object),
            "geo_code": geography.codes[level][unit], "geo_name": geography.names[level][unit]}
    combo = np.tile(np.arange(n_combos), n_units)
    positions = {}
    for a, size in zip(reversed(by_axes), reversed(sizes)):
        positions[a] = combo % size
        combo = combo // size
    for a, name in enumerate(layout.names):
        if a in positions:
            keys[name] = np.asarray(layout.labels[a], dtype=object)[positions[a]]
        else:
            keys[name] = np.full(n_units * n_combos, "all", dtype=object)
    return pd.DataFrame(keys)
