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
    """Additive sums per finest cell of the columns [1, w, w², w_1..w_R] (the sample size, the
    weighted base, Σw² and the replicate bases, all at once): over every record (`everyone`),
    and per indicator over the records it leaves out of its base (`left_out`) and over those with
    the characteristic (`with_characteristic`). An indicator's base is everyone − left out: a
    record adds its row once for all indicators, then once more for each indicator it misses or
    has, so the work follows the records, not indicators × replicates."""

    def __init__(self, *, indicators: int, cells: int, replicates: int):
        self.cells = cells
        self.replicates = replicates
        width = 3 + replicates
        self.everyone = np.zeros((cells, width))
        self.left_out = np.zeros((indicators, cells, width))
        self.with_characteristic = np.zeros((indicators, cells, width))
        self.item_nonresponse = np.zeros((indicators, cells))
        self.clusters: ClusterSums | None = None  # linearization sums, started by the first batch with a design

    def add(self, batch: DerivedBatch) -> None:
        C = self.cells
        if batch.cluster is not None:
            if self.clusters is None:
                self.clusters = ClusterSums(cells=C)
            self.clusters.add(batch)
        n = len(batch.cell)
        columns = np.empty((n, 3 + self.replicates))
        columns[:, 0] = 1.0
        columns[:, 1] = batch.weight
        columns[:, 2] = batch.weight * batch.weight
        if self.replicates:
            columns[:, 3:] = batch.replicate_weights
        _add_rows(self.everyone, batch.cell, columns, np.arange(n))
        for k in range(batch.in_base.shape[1]):
            _add_rows(self.left_out[k], batch.cell, columns, np.flatnonzero(~batch.in_base[:, k]))
            # derive sets the characteristic only inside the base
            _add_rows(self.with_characteristic[k], batch.cell, columns, np.flatnonzero(batch.has_characteristic[:, k]))
            self.item_nonresponse[k] += np.bincount(batch.cell[batch.item_nonresponse[:, k]], minlength=C)

    def finest_of(self, k: int) -> np.ndarray:
        """(cells, STATISTICS + R replicate bases + R replicate counts) of indicator k."""
        R = self.replicates
        out = np.empty((self.cells, len(STATISTICS) + 2 * R))
        base = self.everyone - self.left_out[k]
        base[base[:, 0] == 0] = 0.0  # no record in the base: exactly 0, not a difference's dust
        has = self.with_characteristic[k].copy()
        # where every base record has the characteristic the two sums are over the same records:
        # make them equal to the bit, so that p̂ is exactly 1 and no count exceeds its base by a
        # rounding (sums of element-wise smaller values stay smaller, so the roll-up keeps that)
        same = has[:, 0] == base[:, 0]
        has[same] = base[same]
        out[:, 0], out[:, 1], out[:, 2] = base[:, 0], has[:, 0], self.item_nonresponse[k]
        out[:, 3], out[:, 4], out[:, 5] = base[:, 1], has[:, 1], base[:, 2]
        out[:, 6: 6 + R] = base[:, 3:]
        out[:, 6 + R:] = has[:, 3:]
        return out

    def finest(self) -> np.ndarray:
        """(indicators, cells, STATISTICS + R replicate bases + R replicate counts)."""
        return np.stack([self.finest_of(k) for k in range(self.left_out.shape[0])])

    @property
    def scalars(self) -> np.ndarray:
        return self.finest()[:, :, : len(STATISTICS)]

    @property
    def replicate_base(self) -> np.ndarray:
        return self.finest()[:, :, len(STATISTICS): len(STATISTICS) + self.replicates]

    @property
    def replicate_count(self) -> np.ndarray:
        return self.finest()[:, :, len(STATISTICS) + self.replicates:]

    def merge(self, other: "CellAccumulator") -> None:
        self.everyone += other.everyone
        self.left_out += other.left_out
        self.with_characteristic += other.with_characteristic
        self.item_nonresponse += other.item_nonresponse
        if other.clusters is not None:
            if self.clusters is None:
                self.clusters = ClusterSums(cells=self.cells)
            self.clusters.merge(other.clusters)


def _add_rows(target: np.ndarray, cell: np.ndarray, columns: np.ndarray, rows: np.ndarray) -> None:
    """target[c] += Σ columns[r] over the rows r of cell c: one sparse-by-dense product over the
    cells the rows touch, reading the rows in place."""
    if not len(rows):
        return
    touched, position = np.unique(cell[rows], return_inverse=True)
    select = sparse.csr_matrix((np.ones(len(rows)), (position, rows)), shape=(len(touched), len(columns)))
    target[touched] += select @ columns


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
    or not, so the tables are complete and their additive relations hold. One indicator at a
    time, written straight into the result, so memory holds the accumulator, the result and one
    indicator's sums, never a copy of everything."""
    indicators = list(config.indicators)
    K, G, D = len(indicators), len(geography.finest_codes), layout.n_cells
    R = acc.replicates
    S = len(STATISTICS) + 2 * R
    levels = list(geography.levels)
    membership = {level: sparse.csr_matrix((np.ones(G), (geography.unit_index[level], np.arange(G))),
                                           shape=(len(geography.codes[level]), G))
                  for level in levels}
    plan = []  # (table's domain axes, geography levels), in the row order of `_keys` and rolled_membership
    for table in config.tables:
        deepest = levels.index(table.down_to) if table.down_to else len(levels) - 1
        plan.append(([layout.names.index(name) for name in table.by], levels[: deepest + 1]))
    rows_per_indicator = sum(len(geography.codes[level]) * int(np.prod([layout.shape[a] for a in by], dtype=np.int64))
                             for by, lv in plan for level in lv)
    n_scalar = len(STATISTICS)
    # three arrays, each contiguous (estimate reads the replicate sums row by row)
    scalars = np.empty((K * rows_per_indicator, n_scalar))
    rep_base = np.empty((K * rows_per_indicator, R))
    rep_count = np.empty((K * rows_per_indicator, R))
    keys, offset = [], 0
    for k, indicator in enumerate(indicators):
        stats = acc.finest_of(k).reshape(G, D * S)
        by_level = {}
        for level in levels:
            # the finest level is the accumulator itself when every finest unit is its own unit
            same = (len(geography.codes[level]) == G
                    and np.array_equal(geography.unit_index[level], np.arange(G)))
            by_level[level] = (stats if same else membership[level] @ stats).reshape(
                (len(geography.codes[level]),) + layout.shape + (S,))
        for by_axes, table_levels in plan:
            for level in table_levels:
                drop = tuple(1 + a for a in range(len(layout.names)) if a not in by_axes)
                block = by_level[level].sum(axis=drop) if drop else by_level[level]
                # remaining domain axes are in config order; put them in the table's `by` order
                kept = sorted(by_axes)
                block = np.moveaxis(block, [1 + kept.index(a) for a in by_axes], list(range(1, 1 + len(by_axes))))
                size = block.size // S
                block = block.reshape(size, S)
                scalars[offset: offset + size] = block[:, :n_scalar]
                rep_base[offset: offset + size] = block[:, n_scalar: n_scalar + R]
                rep_count[offset: offset + size] = block[:, n_scalar + R:]
                offset += size
                keys.append(_keys(indicator, level, geography, layout, by_axes))
    frame = pd.concat(keys, ignore_index=True)
    for j, name in enumerate(STATISTICS):
        frame[name] = scalars[:, j]
    for name in ("sample_size", "respondents", "item_nonresponse"):
        frame[name] = np.rint(frame[name]).astype(np.int64)
    if geography.population is not None:
        frame["population"] = _population_of_whole_units(frame, geography, layout)
    clusters = (_roll_up_clusters(acc.clusters, config, geography, layout, len(frame))
                if acc.clusters is not None else None)
    return CellTable(frame=frame, replicate_base=rep_base if R else None, replicate_count=rep_count if R else None,
                     clusters=clusters)


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
