"""Aggregate: additive cell statistics, accumulated batch by batch, then rolled up.

`CellAccumulator` holds one row of sums per indicator x finest geography unit x finest domain
cell; memory follows the number of cells, never the number of records. The sums are additive, so
accumulators from separate batches (or machines) simply add (`CellAccumulator.merge`). `roll_up`
then sums the finest cells to every geography level and every breakdown listed in `tables`, so
records are read once.
"""

from __future__ import annotations

import re
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


# --------------------------------------------------------------------------------------------
# Linearization: per-cluster linear sums (DESIGN §2, §4)


def _sum_by_key(fine: np.ndarray, cluster: np.ndarray, *sums: np.ndarray):
    """Sort by (fine, cluster) and add the sums of equal keys. Stable, so the same input gives
    the same floating-point sums."""
    order = np.lexsort((cluster, fine))
    fine, cluster = fine[order], cluster[order]
    if not len(order):
        return (fine, cluster) + tuple(s[order] for s in sums)
    first = np.ones(len(order), dtype=bool)
    first[1:] = (fine[1:] != fine[:-1]) | (cluster[1:] != cluster[:-1])
    starts = np.flatnonzero(first)
    return (fine[starts], cluster[starts]) + tuple(np.add.reduceat(s[order], starts) for s in sums)


class ClusterSums:
    """The additive statistics of Taylor linearization: per (indicator, finest cell, cluster)
    a = Σw·y and b = Σw over the base records of the cell in the cluster (Woodruff 1971; the
    cluster totals of the linearized variable are u_hi = (a_hi − p̂·b_hi)/Σw).

    Kept sparse, as sorted key arrays and sums, so memory follows the (cell, cluster) pairs that
    hold records, never the records. Clusters are (stratum, cluster) code pairs, given integer
    positions in order of first sight (the mapping grows with the clusters only). Over every
    accepted record, whatever the indicator, it also keeps each cluster's stratum and each
    stratum's N_h: a domain keeps every cluster of the design (n_h counts them all).
    """

    def __init__(self, *, cells: int):
        self.cells = cells  # finest cells per indicator
        self._position: dict[tuple, int] = {}
        self._cluster_stratum: list = []
        self._population: dict = {}  # stratum -> N_h (NaN without population_clusters)
        self._merged = (np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0), np.empty(0))
        self._pending: list[tuple] = []
        self._pending_size = 0

    @property
    def n_clusters(self) -> int:
        return len(self._cluster_stratum)

    def _register(self, stratum, cluster, population) -> np.ndarray:
        """Integer position of every record's (stratum, cluster); new pairs are appended."""
        pairs = pd.DataFrame({"s": stratum, "c": cluster})
        code = pairs.groupby(["s", "c"], sort=False).ngroup().to_numpy()  # numbered by first sight
        uniques = pairs.drop_duplicates()
        position = np.empty(len(uniques), dtype=np.int64)
        for i, key in enumerate(zip(uniques["s"], uniques["c"])):
            if key not in self._position:
                self._position[key] = len(self._cluster_stratum)
                self._cluster_stratum.append(key[0])
            position[i] = self._position[key]
        firsts = pd.DataFrame({"s": stratum, "n": population}).drop_duplicates("s")
        for s, n in zip(firsts["s"], firsts["n"]):
            self._population.setdefault(s, float(n))  # ingest checked N_h is constant per stratum
        return position[code]

    def add(self, batch: DerivedBatch) -> None:
        cluster = self._register(batch.stratum, batch.cluster, batch.population_clusters)
        fine, where, a, b = [], [], [], []
        for k in range(batch.in_base.shape[1]):
            rows = np.flatnonzero(batch.in_base[:, k])
            w = batch.weight[rows]
            fine.append(k * self.cells + batch.cell[rows])
            where.append(cluster[rows])
            b.append(w)
            a.append(w * batch.has_characteristic[rows, k])
        self._append(_sum_by_key(np.concatenate(fine), np.concatenate(where), np.concatenate(a), np.concatenate(b)))

    def _append(self, chunk: tuple) -> None:
        self._pending.append(chunk)
        self._pending_size += len(chunk[0])
        # merge once the pending chunks outgrow the merged sums: memory stays within a small
        # multiple of the distinct (cell, cluster) pairs
        if self._pending_size > max(len(self._merged[0]), 1 << 16):
            self._consolidate()

    def _consolidate(self) -> None:
        if self._pending:
            parts = [self._merged] + self._pending
            self._merged = _sum_by_key(*(np.concatenate([p[j] for p in parts]) for j in range(4)))
            self._pending, self._pending_size = [], 0

    def merge(self, other: "ClusterSums") -> None:
        """Add another accumulator's sums (another batch range or machine): its clusters are
        mapped onto this one's positions by their (stratum, cluster) codes."""
        if other.cells != self.cells:
            raise ValueError(f"cannot merge cluster sums over {other.cells} cells into {self.cells}")
        other._consolidate()
        remap = np.empty(other.n_clusters, dtype=np.int64)
        for key, j in other._position.items():
            if key not in self._position:
                self._position[key] = len(self._cluster_stratum)
                self._cluster_stratum.append(key[0])
            remap[j] = self._position[key]
        for s, n in other._population.items():
            self._population.setdefault(s, n)
        fine, cluster, a, b = other._merged
        self._append(_sum_by_key(fine, remap[cluster], a, b))

    def totals(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(fine key = indicator × cells + cell, cluster position, Σw·y, Σw), one row per pair."""
        self._consolidate()
        return self._merged

    def design(self) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        """(strata codes in stratum order, each cluster's stratum position, N_h or None).

        Stratum order is numeric when every code is a whole number, else text order; it decides
        which stratum is the neighbour when single-cluster strata are collapsed."""
        codes = list(self._population)
        numeric = all(re.fullmatch(r"[+-]?\d+", str(c)) for c in codes)
        codes.sort(key=(lambda c: int(c)) if numeric else str)
        where = {c: h for h, c in enumerate(codes)}
        cluster_stratum = np.array([where[s] for s in self._cluster_stratum], dtype=np.int64)
        population = np.array([self._population[c] for c in codes], dtype=np.float64)
        return (np.array(codes, dtype=object), cluster_stratum,
                None if np.isnan(population).all() else population)


@dataclass(frozen=True)
class ClusterTotals:
    """Rolled-up per-cluster linear sums, row-aligned with the CellTable frame (DESIGN §4).

    weighted_count, weighted_base: (cells, clusters) sparse Σw·y and Σw over the cell's base
    records in each cluster, summed from the finest cells BEFORE any square is taken (squares
    do not add across domain cells that split a cluster). cluster_stratum: (clusters,) position
    of each cluster's stratum in `strata` (stratum order). population_clusters: (strata,) N_h, or
    None without a finite population correction."""

    weighted_count: sparse.csr_matrix
    weighted_base: sparse.csr_matrix
    cluster_stratum: np.ndarray
    strata: np.ndarray
    population_clusters: np.ndarray | None


def rolled_membership(config, geography: Geography, layout: DomainLayout) -> sparse.csr_matrix:
    """(rolled cells × finest cells) 0/1 matrix: which finest cells (indicator × finest geography
    × finest domain cell) add up to each row of `roll_up`'s frame, in the same row order."""
    K, G, D = len(config.indicators), len(geography.finest_codes), layout.n_cells
    levels = list(geography.levels)
    # each finest domain cell's category on every domain axis (mixed radix, last domain fastest)
    categories = (np.array(np.unravel_index(np.arange(D), layout.shape)) if layout.names
                  else np.zeros((0, D), dtype=np.int64))
    rows, columns, offset = [], [], 0
    for k in range(K):
        for table in config.tables:
            deepest = levels.index(table.down_to) if table.down_to else len(levels) - 1
            by_axes = [layout.names.index(name) for name in table.by]
            combo, n_combos = np.zeros(D, dtype=np.int64), 1
            for a in by_axes:  # the table's categories in `by` order, last fastest (as `_keys`)
                combo = combo * layout.shape[a] + categories[a]
                n_combos *= layout.shape[a]
            for level in levels[: deepest + 1]:
                rows.append((offset + geography.unit_index[level][:, None] * n_combos + combo[None, :]).ravel())
                columns.append(np.arange(k * G * D, (k + 1) * G * D))  # finest cell g·D + d of indicator k
                offset += len(geography.codes[level]) * n_combos
    rows, columns = np.concatenate(rows), np.concatenate(columns)
    return sparse.csr_matrix((np.ones(len(rows)), (rows, columns)), shape=(offset, K * G * D))


def _roll_up_clusters(sums: ClusterSums, config, geography: Geography, layout: DomainLayout,
                      n_rows: int) -> ClusterTotals:
    """Linear sums a, b of every rolled cell and cluster: one sparse product with the finest →
    rolled membership, so only the linear sums are added across cells."""
    membership = rolled_membership(config, geography, layout)
    if membership.shape[0] != n_rows:  # the two walks over tables and levels must agree
        raise AssertionError(f"rolled membership has {membership.shape[0]} rows, the cells table {n_rows}")
    fine, cluster, a, b = sums.totals()
    shape = (membership.shape[1], sums.n_clusters)
    strata, cluster_stratum, population = sums.design()
    return ClusterTotals(
        weighted_count=(membership @ sparse.csr_matrix((a, (fine, cluster)), shape=shape)).tocsr(),
        weighted_base=(membership @ sparse.csr_matrix((b, (fine, cluster)), shape=shape)).tocsr(),
        cluster_stratum=cluster_stratum, strata=strata, population_clusters=population)


class CellAccumulator:
    def __init__(self, *, indicators: int, cells: int, replicates: int):
        self.cells = cells
        self.scalars = np.zeros((indicators, cells, len(STATISTICS)))
        self.replicate_base = np.zeros((indicators, cells, replicates))
        self.replicate_count = np.zeros((indicators, cells, replicates))
        self.clusters: ClusterSums | None = None  # linearization sums, started by the first batch with a design

    def add(self, batch: DerivedBatch) -> None:
        C = self.cells
        if batch.cluster is not None:
            if self.clusters is None:
                self.clusters = ClusterSums(cells=C)
            self.clusters.add(batch)
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
        if other.clusters is not None:
            if self.clusters is None:
                self.clusters = ClusterSums(cells=self.cells)
            self.clusters.merge(other.clusters)


@dataclass
class CellTable:
    """Rolled-up cells: `frame` holds keys and scalar statistics (one row per published cell);
    the replicate sums are row-aligned arrays (cells x R), or None without replicate weights."""

    frame: pd.DataFrame
    replicate_base: np.ndarray | None
    replicate_count: np.ndarray | None
    clusters: ClusterTotals | None = None  # per-cluster linear sums, for linearization only


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
    clusters = (_roll_up_clusters(acc.clusters, config, geography, layout, len(frame))
                if acc.clusters is not None else None)
    return CellTable(frame=frame, replicate_base=rep_base, replicate_count=rep_count, clusters=clusters)


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
