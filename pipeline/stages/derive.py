"""Derive: from a validated batch, the arrays aggregation needs.

For each record: the position of its finest geography unit, its finest domain cell (the cross of
every domain's category), its weight and replicate weights; for each indicator: whether the record
is in the base, whether it has the characteristic, and whether it is item non-response (in the
universe but a condition column is missing, so it leaves the base).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipeline.stages.ingest import ONE_STRATUM, Geography


@dataclass(frozen=True)
class DomainLayout:
    """The finest domain cells: the cross of every domain's categories, in config order.
    Cell index = mixed-radix number of the category positions (last domain fastest)."""

    names: tuple[str, ...]
    labels: tuple[tuple[str, ...], ...]

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(len(lab) for lab in self.labels)

    @property
    def n_cells(self) -> int:
        return int(np.prod(self.shape, dtype=np.int64)) if self.names else 1


def domain_layout(config) -> DomainLayout:
    names, labels = [], []
    for name, dom in config.domains.items():
        names.append(name)
        labels.append(tuple(dom.categories.values()) if dom.categories is not None else tuple(dom.labels))
    return DomainLayout(tuple(names), tuple(labels))


@dataclass(frozen=True)
class DerivedBatch:
    cell: np.ndarray               # (records,) finest cell = geo position * n_domain_cells + domain cell
    weight: np.ndarray             # (records,)
    replicate_weights: np.ndarray | None   # (records, R)
    in_base: np.ndarray            # (records, indicators) bool
    has_characteristic: np.ndarray # (records, indicators) bool, only meaningful in the base
    item_nonresponse: np.ndarray   # (records, indicators) bool
    # linearization design (None unless design.variance is linearization): per record its stratum
    # code, its cluster code, and N_h of its stratum (NaN without population_clusters)
    stratum: np.ndarray | None = None
    cluster: np.ndarray | None = None
    population_clusters: np.ndarray | None = None


def derive(config, frame: pd.DataFrame, geography: Geography, layout: DomainLayout) -> DerivedBatch:
    geo_position = pd.Index(geography.finest_codes).get_indexer(frame[config.geography.key].to_numpy())
    if (geo_position < 0).any():  # ingest rejects unknown keys; reaching here is a bug
        raise AssertionError("derive: a record's geography key is not in the lookup")
    domain_cell = np.zeros(len(frame), dtype=np.int64)
    for name, size in zip(layout.names, layout.shape):
        domain_cell = domain_cell * size + _category_position(config.domains[name], frame)
    n_ind = len(config.indicators)
    in_base = np.zeros((len(frame), n_ind), dtype=bool)
    has = np.zeros((len(frame), n_ind), dtype=bool)
    nonresponse = np.zeros((len(frame), n_ind), dtype=bool)
    for k, name in enumerate(config.indicators):
        universe = config.universes[name].evaluate(frame)
        # three-valued: a condition that cannot be decided because a value is missing is item
        # non-response; the record leaves this indicator's base
        true, unknown = config.conditions[name].evaluate_three_valued(frame)
        in_base[:, k] = universe & ~unknown
        nonresponse[:, k] = universe & unknown
        has[:, k] = true & in_base[:, k]
    reps = None
    if config.replicate_columns:
        reps = frame[config.replicate_columns].to_numpy(dtype=np.float64)
    return DerivedBatch(cell=geo_position.astype(np.int64) * layout.n_cells + domain_cell,
                        weight=frame[config.design.weight].to_numpy(dtype=np.float64),
                        replicate_weights=reps, in_base=in_base, has_characteristic=has,
                        item_nonresponse=nonresponse, **_design(config, frame))


def _design(config, frame: pd.DataFrame) -> dict:
    """The linearization design columns of a batch (ingest has checked them)."""
    lin = config.design.linearization if config.design.variance == "linearization" else None
    if lin is None:
        return {}
    stratum = (frame[lin.strata].to_numpy(dtype=object) if lin.strata is not None
               else np.full(len(frame), ONE_STRATUM, dtype=object))
    population = (frame[lin.population_clusters].to_numpy(dtype=np.float64) if lin.population_clusters is not None
                  else np.full(len(frame), np.nan))
    return {"stratum": stratum, "cluster": frame[lin.clusters].to_numpy(dtype=object),
            "population_clusters": population}


def _category_position(domain, frame: pd.DataFrame) -> np.ndarray:
    values = frame[domain.column]
    if domain.categories is not None:
        keys = list(domain.categories)
        if isinstance(keys[0], str):
            position = pd.Index(keys).get_indexer(values.to_numpy())
        else:
            position = pd.Index([float(k) for k in keys]).get_indexer(values.to_numpy(dtype=np.float64))
    else:
        # intervals are [break_i, break_{i+1})
        position = np.searchsorted(np.asarray(domain.breaks, dtype=float), values.to_numpy(dtype=np.float64),
                                   side="right") - 1
        position[position >= len(domain.breaks) - 1] = -1
    if (position < 0).any():  # config checks that categories and breaks cover the declared values
        raise AssertionError(f"derive: a value of {domain.column!r} falls in no category")
    return position.astype(np.int64)
