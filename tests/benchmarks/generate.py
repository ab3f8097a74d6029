"""A scaled fictional survey for the benchmark: N person records of an invented country with 80
replicate weights and 30 yes/no items, written to Parquet in a streaming way, plus the geography
lookup and two ratebook configs (30 indicators, and the same with 5).

    python -m tests.benchmarks.generate --rows 200000 --out data/bench/example

The country (1 nation, 8 regions, 100 districts, 2,000 small areas by default) has names made up
by `pipeline.demo._invent_names`; nothing refers to a real place. The data need not be a faithful
survey design, only a plausible one of the right shape:

* records are allocated to areas in proportion to population^0.7 (small areas get relatively
  more, as small-area surveys do), at least a few per area; households of 1-7 persons; clusters
  (psu) of 8 consecutive households within an area; strata are the districts;
* the weight of a household is its area's population / sampled persons times a lognormal
  adjustment; replicate r is weight × the successive-difference factor of the household's cluster
  (Fay & Train 1995, clusters sorted by stratum), so every replicate weight is positive and the
  mean factor is 1;
* each item is a logistic model with region/district/area and cluster effects and an age (and
  for person items, sex) effect; household items are shared by every member; some items have a
  universe (e.g. age >= 15, asked of nobody else: missing outside it) and some item non-response.

Memory: per-household and per-cluster boundaries (a few int64 arrays of N/2.5 entries) are
computed once; records are produced and written `chunk_rows` at a time, so 10 million rows never
sit in memory at once. Every household- and cluster-level draw is a hash of (seed, stream, id),
so it does not depend on where chunk boundaries fall; person-level draws use one generator per
chunk. The same seed and N give identical data.
"""

from __future__ import annotations

import argparse
import json
import os
import time
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import yaml
from scipy.special import expit, logit, ndtri

from pipeline.demo import _invent_names
from pipeline.methods.replicate_factors import successive_difference_factors

# Bump when the generated data change, so cached inputs are regenerated.
GENERATOR_VERSION = 1

REPLICATES = 80
CHUNK_ROWS = 262_144      # records produced and written at a time
ROW_GROUP_ROWS = 131_072  # ~120 MB of decoded columns per row group: readers buffer one at a time
HOUSEHOLDS_PER_CLUSTER = 8
HOUSEHOLD_SIZE_P = np.array([0.27, 0.31, 0.17, 0.14, 0.07, 0.03, 0.01])  # sizes 1..7
ALLOCATION_POWER = 0.7
MIN_RECORDS_PER_AREA = 5
POPULATION = 20_000_000
AREA_SIZE_SIGMA = 1.0
NATION_CODE = "ZZ"  # user-assigned in ISO 3166, never a real country
GEOGRAPHY_SEED = 5_120_931  # the map does not change with the seed; the seed draws the people
DEMO_CONFIG = Path(__file__).resolve().parents[2] / "configs" / "demo.yaml"

SEX_CATEGORIES = {1: "Male", 2: "Female"}
AGE_BREAKS = [0, 15, 25, 45, 65, 111]
AGE_LABELS = ["0-14", "15-24", "25-44", "45-64", "65+"]
SEX_AGE_DOWN_TO = "district"  # as in configs/demo.yaml: the sex × age table stops at districts

FILES = {"persons": "persons.parquet", "areas": "areas.csv", "config_30": "bench-30.yaml",
         "config_5": "bench-5.yaml", "meta": "generation.json"}


@dataclass(frozen=True)
class Shape:
    """The map: districts per region (coarse to fine) and the number of small areas."""

    districts_per_region: tuple[int, ...] = (19, 16, 15, 13, 12, 10, 9, 6)  # 100, unequal
    areas: int = 2_000
    min_areas_per_district: int = 8

    @property
    def districts(self) -> int:
        return sum(self.districts_per_region)


# A small map for unit tests (the full one makes a ratebook run slow on a few thousand records).
TINY_SHAPE = Shape(districts_per_region=(3, 2), areas=40, min_areas_per_district=4)


@dataclass(frozen=True)
class BenchIndicator:
    """One item column (1 yes, 2 no, missing allowed where it has a universe or non-response) and
    the indicator "share with item == 1 among the universe".

    prevalence: the share at the centre of the model (before age, sex and area effects).
    household: the value is shared by every member of a household (model uses the reference
    person's age). age_slope: logit change per 10 years of age; male: logit shift for men.
    missing: share of those in the universe whose answer is removed (item non-response).
    """

    name: str
    label: str
    prevalence: float
    household: bool = False
    min_age: int = 0
    max_age: int | None = None
    missing: float = 0.0
    age_slope: float = 0.0
    male: float = 0.0
    area_sd: float = 0.4
    cluster_sd: float = 0.25

    @property
    def has_universe(self) -> bool:
        return self.min_age > 0 or self.max_age is not None

    @property
    def universe(self) -> str | None:
        """The universe in ratebook's expression language (None: everyone)."""
        if not self.has_universe:
            return None
        parts = [f"age >= {self.min_age}"] if self.min_age > 0 else []
        if self.max_age is not None:
            parts.append(f"age <= {self.max_age}")
        return " and ".join(parts)

    @property
    def condition(self) -> str:
        return f"{self.name} == 1"

    @property
    def may_be_missing(self) -> bool:
        return self.has_universe or self.missing > 0


INDICATORS: tuple[BenchIndicator, ...] = (
    # household items: everyone in the household has the household's answer
    BenchIndicator("no_internet", "Persons in households without an internet connection", 0.10,
                   household=True, missing=0.015, age_slope=0.3),
    BenchIndicator("home_owner", "Persons in owner-occupied homes", 0.60, household=True, age_slope=0.3),
    BenchIndicator("housing_burden", "Persons in households spending more than 30% of income on housing",
                   0.30, household=True, missing=0.025, age_slope=-0.1),
    BenchIndicator("overcrowded", "Persons in overcrowded dwellings", 0.08, household=True, age_slope=-0.3),
    BenchIndicator("no_car", "Persons in households without a car", 0.18, household=True, missing=0.01),
    BenchIndicator("food_insecure", "Persons in food-insecure households", 0.07, household=True,
                   missing=0.02, age_slope=-0.1),
    BenchIndicator("energy_arrears", "Persons in households in arrears on energy bills", 0.04,
                   household=True, missing=0.01),
    BenchIndicator("no_central_heating", "Persons in dwellings without central heating", 0.02,
                   household=True),  # rare
    BenchIndicator("damp_dwelling", "Persons in damp dwellings", 0.12, household=True),
    BenchIndicator("rent_arrears", "Persons in households in arrears on rent or mortgage", 0.025,
                   household=True, missing=0.015),  # rare
    # person items
    BenchIndicator("smoker", "Adults (15+) who smoke", 0.22, min_age=15, missing=0.02, male=0.35),
    BenchIndicator("employed", "Persons aged 15-64 in employment", 0.65, min_age=15, max_age=64,
                   missing=0.012, male=0.35),
    BenchIndicator("unemployed", "Persons aged 15-64 unemployed", 0.06, min_age=15, max_age=64,
                   missing=0.012, age_slope=-0.2),
    BenchIndicator("chronic_condition", "Persons with a chronic condition", 0.28, age_slope=0.5),
    BenchIndicator("unmet_care", "Adults (15+) with an unmet need for medical care", 0.08, min_age=15,
                   missing=0.018),
    BenchIndicator("addiction_treatment", "Adults (15+) in treatment for addiction", 0.015, min_age=15,
                   missing=0.022, male=0.3),  # rare
    BenchIndicator("obese", "Adults (18+) with obesity", 0.22, min_age=18, missing=0.03, age_slope=0.1),
    BenchIndicator("heavy_drinking", "Adults (15+) drinking heavily", 0.07, min_age=15, missing=0.03,
                   male=0.5),
    BenchIndicator("disability", "Persons with a disability", 0.11, age_slope=0.4),
    BenchIndicator("no_health_insurance", "Persons without health insurance", 0.08, missing=0.01),
    BenchIndicator("tertiary_education", "Persons aged 25+ with tertiary education", 0.30, min_age=25,
                   missing=0.01, age_slope=-0.2),
    BenchIndicator("early_school_leaver", "Persons aged 18-24 who left school early", 0.10, min_age=18,
                   max_age=24, male=0.3),
    BenchIndicator("volunteering", "Adults (15+) doing voluntary work", 0.18, min_age=15),
    BenchIndicator("poor_health", "Adults (15+) in poor self-rated health", 0.10, min_age=15,
                   missing=0.015, age_slope=0.4),
    BenchIndicator("flu_vaccinated", "Persons aged 65+ vaccinated against influenza", 0.55, min_age=65,
                   missing=0.02, age_slope=0.2),
    BenchIndicator("physically_active", "Adults (15+) physically active", 0.45, min_age=15,
                   missing=0.025, age_slope=-0.2),
    BenchIndicator("in_education", "Persons aged 15-24 in education", 0.30, min_age=15, max_age=24,
                   age_slope=-0.5),  # about 0.6 at ages 15-24
    BenchIndicator("child_care", "Children aged 0-5 in formal child care", 0.40, max_age=5),
    BenchIndicator("lonely", "Adults (15+) who feel lonely most of the time", 0.09, min_age=15,
                   missing=0.04),
    BenchIndicator("crime_victim", "Adults (15+) victims of crime in the past year", 0.025, min_age=15,
                   missing=0.01),  # rare
)
# The 5-indicator config: a household item, a rare one, universes and a universe-free person item.
FIVE = ("no_internet", "smoker", "employed", "chronic_condition", "addiction_treatment")
FIVE_INDICATORS = tuple(i for i in INDICATORS if i.name in FIVE)
assert len(INDICATORS) == 30 and len({i.name for i in INDICATORS}) == 30
assert set(FIVE) <= {i.name for i in INDICATORS}


# --------------------------------------------------------------------------------------------
# Counter-based random numbers: the same (seed, stream, id) always gives the same draw.

_MASK = (1 << 64) - 1
_GOLDEN = 0x9E3779B97F4A7C15


def _mix_int(x: int) -> int:
    """splitmix64 finaliser on a Python int (Steele, Lea & Flood 2014)."""
    x = (x + _GOLDEN) & _MASK
    x = ((x ^ (x >> 30)) * 0xBF58476D1CE4E5B9) & _MASK
    x = ((x ^ (x >> 27)) * 0x94D049BB133111EB) & _MASK
    return x ^ (x >> 31)


def _mix(x: np.ndarray) -> np.ndarray:
    """splitmix64 finaliser on uint64 arrays (numpy arrays wrap on overflow, as wanted)."""
    x = x + np.uint64(_GOLDEN)
    x = (x ^ (x >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    x = (x ^ (x >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return x ^ (x >> np.uint64(31))


def _key(seed: int, stream: int, sub: int = 0) -> np.uint64:
    return np.uint64(_mix_int(_mix_int(seed) ^ ((stream << 32) | sub)))


def _uniform(key: np.uint64, ids: np.ndarray) -> np.ndarray:
    """Uniform in (0, 1), one per id."""
    bits = _mix(ids.astype(np.uint64) + key) >> np.uint64(11)
    return (bits.astype(np.float64) + 0.5) * 2.0**-53


def _normal(key: np.uint64, ids: np.ndarray) -> np.ndarray:
    return ndtri(_uniform(key, ids))


# streams of the hashed draws
_S_REF_AGE, _S_PARTNER, _S_REF_SEX, _S_WEIGHT, _S_CLUSTER, _S_ITEM, _S_MISSING = range(1, 8)


# --------------------------------------------------------------------------------------------
# Geography and allocation


@dataclass(frozen=True)
class Geography:
    nation_name: str
    region_codes: list[str]
    region_names: list[str]
    district_codes: list[str]
    district_names: list[str]
    district_region: np.ndarray
    area_codes: list[str]
    area_names: list[str]
    area_district: np.ndarray
    area_population: np.ndarray
    area_effects: np.ndarray  # (areas, indicators) logit-scale region + district + area effect

    @property
    def area_region(self) -> np.ndarray:
        return self.district_region[self.area_district]


def build_geography(shape: Shape = Shape()) -> Geography:
    rng = np.random.default_rng(GEOGRAPHY_SEED)
    n_regions, n_districts, n_areas = len(shape.districts_per_region), shape.districts, shape.areas
    spare = n_areas - shape.min_areas_per_district * n_districts
    if spare < 0:
        raise ValueError(f"{n_areas} areas cannot give {n_districts} districts "
                         f"{shape.min_areas_per_district} areas each")
    areas_per_district = shape.min_areas_per_district + rng.multinomial(
        spare, rng.dirichlet(np.full(n_districts, 1.5)))
    names = _invent_names(rng, 1 + n_regions + n_districts + n_areas)
    district_region = np.repeat(np.arange(n_regions), shape.districts_per_region)
    area_district = np.repeat(np.arange(n_districts), areas_per_district)
    raw = rng.lognormal(0.0, AREA_SIZE_SIGMA, n_areas)
    population = np.maximum(np.rint(raw / raw.sum() * POPULATION), 200).astype(np.int64)
    sd = np.array([ind.area_sd for ind in INDICATORS])
    effects = (rng.normal(0.0, 0.25, (n_regions, len(sd)))[district_region[area_district]]
               + rng.normal(0.0, 0.45, (n_districts, len(sd)))[area_district]
               + rng.normal(0.0, 1.0, (n_areas, len(sd)))) * sd
    return Geography(
        nation_name=names[0],
        region_codes=[f"R{i + 1}" for i in range(n_regions)],
        region_names=names[1:1 + n_regions],
        district_codes=[f"D{i + 1:03d}" for i in range(n_districts)],
        district_names=names[1 + n_regions:1 + n_regions + n_districts],
        district_region=district_region,
        area_codes=[f"A{i + 1:04d}" for i in range(n_areas)],
        area_names=names[1 + n_regions + n_districts:],
        area_district=area_district,
        area_population=population,
        area_effects=effects,
    )


def allocate_records(population: np.ndarray, rows: int) -> np.ndarray:
    """Records per area, ∝ population^0.7 with a floor, adding up to `rows` exactly (largest
    remainders)."""
    n_areas = len(population)
    if rows < n_areas:
        raise ValueError(f"rows ({rows}) must be at least the number of areas ({n_areas})")
    floor = min(MIN_RECORDS_PER_AREA, rows // n_areas)
    share = population.astype(np.float64) ** ALLOCATION_POWER
    ideal = share / share.sum() * (rows - floor * n_areas)
    counts = np.floor(ideal).astype(np.int64)
    short = rows - floor * n_areas - int(counts.sum())
    counts[np.argsort(-(ideal - counts), kind="stable")[:short]] += 1
    return counts + floor


def areas_frame(geo: Geography) -> pd.DataFrame:
    """The lookup, in the demo's format (code and name per level, population, households)."""
    n = len(geo.area_codes)
    region, district = geo.area_region, geo.area_district
    return pd.DataFrame({
        "nation_code": [NATION_CODE] * n,
        "nation_name": [geo.nation_name] * n,
        "region_code": [geo.region_codes[i] for i in region],
        "region_name": [geo.region_names[i] for i in region],
        "district_code": [geo.district_codes[i] for i in district],
        "district_name": [geo.district_names[i] for i in district],
        "area_code": geo.area_codes,
        "area_name": geo.area_names,
        "population": geo.area_population,
        "households": np.rint(geo.area_population / 2.5).astype(np.int64),
    })


# --------------------------------------------------------------------------------------------
# Records


@dataclass(frozen=True)
class _Layout:
    """Where areas, households and clusters start, as positions in the record order."""

    area_start: np.ndarray      # (areas + 1,), the last entry is N
    household_start: np.ndarray  # (households + 1,), the last entry is N
    cluster_start: np.ndarray   # (clusters,)
    area_weight: np.ndarray     # population / sampled records, per area


def _layout(geo: Geography, rows: int, seed: int) -> _Layout:
    records = allocate_records(geo.area_population, rows)
    area_start = np.concatenate(([0], np.cumsum(records)))
    rng = np.random.default_rng([seed, 1])
    # household sizes (mean about 2.5) until they cover N records; those past N are dropped
    parts, covered = [], 0
    while covered < rows:
        parts.append(rng.choice(np.arange(1, 8, dtype=np.int64), size=rows // 2 + 64, p=HOUSEHOLD_SIZE_P))
        covered += int(parts[-1].sum())
    starts = np.concatenate(([0], np.cumsum(np.concatenate(parts))))
    starts = starts[starts < rows]
    # a household never crosses an area boundary: the area start splits it
    household_start = np.union1d(starts, area_start[:-1])
    household_area = np.searchsorted(area_start, household_start, side="right") - 1
    first_of_area = np.searchsorted(household_start, area_start[:-1])
    within = np.arange(len(household_start)) - first_of_area[household_area]
    cluster_start = household_start[within % HOUSEHOLDS_PER_CLUSTER == 0]
    return _Layout(area_start=area_start, household_start=np.append(household_start, rows),
                   cluster_start=cluster_start,
                   area_weight=geo.area_population / records)


def _schema(indicators=INDICATORS) -> pa.Schema:
    fields = [pa.field("person_id", pa.int64(), nullable=False),
              pa.field("household_id", pa.int64(), nullable=False),
              pa.field("area", pa.string(), nullable=False),
              pa.field("stratum", pa.string(), nullable=False),
              pa.field("psu", pa.int64(), nullable=False),
              pa.field("wt", pa.float64(), nullable=False),
              pa.field("sex", pa.int8(), nullable=False),
              pa.field("age", pa.int16(), nullable=False)]
    fields += [pa.field(ind.name, pa.int8()) for ind in indicators]
    fields += [pa.field(f"rw{r + 1}", pa.float64(), nullable=False) for r in range(REPLICATES)]
    return pa.schema(fields)


def _chunk(geo: Geography, lay: _Layout, factors_t: np.ndarray, seed: int, index: int,
           start: int, stop: int, schema: pa.Schema) -> pa.Table:
    p = np.arange(start, stop, dtype=np.int64)
    n = len(p)
    rng = np.random.default_rng([seed, 2, index])  # person-level draws of this chunk
    area = np.searchsorted(lay.area_start, p, side="right") - 1
    hh = np.searchsorted(lay.household_start, p, side="right") - 1
    cluster = np.searchsorted(lay.cluster_start, p, side="right") - 1
    position = p - lay.household_start[hh]
    size = lay.household_start[hh + 1] - lay.household_start[hh]

    # ages: reference person, partner, children and a few other adults
    ref_age = np.clip(np.rint(48 + 17 * _normal(_key(seed, _S_REF_AGE), hh)), 18, 100)
    has_partner = (size >= 2) & (_uniform(_key(seed, _S_PARTNER), hh) < 0.75)
    is_ref = position == 0
    is_partner = (position == 1) & has_partner
    other_adult = ~is_ref & ~is_partner & (rng.random(n) < 0.12)
    child = ref_age - rng.uniform(18, 42, n)
    child = np.where(child >= 0, child, rng.random(n) * np.maximum(ref_age - 17, 1))
    age = np.select([is_ref, is_partner, other_adult],
                    [ref_age, np.maximum(ref_age + np.rint(rng.normal(0, 4, n)), 18),
                     rng.uniform(18, 95, n)], np.floor(child))
    age = np.clip(age, 0, 100).astype(np.int16)
    ref_male = _uniform(_key(seed, _S_REF_SEX), hh) < 0.5
    male = np.select([is_ref, is_partner], [ref_male, np.where(rng.random(n) < 0.95, ~ref_male, ref_male)],
                     rng.random(n) < 0.51)
    sex = np.where(male, 1, 2).astype(np.int8)

    wt = lay.area_weight[area] * np.exp(0.2 * _normal(_key(seed, _S_WEIGHT), hh))
    columns: dict[str, pa.Array] = {
        "person_id": pa.array(p + 1),
        "household_id": pa.array(hh + 1),
        "area": pa.array(geo.area_codes).take(pa.array(area)),
        "stratum": pa.array(geo.district_codes).take(pa.array(geo.area_district[area])),
        "psu": pa.array(cluster + 1),
        "wt": pa.array(wt),
        "sex": pa.array(sex),
        "age": pa.array(age),
    }
    age_f = age.astype(np.float64)
    for k, ind in enumerate(INDICATORS):
        lin = (logit(ind.prevalence) + geo.area_effects[area, k]
               + ind.cluster_sd * _normal(_key(seed, _S_CLUSTER, k), cluster))
        if ind.household:
            lin += ind.age_slope * (ref_age - 45) / 10
            u = _uniform(_key(seed, _S_ITEM, k), hh)
            lost = _uniform(_key(seed, _S_MISSING, k), hh) < ind.missing
        else:
            lin += ind.age_slope * (age_f - 45) / 10 + ind.male * male
            u = rng.random(n)
            lost = rng.random(n) < ind.missing
        values = np.where(u < expit(lin), 1, 2).astype(np.int8)
        in_universe = age >= ind.min_age
        if ind.max_age is not None:
            in_universe &= age <= ind.max_age
        columns[ind.name] = pa.array(values, mask=~in_universe | lost)
    row = cluster % REPLICATES  # each cluster's row of the factor table
    for r in range(REPLICATES):
        columns[f"rw{r + 1}"] = pa.array(wt * factors_t[r][row])
    return pa.Table.from_arrays([columns[f.name] for f in schema], schema=schema)


def replicate_factor_table() -> np.ndarray:
    """(R, R) successive-difference factors; cluster i takes row i mod R. Fay & Train's factors
    depend on i only through i mod R, so this equals successive_difference_factors(C)[i] for
    every cluster without building a (clusters × R) array."""
    return successive_difference_factors(REPLICATES, replicates=REPLICATES)


# --------------------------------------------------------------------------------------------
# Configs


def bench_config(indicators: tuple[BenchIndicator, ...], *, name: str, demo_config: Path = DEMO_CONFIG) -> dict:
    """A ratebook config in the style of configs/demo.yaml for the generated files (relative
    paths: the config sits beside them)."""
    variables = {
        "sex": {"type": "integer", "values": [1, 2], "label": "Sex (1 male, 2 female)"},
        "age": {"type": "integer", "min": 0, "max": 110, "label": "Age in completed years"},
    }
    for ind in indicators:
        variables[ind.name] = {"type": "integer", "values": [1, 2],
                               "missing": "allowed" if ind.may_be_missing else "forbidden",
                               "label": f"{ind.label} (1 yes, 2 no)"}
    definitions = {}
    for ind in indicators:
        entry = {"label": ind.label}
        if ind.universe is not None:
            entry["universe"] = ind.universe
        entry["condition"] = ind.condition
        definitions[ind.name] = entry
    return {
        "release": {"name": name,
                    "title": f"Benchmark release, {len(indicators)} indicators (fictional)",
                    "publisher": "Statistics office of an invented country (fictional)",
                    "description": "Invented data generated by tests/benchmarks/generate.py for timing only."},
        "source": {"path": FILES["persons"], "record_id": "person_id", "variables": variables,
                   "invalid_rows": "reject", "max_rejected_share": 0.001},
        "geography": {"lookup": FILES["areas"], "key": "area", "population": "population",
                      "levels": [{"level": lv, "code": f"{lv}_code", "name": f"{lv}_name"}
                                 for lv in ("nation", "region", "district", "area")]},
        "design": {"weight": "wt", "variance": "replicate",
                   "replicates": {"prefix": "rw", "count": REPLICATES, "method": "successive_difference"}},
        "domains": {"sex": {"column": "sex", "categories": dict(SEX_CATEGORIES)},
                    "age_group": {"column": "age", "breaks": list(AGE_BREAKS), "labels": list(AGE_LABELS)}},
        "tables": [{"by": []}, {"by": ["sex"]}, {"by": ["age_group"]},
                   {"by": ["sex", "age_group"], "down_to": SEX_AGE_DOWN_TO}],
        "indicators": definitions,
        # estimation, reliability and disclosure exactly as configs/demo.yaml has them now, so the
        # benchmark measures the rules the demo ships
        **demo_sections(demo_config),
        "output": {"dir": "out", "formats": ["parquet", "csv"]},
    }


def demo_sections(demo_config: Path = DEMO_CONFIG) -> dict:
    settings = yaml.safe_load(Path(demo_config).read_text())
    return {key: settings[key] for key in ("estimation", "reliability", "disclosure") if key in settings}


def write_configs(out_dir, *, rows: int, seed: int, demo_config: Path = DEMO_CONFIG) -> None:
    """bench-30.yaml and bench-5.yaml beside the data. Cheap, so the benchmark rewrites them on
    every run (they follow `demo_config`, the demo config of the code measured) while the cached
    data stay."""
    header = (f"# Benchmark config written by tests/benchmarks/generate.py (rows={rows}, seed={seed}).\n"
              "# Fictional data; paths are relative to this file's folder. Rewritten on every benchmark run.\n")
    for key, indicators, name in (("config_30", INDICATORS, "bench-30"), ("config_5", FIVE_INDICATORS, "bench-5")):
        settings = bench_config(indicators, name=name, demo_config=demo_config)
        (Path(out_dir) / FILES[key]).write_text(header + yaml.safe_dump(settings, sort_keys=False,
                                                                         allow_unicode=True))


# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Generated:
    out_dir: str
    rows: int
    seed: int
    households: int
    clusters: int
    areas: int
    districts: int
    regions: int
    row_groups: int
    parquet_bytes: int
    seconds: float
    version: int = GENERATOR_VERSION

    def path(self, key: str) -> Path:
        return Path(self.out_dir) / FILES[key]


def generate(out_dir, *, rows: int, seed: int = 20261202, shape: Shape = Shape(),
             chunk_rows: int = CHUNK_ROWS, row_group_rows: int = ROW_GROUP_ROWS,
             progress=None) -> Generated:
    """Write persons.parquet, areas.csv, bench-30.yaml, bench-5.yaml and generation.json to
    `out_dir`. The Parquet file is written under a temporary name and renamed when complete;
    generation.json, written last, marks a complete set."""
    started = time.perf_counter()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    (out / FILES["meta"]).unlink(missing_ok=True)
    geo = build_geography(shape)
    lay = _layout(geo, rows, seed)
    factors_t = np.ascontiguousarray(replicate_factor_table().T)
    schema = _schema()
    target = out / FILES["persons"]
    tmp = target.with_name(f".{target.name}.{os.getpid()}.tmp")
    row_groups = 0
    try:
        with pq.ParquetWriter(tmp, schema, compression="zstd") as writer:
            for index, start in enumerate(range(0, rows, chunk_rows)):
                stop = min(start + chunk_rows, rows)
                table = _chunk(geo, lay, factors_t, seed, index, start, stop, schema)
                writer.write_table(table, row_group_size=row_group_rows)
                row_groups += -(-len(table) // row_group_rows)
                if progress is not None:
                    progress(stop, rows)
        os.replace(tmp, target)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    areas_frame(geo).to_csv(out / FILES["areas"], index=False, lineterminator="\n")
    write_configs(out, rows=rows, seed=seed)
    result = Generated(out_dir=str(out), rows=rows, seed=seed, households=len(lay.household_start) - 1,
                       clusters=len(lay.cluster_start), areas=len(geo.area_codes),
                       districts=len(geo.district_codes), regions=len(geo.region_codes),
                       row_groups=row_groups, parquet_bytes=target.stat().st_size,
                       seconds=round(time.perf_counter() - started, 3))
    (out / FILES["meta"]).write_text(json.dumps(asdict(result), indent=2) + "\n")
    return result


def cached(out_dir, *, rows: int, seed: int) -> Generated | None:
    """The generation already in `out_dir` when it is complete and matches, else None."""
    meta = Path(out_dir) / FILES["meta"]
    try:
        found = Generated(**json.loads(meta.read_text()))
    except (OSError, ValueError, TypeError):
        return None
    if (found.rows, found.seed, found.version) != (rows, seed, GENERATOR_VERSION):
        return None
    if not all((Path(out_dir) / FILES[k]).is_file() for k in ("persons", "areas")):
        return None
    return found


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, required=True, help="person records to write")
    parser.add_argument("--seed", type=int, default=20261202)
    parser.add_argument("--out", required=True, help="folder for the files")
    args = parser.parse_args(argv)
    result = generate(args.out, rows=args.rows, seed=args.seed,
                      progress=lambda done, total: print(f"\r{done:,} / {total:,} rows", end="", flush=True))
    print(f"\nwrote {result.rows:,} records ({result.parquet_bytes / 2**20:,.0f} MiB) to {result.out_dir} "
          f"in {result.seconds:.1f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
