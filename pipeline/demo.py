"""The fictional population and survey used by the demo and the tests.

Everything here is invented: the Republic of Valdoria, its 5 regions, 30 districts and 300 small
areas (names built from made-up syllables by code), about 2.2 million persons in households, and
a stratified two-stage household survey of them with 80 successive-difference replicate weights.

    generate_demo(persons=..., seed=...) -> DemoData      frames in memory, no files
    write_demo(out_dir, persons=..., seed=..., formats=...) -> DemoSummary
    build_population(seed) -> DemoPopulation             the population, lookup and truth, once
    draw_survey(population, seed=..., persons=...) -> microdata frame of one sample

Same seed, same frames and byte-identical files. The population depends on the seed only, never on
`persons`, so the truth is the same for every sample size drawn from it. `generate_demo(seed=s)`
is `draw_survey(build_population(s), seed=s)`; other sample seeds give further independent samples
of the same design from the same population (what a coverage study needs).

Design of the survey (all probabilities are exact, so weights are exact inverses):

1. Strata are the 30 districts. Within each area households form blocks of roughly 30-150
   households; blocks are the clusters (PSUs).
2. First stage: n_h blocks per district, n_h proportional to the district's households (at least
   2), drawn by systematic PPS on household counts along the list ordered by area then block
   (certainty blocks taken out first if any block reaches the sampling interval).
3. Second stage: min(m, M_i) households by simple random sampling in each selected block of M_i
   households, all persons of a chosen household interviewed.
4. Design weight 1/π, π = π_block · take/M_i. Households respond with an area-specific probability
   (0.80-0.92); weights of respondents are raised within weighting classes (districts) so that they
   carry the design weight of the non-respondents.
5. Replicate r: design weights times the successive-difference factor of the household's block
   (blocks sorted by stratum then selection order; Fay & Train 1995), then the same non-response
   adjustment recomputed with the replicate's own weights.
6. Item non-response: a fixed 1-3% of responding persons (households, for household-level items)
   lose the answer to some items (ITEM_NONRESPONSE).
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from pipeline.methods.replicate_factors import successive_difference_factors

__all__ = [
    "AGE_BREAKS",
    "AGE_LABELS",
    "DEMO_FILES",
    "DemoData",
    "DemoIndicator",
    "DemoPopulation",
    "DemoSummary",
    "GEO_LEVELS",
    "INDICATORS",
    "ITEM_NONRESPONSE",
    "REPLICATES",
    "SEX_AGE_DOWN_TO",
    "SEX_LABELS",
    "build_population",
    "draw_survey",
    "generate_demo",
    "write_demo",
]


# --------------------------------------------------------------------------------------------
# What the demo publishes. configs/demo.yaml states the same definitions; keep the two in step.
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class DemoIndicator:
    """One published proportion: persons aged min_age..max_age (the universe) with column == code.

    `universe` and `condition` give the same definition in the config's expression language.
    """

    name: str
    column: str
    code: int
    min_age: int = 0
    max_age: int | None = None

    @property
    def universe(self) -> str:
        if self.max_age is None:
            return f"age >= {self.min_age}"
        return f"age >= {self.min_age} and age <= {self.max_age}"

    @property
    def condition(self) -> str:
        return f"{self.column} == {self.code}"


INDICATORS: tuple[DemoIndicator, ...] = (
    DemoIndicator("no_internet", "internet", 3),  # everyone; household has no connection
    DemoIndicator("smoker", "smoker", 1, min_age=15),
    DemoIndicator("employed", "employed", 1, min_age=15, max_age=64),
    DemoIndicator("home_owner", "home_owner", 1),
    DemoIndicator("housing_burden", "housing_burden", 1),  # housing costs > 30% of income
    DemoIndicator("chronic_condition", "chronic", 1),
    DemoIndicator("unmet_care", "unmet_care", 1, min_age=15),  # past 12 months
    DemoIndicator("addiction_treatment", "addiction_treatment", 1, min_age=15),
)
SEX_LABELS: dict[int, str] = {1: "Male", 2: "Female"}
AGE_BREAKS: tuple[int, ...] = (0, 15, 35, 65, 111)  # left-closed: [0,15) [15,35) [35,65) [65,111)
AGE_LABELS: tuple[str, ...] = ("0-14", "15-34", "35-64", "65+")
GEO_LEVELS: tuple[str, ...] = ("nation", "region", "district", "area")
SEX_AGE_DOWN_TO = "district"  # the sex × age_group table stops at this level
REPLICATES = 80

# Share of respondents (of households, for the household-level items) whose answer is removed,
# among those the item applies to. Exact counts are drawn, not Bernoulli, so the shares are stable.
ITEM_NONRESPONSE: dict[str, float] = {
    "internet": 0.015,
    "smoker": 0.02,
    "employed": 0.012,
    "housing_burden": 0.025,
    "unmet_care": 0.018,
    "addiction_treatment": 0.022,
}
_HOUSEHOLD_ITEMS = ("internet", "home_owner", "housing_burden")

DEMO_FILES = {
    "persons_parquet": "demo_persons.parquet",
    "persons_csv": "demo_persons.csv",
    "areas_csv": "demo_areas.csv",
    "truth_parquet": "demo_truth.parquet",
}
_FORMATS = ("parquet", "csv")

# --------------------------------------------------------------------------------------------
# Fixed shape of the country and of the survey.
# --------------------------------------------------------------------------------------------

NATION_CODE = "VL"
NATION_NAME = "Valdoria"
_DISTRICTS_PER_REGION = (9, 7, 6, 5, 3)  # 30 districts, deliberately unequal
_N_AREAS = 300
_MIN_AREAS_PER_DISTRICT = 4
# The map and its names do not change with the seed: the seed draws the people and the sample.
_GEOGRAPHY_SEED = 7_310_447

_TARGET_HOUSEHOLDS = 880_000  # × about 2.55 persons ≈ 2.2 million persons
_AREA_SIZE_SIGMA = 1.1  # lognormal spread of area sizes: from ~50 to ~40,000 households
_MIN_AREA_HOUSEHOLDS = 40
_BLOCK_MIN, _BLOCK_MAX = 30, 150
_HOUSEHOLD_SIZE_P = np.array([0.27, 0.31, 0.17, 0.14, 0.07, 0.03, 0.01])  # sizes 1..7
_MAX_AGE = 100

_HOUSEHOLDS_PER_BLOCK = 8
_MIN_BLOCKS_PER_STRATUM = 2  # so every stratum has a variance contribution
_MAX_BLOCK_FRACTION = 0.30  # beyond this, take more households per block instead of more blocks
_MIN_PERSONS = 1_000  # 30 strata × 2 blocks × 8 households already give about this many
_RESPONSE_RANGE = (0.80, 0.92)

_ONSETS = ("b", "d", "f", "g", "k", "l", "m", "n", "r", "s", "t", "v", "z",
           "br", "dr", "gr", "kr", "tr", "vr", "sk", "st", "th")
_NUCLEI = ("a", "e", "i", "o", "u", "ae", "ei", "ou", "y")
_CODAS = ("n", "r", "l", "s", "th", "nd", "rk", "sk", "m")


# --------------------------------------------------------------------------------------------
# Results
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class DemoData:
    """The demo survey in memory.

    microdata: one row per responding person (see `write_demo` for the columns).
    areas: the geography lookup, one row per area, with true population and household counts.
    truth: true population proportion of every indicator in every published cell.
    selected_clusters / selected_households: first- and second-stage sample sizes before
    non-response (clusters without a responding household do not appear in microdata).
    """

    microdata: pd.DataFrame
    areas: pd.DataFrame
    truth: pd.DataFrame
    selected_clusters: int
    selected_households: int


@dataclass(frozen=True)
class DemoSummary:
    """What `write_demo` wrote (paths are None for formats not asked for) and how much."""

    out_dir: Path
    persons_parquet: Path | None
    persons_csv: Path | None
    areas_csv: Path
    truth_parquet: Path
    population_persons: int
    population_households: int
    sampled_persons: int  # responding persons, rows of the microdata
    households: int  # responding households
    clusters: int  # selected clusters (blocks), including any with no respondent
    areas: int  # areas in the lookup
    areas_in_sample: int  # areas with at least one responding person

    @property
    def files(self) -> tuple[Path, ...]:
        paths = (self.persons_parquet, self.persons_csv, self.areas_csv, self.truth_parquet)
        return tuple(p for p in paths if p is not None)

    def __str__(self) -> str:
        return (f"population {self.population_persons:,} persons in "
                f"{self.population_households:,} households; sample {self.sampled_persons:,} "
                f"persons in {self.households:,} responding households, {self.clusters:,} "
                f"clusters, {self.areas_in_sample} of {self.areas} areas; files: "
                + ", ".join(p.name for p in self.files))


# --------------------------------------------------------------------------------------------
# Geography
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Geography:
    region_codes: list[str]
    region_names: list[str]
    district_codes: list[str]
    district_names: list[str]
    district_region: np.ndarray  # region index of each district
    area_codes: list[str]
    area_names: list[str]
    area_district: np.ndarray  # district index of each area (areas sorted by district)

    @property
    def area_region(self) -> np.ndarray:
        return self.district_region[self.area_district]


def _invent_names(rng: np.random.Generator, count: int) -> list[str]:
    """`count` distinct invented words of 2-3 syllables (onset + nucleus, last one closed)."""
    names: list[str] = []
    seen = {NATION_NAME.lower()}
    while len(names) < count:
        n_syllables = 2 + int(rng.random() < 0.4)
        parts = [_ONSETS[rng.integers(len(_ONSETS))] + _NUCLEI[rng.integers(len(_NUCLEI))]
                 for _ in range(n_syllables)]
        word = "".join(parts) + _CODAS[rng.integers(len(_CODAS))]
        if word not in seen:
            seen.add(word)
            names.append(word.capitalize())
    if len(set(names)) != count:  # cannot happen; guards the uniqueness the lookup relies on
        raise RuntimeError("invented place names are not unique")
    return names


def _build_geography() -> _Geography:
    rng = np.random.default_rng(_GEOGRAPHY_SEED)
    n_regions = len(_DISTRICTS_PER_REGION)
    n_districts = sum(_DISTRICTS_PER_REGION)
    spare = _N_AREAS - _MIN_AREAS_PER_DISTRICT * n_districts
    areas_per_district = _MIN_AREAS_PER_DISTRICT + rng.multinomial(
        spare, rng.dirichlet(np.full(n_districts, 1.5)))
    names = _invent_names(rng, n_regions + n_districts + _N_AREAS)
    return _Geography(
        region_codes=[f"R{i + 1}" for i in range(n_regions)],
        region_names=names[:n_regions],
        district_codes=[f"D{i + 1:02d}" for i in range(n_districts)],
        district_names=names[n_regions:n_regions + n_districts],
        district_region=np.repeat(np.arange(n_regions), _DISTRICTS_PER_REGION),
        area_codes=[f"A{i + 1:03d}" for i in range(_N_AREAS)],
        area_names=names[n_regions + n_districts:],
        area_district=np.repeat(np.arange(n_districts), areas_per_district),
    )


# --------------------------------------------------------------------------------------------
# Population
# --------------------------------------------------------------------------------------------


def _expit(x: np.ndarray) -> np.ndarray:
    return 1.0 / (1.0 + np.exp(-x))


def _area_effects(rng: np.random.Generator, geo: _Geography, sd: float) -> np.ndarray:
    """Nested region + district + area random effect on the logit scale, one value per area."""
    region = rng.normal(0.0, 0.25 * sd, len(geo.region_codes))
    district = rng.normal(0.0, 0.45 * sd, len(geo.district_codes))
    area = rng.normal(0.0, sd, len(geo.area_codes))
    return region[geo.area_region] + district[geo.area_district] + area


@dataclass(frozen=True)
class _Population:
    # blocks, in list order (district, area, block)
    block_area: np.ndarray
    block_first_household: np.ndarray
    block_households: np.ndarray
    # households, in block order
    household_block: np.ndarray
    household_first_person: np.ndarray
    household_size: np.ndarray
    # persons, in household order; characteristics are int8 codes, 0 = not applicable
    person_household: np.ndarray
    sex: np.ndarray
    age: np.ndarray
    items: dict[str, np.ndarray]
    # households' response propensity, one per area (a property of the area, drawn with it)
    area_response: np.ndarray

    @property
    def household_area(self) -> np.ndarray:
        return self.block_area[self.household_block]

    @property
    def person_area(self) -> np.ndarray:
        return self.household_area[self.person_household]


def _split_into_blocks(rng: np.random.Generator, households: int) -> np.ndarray:
    """Block sizes in 30..150 adding up to `households`; a short remainder joins the last block."""
    draws = rng.integers(_BLOCK_MIN, _BLOCK_MAX + 1, size=households // _BLOCK_MIN + 1)
    ends = np.cumsum(draws)
    k = int(np.searchsorted(ends, households))  # first block reaching the total
    sizes = draws[:k + 1].copy()
    sizes[k] = households - (ends[k - 1] if k else 0)
    if k and sizes[k] < _BLOCK_MIN:
        sizes[k - 1] += sizes[k]
        sizes = sizes[:k]
    return sizes


def _yes_no(p: np.ndarray, u: np.ndarray) -> np.ndarray:
    return np.where(u < p, 1, 2).astype(np.int8)


def _build_population(rng: np.random.Generator, geo: _Geography) -> _Population:
    n_areas = len(geo.area_codes)

    # Area sizes: lognormal, so a few areas are large and many are small.
    raw = rng.lognormal(0.0, _AREA_SIZE_SIGMA, n_areas)
    area_households = np.maximum(
        np.rint(raw / raw.sum() * _TARGET_HOUSEHOLDS).astype(np.int64), _MIN_AREA_HOUSEHOLDS)
    block_sizes = [_split_into_blocks(rng, int(h)) for h in area_households]
    block_area = np.repeat(np.arange(n_areas), [len(b) for b in block_sizes])
    block_households = np.concatenate(block_sizes).astype(np.int64)
    block_first_household = np.concatenate(([0], np.cumsum(block_households)[:-1]))
    household_block = np.repeat(np.arange(len(block_households)), block_households)
    household_area = block_area[household_block]
    n_households = len(household_block)

    # Household size 1..7, tilted towards larger households in some areas.
    tilt = rng.normal(0.0, 0.15, n_areas)
    size_p = _HOUSEHOLD_SIZE_P * np.exp(np.outer(tilt, np.arange(1, 8) - 2.5))
    size_cdf = np.cumsum(size_p / size_p.sum(axis=1, keepdims=True), axis=1)
    u = rng.random(n_households)
    household_size = 1 + (u[:, None] > size_cdf[household_area]).sum(axis=1)
    household_size = np.minimum(household_size, 7).astype(np.int64)

    # Reference person's age depends on household size: singles are young adults or elderly,
    # large households are families with a middle-aged reference person.
    young = rng.uniform(20, 50, n_households)
    elderly_1 = rng.normal(76, 9, n_households)
    elderly_2 = rng.normal(70, 9, n_households)
    family = rng.normal(45, 9, n_households)
    pick = rng.random(n_households)
    ref_age = np.select(
        [household_size == 1, household_size == 2],
        [np.where(pick < 0.40, young, elderly_1), np.where(pick < 0.35, young, elderly_2)],
        family,
    )
    ref_age = np.clip(np.rint(ref_age), 18, _MAX_AGE).astype(np.int64)

    # Persons.
    n_persons = int(household_size.sum())
    household_first_person = np.concatenate(([0], np.cumsum(household_size)[:-1]))
    person_household = np.repeat(np.arange(n_households), household_size)
    position = np.arange(n_persons) - household_first_person[person_household]
    person_ref_age = ref_age[person_household]
    has_partner = rng.random(n_households) < np.where(household_size == 2, 0.75, 0.85)
    is_partner = (position == 1) & has_partner[person_household]
    partner_age = person_ref_age + np.rint(rng.normal(0, 4, n_persons))
    gap = rng.uniform(18, 42, n_persons)  # parent-child age gap
    child_age = person_ref_age - gap
    child_age = np.where(child_age >= 0, child_age,
                         rng.random(n_persons) * np.maximum(person_ref_age - 17, 1))
    # Beyond the couple, most members are children; some are another adult (a grandparent,
    # a lodger) so that large households are not all parents and minors.
    other_adult = (position >= 1) & ~is_partner & (rng.random(n_persons) < 0.15)
    age = np.select([position == 0, is_partner, other_adult],
                    [person_ref_age, partner_age, rng.uniform(18, 92, n_persons)],
                    np.floor(child_age))
    age = np.clip(age, 0, _MAX_AGE).astype(np.int16)
    age = np.where(is_partner, np.maximum(age, 18), age).astype(np.int16)

    ref_male = rng.random(n_households) < np.where((household_size == 1) & (ref_age >= 65),
                                                    0.35, 0.5)
    other_male = rng.random(n_persons) < 0.51
    partner_male = np.where(rng.random(n_persons) < 0.95, ~ref_male[person_household],
                            ref_male[person_household])
    male = np.select([position == 0, is_partner], [ref_male[person_household], partner_male],
                     other_male)
    sex = np.where(male, 1, 2).astype(np.int8)

    # Characteristics: logistic models with area random effects and age effects. Household
    # items also get a block (neighbourhood) effect, which makes the cluster design matter.
    oldest = np.maximum.reduceat(age, household_first_person).astype(np.float64)
    n_blocks = len(block_households)
    block_effect = lambda sd: rng.normal(0.0, sd, n_blocks)[household_block]  # noqa: E731
    a = household_area  # per household
    pa_ = household_area[person_household]  # per person
    items: dict[str, np.ndarray] = {}

    lin = (-2.75 + 0.065 * np.maximum(oldest - 55, 0) - 0.3 * (household_size >= 3)
           + _area_effects(rng, geo, 0.55)[a] + block_effect(0.3))
    no_connection = rng.random(n_households) < _expit(lin)
    lin = -1.3 + 0.02 * (45 - ref_age) + _area_effects(rng, geo, 0.5)[a]
    mobile_only = rng.random(n_households) < _expit(lin)
    internet = np.select([no_connection, mobile_only], [3, 2], 1).astype(np.int8)

    lin = (-0.4 + 0.045 * (ref_age - 30) - 0.4 * (household_size == 1)
           + _area_effects(rng, geo, 0.45)[a] + block_effect(0.3))
    owner = rng.random(n_households) < _expit(lin)
    home_owner = np.where(owner, 1, 2).astype(np.int8)

    lin = (-0.35 - 1.1 * owner + 0.35 * (household_size == 1)
           + _area_effects(rng, geo, 0.4)[a] + block_effect(0.2))
    housing_burden = _yes_no(_expit(lin), rng.random(n_households))

    for name, values in (("internet", internet), ("home_owner", home_owner),
                         ("housing_burden", housing_burden)):
        items[name] = values[person_household]

    adult = age >= 15
    is_male = sex == 1
    age_f = age.astype(np.float64)
    smoke_age = np.select([age < 18, age < 60, age < 75], [-0.8, 0.0, -0.5], -1.2)
    lin = -1.05 + 0.35 * is_male + smoke_age + _area_effects(rng, geo, 0.35)[pa_]
    smoker = _yes_no(_expit(lin), rng.random(n_persons))
    items["smoker"] = np.where(adult, smoker, 0).astype(np.int8)

    work_age = np.select([age < 20, age < 25, age < 55, age < 60], [-2.6, -0.8, 0.0, -0.7], -1.6)
    lin = 0.85 + 0.35 * is_male + work_age + _area_effects(rng, geo, 0.35)[pa_]
    employed = _yes_no(_expit(lin), rng.random(n_persons))
    items["employed"] = np.where((age >= 15) & (age <= 64), employed, 0).astype(np.int8)

    lin = -2.9 + 0.048 * age_f + _area_effects(rng, geo, 0.25)[pa_]
    chronic = _yes_no(_expit(lin), rng.random(n_persons))
    items["chronic"] = chronic

    lin = (-2.95 + 0.7 * (chronic == 1) + 0.3 * (housing_burden[person_household] == 1)
           + _area_effects(rng, geo, 0.4)[pa_])
    unmet = _yes_no(_expit(lin), rng.random(n_persons))
    items["unmet_care"] = np.where(adult, unmet, 0).astype(np.int8)

    lin = (-4.55 + 0.9 * (smoker == 1) + 0.3 * is_male - 0.02 * np.abs(age_f - 35)
           + _area_effects(rng, geo, 0.3)[pa_])
    addiction = _yes_no(_expit(lin), rng.random(n_persons))
    items["addiction_treatment"] = np.where(adult, addiction, 0).astype(np.int8)

    # Response propensity: a district level in 0.80-0.92 with a small area deviation.
    lo, hi = _RESPONSE_RANGE
    district_response = rng.uniform(lo, hi, len(geo.district_codes))
    area_response = np.clip(district_response[geo.area_district]
                            + rng.normal(0.0, 0.015, n_areas), lo, hi)

    return _Population(
        block_area=block_area,
        block_first_household=block_first_household,
        block_households=block_households,
        household_block=household_block,
        household_first_person=household_first_person,
        household_size=household_size,
        person_household=person_household,
        sex=sex,
        age=age,
        items=items,
        area_response=area_response,
    )


# --------------------------------------------------------------------------------------------
# Sample
# --------------------------------------------------------------------------------------------


def _systematic_pps(sizes: np.ndarray, n: int, start: float) -> tuple[np.ndarray, np.ndarray]:
    """Systematic PPS of n units from the list `sizes` (in list order), start in [0, 1).

    Units whose n·M_i/ΣM reaches 1 are taken with certainty first (and the rest re-sized), so
    every other unit is smaller than the interval and can be hit at most once.
    Returns (selected positions in list order, inclusion probability of every unit).
    """
    sizes = sizes.astype(np.float64)
    certain = np.zeros(len(sizes), dtype=bool)
    while True:
        n_rest = n - int(certain.sum())
        total = sizes[~certain].sum()
        if n_rest == 0:
            break
        grown = ~certain & (n_rest * sizes / total >= 1.0)
        if not grown.any():
            break
        certain |= grown
    pi = np.ones(len(sizes))
    rest = np.flatnonzero(~certain)
    chosen = np.flatnonzero(certain)
    if n_rest > 0:
        pi[rest] = n_rest * sizes[rest] / total
        interval = total / n_rest
        points = (start + np.arange(n_rest)) * interval
        hits = np.searchsorted(np.cumsum(sizes[rest]), points, side="right")
        chosen = np.concatenate((chosen, rest[hits]))
    return np.sort(chosen), pi


def _allocate(n: int, households: np.ndarray, blocks: np.ndarray) -> np.ndarray:
    """Blocks per stratum proportional to households, at least the minimum, about n in all.

    n_h = clip(round(λ·M_h), minimum, blocks_h); λ is found by bisection so that the minimum
    does not push the total above n (it would for small samples with λ = n / ΣM).
    """
    def alloc(lam: float) -> np.ndarray:
        return np.clip(np.rint(lam * households), _MIN_BLOCKS_PER_STRATUM, blocks).astype(np.int64)

    low, high = 0.0, 2.0 * n / households.sum()
    for _ in range(60):
        mid = 0.5 * (low + high)
        low, high = (mid, high) if alloc(mid).sum() <= n else (low, mid)
    return alloc(low)


def _plan_sample(pop: _Population, persons: int) -> tuple[int, int]:
    """(blocks, households per block) expected to give `persons` responding persons."""
    sizes = pop.block_households
    persons_per_household = pop.household_size.mean()
    response = pop.area_response[pop.household_area].mean()
    target_households = persons / (persons_per_household * response)
    largest = int(sizes.max())
    for take in range(_HOUSEHOLDS_PER_BLOCK, largest + 1):
        # Under PPS a block is picked in proportion to M_i, so the expected take per block
        # is Σ M_i·min(take, M_i) / Σ M_i.
        per_block = float((sizes * np.minimum(take, sizes)).sum() / sizes.sum())
        blocks = math.ceil(target_households / per_block)
        if blocks <= _MAX_BLOCK_FRACTION * len(sizes):
            return blocks, take
    most = int(_MAX_BLOCK_FRACTION * len(sizes) * (sizes**2).sum() / sizes.sum()
               * persons_per_household * response)
    raise ValueError(f"persons ({persons}) must be at most about {most} for this population")


def _nonresponse_adjust(weights: np.ndarray, weighting_class: np.ndarray,
                        responded: np.ndarray, n_classes: int) -> np.ndarray:
    """Respondents' weights × Σ(all sampled) / Σ(respondents) within their class; 0 otherwise.

    Works column by column on a 2-D array (one column per replicate), so each replicate is
    adjusted with its own weights.
    """
    w = weights.reshape(len(weights), -1)
    total = np.zeros((n_classes, w.shape[1]))
    responding = np.zeros((n_classes, w.shape[1]))
    np.add.at(total, weighting_class, w)
    np.add.at(responding, weighting_class[responded], w[responded])
    if np.any((total > 0) & (responding <= 0)):
        raise RuntimeError("a weighting class has sampled households but no respondent")
    factor = np.divide(total, responding, out=np.zeros_like(total), where=responding > 0)
    out = np.where(responded[:, None], w * factor[weighting_class], 0.0)
    return out.reshape(weights.shape)


@dataclass(frozen=True)
class _Sample:
    household: np.ndarray  # population index of each selected household (stratum, block order)
    block: np.ndarray  # its block
    responded: np.ndarray
    weight: np.ndarray  # final weight, 0 for non-respondents
    replicate_weights: np.ndarray  # (households, R), 0 for non-respondents
    n_blocks: int


def _draw_sample(rng: np.random.Generator, pop: _Population, geo: _Geography,
                 persons: int) -> _Sample:
    n_blocks, take = _plan_sample(pop, persons)
    block_district = geo.area_district[pop.block_area]
    n_districts = len(geo.district_codes)
    district_households = np.bincount(block_district, weights=pop.block_households,
                                      minlength=n_districts)
    district_blocks = np.bincount(block_district, minlength=n_districts)
    allocation = _allocate(n_blocks, district_households, district_blocks)

    # First stage, district by district (blocks are stored in district order).
    starts = rng.random(n_districts)
    first = np.concatenate(([0], np.cumsum(district_blocks)[:-1]))
    selected, pi_block = [], np.zeros(len(pop.block_households))
    for h in range(n_districts):
        span = slice(first[h], first[h] + district_blocks[h])
        chosen, pi = _systematic_pps(pop.block_households[span], int(allocation[h]), starts[h])
        selected.append(first[h] + chosen)
        pi_block[span] = pi
    blocks = np.concatenate(selected)  # stratum, then systematic (list) order

    # Second stage: SRS of min(take, M_i) households in each selected block.
    size = pop.block_households[blocks]
    takes = np.minimum(take, size)
    offsets = np.concatenate(([0], np.cumsum(size)[:-1]))
    owner = np.repeat(np.arange(len(blocks)), size)
    candidate = pop.block_first_household[blocks][owner] + np.arange(size.sum()) - offsets[owner]
    order = np.lexsort((rng.random(len(candidate)), owner))
    rank = np.arange(len(candidate)) - offsets[owner[order]]
    keep = order[rank < takes[owner[order]]]
    keep.sort()  # back to block order, households in list order within block
    household = candidate[keep]
    cluster = owner[keep]  # position of the household's block in `blocks`
    design_weight = 1.0 / (pi_block[blocks][cluster] * takes[cluster] / size[cluster])

    responded = rng.random(len(household)) < pop.area_response[pop.household_area[household]]
    weighting_class = block_district[blocks][cluster]
    weight = _nonresponse_adjust(design_weight, weighting_class, responded, n_districts)
    factors = successive_difference_factors(len(blocks), replicates=REPLICATES)
    replicate_design = design_weight[:, None] * factors[cluster]
    replicate_weights = _nonresponse_adjust(replicate_design, weighting_class, responded,
                                            n_districts)
    return _Sample(household=household, block=blocks[cluster], responded=responded,
                   weight=weight, replicate_weights=replicate_weights, n_blocks=len(blocks))


def _microdata(rng: np.random.Generator, pop: _Population, geo: _Geography,
               sample: _Sample) -> pd.DataFrame:
    households = sample.household[sample.responded]
    hh_weight = sample.weight[sample.responded]
    hh_replicates = sample.replicate_weights[sample.responded]
    hh_size = pop.household_size[households]
    row_household = np.repeat(np.arange(len(households)), hh_size)
    offsets = np.concatenate(([0], np.cumsum(hh_size)[:-1]))
    person = (pop.household_first_person[households][row_household]
              + np.arange(hh_size.sum()) - offsets[row_household])
    area = pop.household_area[households][row_household]
    age = pop.age[person]

    items = {name: values[person].copy() for name, values in pop.items.items()}
    # Item non-response: an exact share of those the item applies to (0 marks not applicable).
    for name, share in ITEM_NONRESPONSE.items():
        values = items[name]
        if name in _HOUSEHOLD_ITEMS:
            eligible = np.unique(row_household[values != 0])
            lost = rng.choice(eligible, size=round(share * len(eligible)), replace=False)
            values[np.isin(row_household, lost)] = 0
        else:
            eligible = np.flatnonzero(values != 0)
            values[rng.choice(eligible, size=round(share * len(eligible)), replace=False)] = 0

    codes_area = np.array(geo.area_codes, dtype=object)
    codes_district = np.array(geo.district_codes, dtype=object)
    columns: dict[str, object] = {
        "person_id": person.astype(np.int64) + 1,
        "household_id": households[row_household].astype(np.int64) + 1,
        "area": pd.array(codes_area[area], dtype="str"),
        "stratum": pd.array(codes_district[geo.area_district[area]], dtype="str"),
        "psu": sample.block[sample.responded][row_household].astype(np.int64) + 1,
        # N_h, the blocks of the record's district in the population frame, so that the
        # first-stage finite population correction (1 − n_h/N_h) can be applied. Draws nothing.
        "psu_count": np.bincount(geo.area_district[pop.block_area],
                                 minlength=len(geo.district_codes))[geo.area_district[area]].astype(np.int64),
        "wt": hh_weight[row_household].astype(np.float64),
        "sex": pop.sex[person].astype(np.int8),
        "age": age.astype(np.int16),
    }
    for name in ("internet", "smoker", "employed", "home_owner", "housing_burden", "chronic",
                 "unmet_care", "addiction_treatment"):
        values = items[name]
        columns[name] = pd.arrays.IntegerArray(values, values == 0)
    frame = pd.DataFrame(columns)
    replicates = pd.DataFrame(hh_replicates[row_household],
                              columns=[f"rw{r + 1}" for r in range(REPLICATES)])
    return pd.concat([frame, replicates], axis=1)


# --------------------------------------------------------------------------------------------
# Lookup and truth
# --------------------------------------------------------------------------------------------


def _areas_frame(pop: _Population, geo: _Geography) -> pd.DataFrame:
    n_areas = len(geo.area_codes)
    households = np.bincount(pop.household_area, minlength=n_areas).astype(np.int64)
    persons = np.bincount(pop.household_area, weights=pop.household_size,
                          minlength=n_areas).astype(np.int64)
    district, region = geo.area_district, geo.area_region
    text = lambda values: pd.array(list(values), dtype="str")  # noqa: E731
    return pd.DataFrame({
        "nation_code": text([NATION_CODE] * n_areas),
        "nation_name": text([NATION_NAME] * n_areas),
        "region_code": text(geo.region_codes[i] for i in region),
        "region_name": text(geo.region_names[i] for i in region),
        "district_code": text(geo.district_codes[i] for i in district),
        "district_name": text(geo.district_names[i] for i in district),
        "area_code": text(geo.area_codes),
        "area_name": text(geo.area_names),
        "population": persons,
        "households": households,
    })


def _truth_frame(pop: _Population, geo: _Geography) -> pd.DataFrame:
    """Exact population proportions for every published cell.

    Counts are taken once on the finest cells (area × sex × age group) and summed upwards, the
    same additivity the pipeline relies on.
    """
    n_sex, n_age = len(SEX_LABELS), len(AGE_LABELS)
    n_areas = len(geo.area_codes)
    age_group = np.searchsorted(AGE_BREAKS, pop.age, side="right") - 1
    cell = (pop.person_area * n_sex + (pop.sex - 1)) * n_age + age_group
    n_cells = n_areas * n_sex * n_age
    units = {  # level -> (unit index of each area, unit codes)
        "nation": (np.zeros(n_areas, dtype=np.int64), [NATION_CODE]),
        "region": (geo.area_region, geo.region_codes),
        "district": (geo.area_district, geo.district_codes),
        "area": (np.arange(n_areas), geo.area_codes),
    }
    sex_labels = list(SEX_LABELS.values())
    down_to = GEO_LEVELS.index(SEX_AGE_DOWN_TO)
    blocks = []
    for indicator in INDICATORS:
        in_universe = pop.age >= indicator.min_age
        if indicator.max_age is not None:
            in_universe &= pop.age <= indicator.max_age
        has = in_universe & (pop.items[indicator.column] == indicator.code)
        fine_base = np.bincount(cell[in_universe], minlength=n_cells).reshape(n_areas, n_sex, n_age)
        fine_count = np.bincount(cell[has], minlength=n_cells).reshape(n_areas, n_sex, n_age)
        for level_rank, level in enumerate(GEO_LEVELS):
            unit_of_area, codes = units[level]
            base = np.zeros((len(codes), n_sex, n_age), dtype=np.int64)
            count = np.zeros_like(base)
            np.add.at(base, unit_of_area, fine_base)
            np.add.at(count, unit_of_area, fine_count)
            # (sex label, age label, base, count) per table; arrays are (units, categories)
            tables = [(["all"], ["all"], base.sum(axis=(1, 2))[:, None],
                       count.sum(axis=(1, 2))[:, None]),
                      (sex_labels, ["all"], base.sum(axis=2), count.sum(axis=2)),
                      (["all"], list(AGE_LABELS), base.sum(axis=1), count.sum(axis=1))]
            if level_rank <= down_to:
                tables.append((sex_labels, list(AGE_LABELS), base.reshape(len(codes), -1),
                               count.reshape(len(codes), -1)))
            for sexes, ages, b, c in tables:
                labels = [(s, g) for s in sexes for g in ages]
                blocks.append(pd.DataFrame({
                    "indicator": indicator.name,
                    "geo_level": level,
                    "geo_code": np.repeat(codes, len(labels)),
                    "sex": [s for _ in codes for s, _g in labels],
                    "age_group": [g for _ in codes for _s, g in labels],
                    "population_base": b.reshape(-1),
                    "population_count": c.reshape(-1),
                }))
    truth = pd.concat(blocks, ignore_index=True)
    truth = truth.astype({"indicator": "str", "geo_level": "str", "geo_code": "str",
                          "sex": "str", "age_group": "str",
                          "population_base": "int64", "population_count": "int64"})
    base = truth["population_base"].to_numpy(dtype=np.float64)
    truth["true_proportion"] = np.divide(truth["population_count"].to_numpy(dtype=np.float64),
                                         base, out=np.full(len(base), np.nan), where=base > 0)
    return truth


# --------------------------------------------------------------------------------------------
# Public functions
# --------------------------------------------------------------------------------------------


def _check_count(value, name: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise TypeError(f"{name} ({value!r}) must be an integer")
    return int(value)


def _check_seed(seed) -> int:
    seed = _check_count(seed, "seed")
    if seed < 0:
        raise ValueError(f"seed ({seed}) must be a non-negative integer")
    return seed


def _check_persons(persons) -> int:
    persons = _check_count(persons, "persons")
    if persons < _MIN_PERSONS:
        raise ValueError(f"persons ({persons}) must be at least {_MIN_PERSONS}: every one of the "
                         f"30 districts takes at least {_MIN_BLOCKS_PER_STRATUM} blocks")
    return persons


def _streams(seed: int) -> tuple[np.random.Generator, np.random.Generator, np.random.Generator]:
    """(population, sample, item non-response) generators of a seed. Independent streams, so the
    population does not depend on the sample size, and the population of one seed can be sampled
    with the sample streams of any other seed."""
    population_rng, sample_rng, item_rng = (
        np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(3))
    return population_rng, sample_rng, item_rng


@dataclass(frozen=True)
class DemoPopulation:
    """The fictional population of one seed, built once and sampled as often as wanted.

    areas and truth are the frames `generate_demo` returns for this seed (they do not depend on
    the sample). The geography and population arrays are private to this module.
    """

    seed: int
    areas: pd.DataFrame
    truth: pd.DataFrame
    _geography: _Geography
    _population: _Population


def build_population(seed: int = 20261202) -> DemoPopulation:
    """Build the population of `seed` (any non-negative integer) with its lookup and truth."""
    seed = _check_seed(seed)
    population_rng, _, _ = _streams(seed)
    geo = _build_geography()
    pop = _build_population(population_rng, geo)
    return DemoPopulation(seed=seed, areas=_areas_frame(pop, geo), truth=_truth_frame(pop, geo),
                          _geography=geo, _population=pop)


def _draw(population: DemoPopulation, seed: int, persons: int) -> tuple[pd.DataFrame, _Sample]:
    _, sample_rng, item_rng = _streams(seed)
    geo, pop = population._geography, population._population
    sample = _draw_sample(sample_rng, pop, geo, persons)
    return _microdata(item_rng, pop, geo, sample), sample


def draw_survey(population: DemoPopulation, *, seed: int, persons: int = 40_000) -> pd.DataFrame:
    """Draw one sample of the demo design from `population` and return its microdata (the
    columns `write_demo` describes).

    seed: any non-negative integer choosing the sample; the population's own seed gives exactly
    the microdata of `generate_demo` for that seed, every other seed an independent sample.
    persons: about how many responding persons (at least 1000).
    """
    if not isinstance(population, DemoPopulation):
        raise TypeError(f"population ({type(population).__name__}) must be a DemoPopulation "
                        "from build_population")
    microdata, _ = _draw(population, _check_seed(seed), _check_persons(persons))
    return microdata


def generate_demo(*, persons: int = 40_000, seed: int = 20261202) -> DemoData:
    """Build the fictional population, draw the survey from it and return the frames (no files).

    persons: about how many responding persons the sample should have (at least 1000; the upper
    limit, several hundred thousand, is set by the population). seed: any non-negative integer;
    the same seed always gives identical frames.
    """
    # Arguments are checked before the population is built, so a bad call fails at once.
    persons = _check_persons(persons)
    seed = _check_seed(seed)
    population = build_population(seed)
    microdata, sample = _draw(population, seed, persons)
    return DemoData(
        microdata=microdata,
        areas=population.areas,
        truth=population.truth,
        selected_clusters=sample.n_blocks,
        selected_households=len(sample.household),
    )


def _write_atomically(path: Path, write) -> None:
    """Write through a temporary file in the same folder so a failure leaves no half file."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")  # created with the usual umask
    try:
        write(tmp)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def _write_parquet(frame: pd.DataFrame, path: Path) -> None:
    table = pa.Table.from_pandas(frame, preserve_index=False)
    _write_atomically(path, lambda tmp: pq.write_table(table, tmp, compression="zstd"))


def _write_csv(frame: pd.DataFrame, path: Path) -> None:
    _write_atomically(path, lambda tmp: frame.to_csv(tmp, index=False, na_rep="",
                                                     lineterminator="\n", encoding="utf-8"))


def write_demo(out_dir, *, persons: int = 40_000, seed: int = 20261202,
               formats: tuple[str, ...] = ("parquet",)) -> DemoSummary:
    """Generate the demo survey and write it to `out_dir` (created if missing).

    Files: demo_persons.parquet and/or demo_persons.csv (as `formats` asks; nulls are empty CSV
    fields), demo_areas.csv (the geography lookup) and demo_truth.parquet (true proportions).
    Microdata columns: person_id, household_id, area, stratum, psu, psu_count (N_h, blocks of the
    district in the population frame), wt, sex, age, internet, smoker, employed, home_owner, housing_burden, chronic, unmet_care, addiction_treatment
    (nullable Int8), rw1..rw80. The same seed writes byte-identical files.
    """
    if isinstance(formats, str):
        formats = (formats,)
    formats = tuple(formats)
    unknown = [f for f in formats if f not in _FORMATS]
    if unknown or not formats:
        raise ValueError(f"formats ({formats!r}) must be a non-empty selection of {_FORMATS}")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    demo = generate_demo(persons=persons, seed=seed)

    paths = {key: out / name for key, name in DEMO_FILES.items()}
    if "parquet" in formats:
        _write_parquet(demo.microdata, paths["persons_parquet"])
    if "csv" in formats:
        _write_csv(demo.microdata, paths["persons_csv"])
    _write_csv(demo.areas, paths["areas_csv"])
    _write_parquet(demo.truth, paths["truth_parquet"])

    micro, areas = demo.microdata, demo.areas
    return DemoSummary(
        out_dir=out,
        persons_parquet=paths["persons_parquet"] if "parquet" in formats else None,
        persons_csv=paths["persons_csv"] if "csv" in formats else None,
        areas_csv=paths["areas_csv"],
        truth_parquet=paths["truth_parquet"],
        population_persons=int(areas["population"].sum()),
        population_households=int(areas["households"].sum()),
        sampled_persons=len(micro),
        households=int(micro["household_id"].nunique()),
        clusters=demo.selected_clusters,
        areas=len(areas),
        areas_in_sample=int(micro["area"].nunique()),
    )
