"""YAML -> frozen, validated config objects.

Every problem in a config file is reported at once, each naming its key path, the bad value,
what is allowed and, where there is one, a close match ("did you mean 'wilson'?"). Paths in the
file are resolved against the folder that holds it, so a scheduled run works from anywhere.
"""

from __future__ import annotations

import copy
import difflib
import hashlib
import re
import types
import typing
from pathlib import Path
from typing import Annotated, Any, Literal

import yaml
from pydantic import AfterValidator, BaseModel, ConfigDict, Field, ValidationError
from pydantic_core import PydanticCustomError

from pipeline.errors import ConfigError, ExpressionError
from pipeline.expressions import CompiledExpression, compile_expression
from pipeline.methods.intervals import IntervalMethod
from pipeline.methods.variance import ReplicateMethod, SingleClusterStrata

NAME_PATTERN = r"^[a-z][a-z0-9_]*$"
AVAILABLE_INTERVALS = [m.value for m in IntervalMethod]
RELEASE_NAME_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9._-]*$"


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class ReleaseConfig(_Model):
    name: str = Field(pattern=RELEASE_NAME_PATTERN)
    title: str
    publisher: str
    description: str = ""


class VariableConfig(_Model):
    type: Literal["integer", "number", "string"]
    min: float | None = None
    max: float | None = None
    values: list[int | float | str] | None = None
    missing: Literal["allowed", "forbidden"] = "forbidden"
    label: str = ""


class SourceConfig(_Model):
    path: str
    record_id: str
    variables: dict[str, VariableConfig]
    invalid_rows: Literal["reject", "fail"] = "reject"
    max_rejected_share: float = Field(default=0.001, ge=0, le=1)
    batch_rows: int = Field(default=65_536, ge=1)


class GeoLevelConfig(_Model):
    level: str = Field(pattern=NAME_PATTERN)
    code: str
    name: str


class GeographyConfig(_Model):
    lookup: str
    key: str
    levels: list[GeoLevelConfig] = Field(min_length=1)
    population: str | None = None


class ReplicatesConfig(_Model):
    prefix: str
    count: int = Field(ge=2)
    method: Annotated[str, AfterValidator(_one_of([m.value for m in ReplicateMethod]))]
    fay_rho: float | None = None
    factor: float | None = None
    multipliers: list[float] | None = None


class LinearizationConfig(_Model):
    """Microdata columns of the sampling design for Taylor linearization (DESIGN §4)."""

    strata: str | None = None                # none: the whole sample is one stratum
    clusters: str                            # first-stage sampling units, numbered within strata or not
    population_clusters: str | None = None   # N_h per record's stratum: first-stage fpc (1 − n_h/N_h)
    single_cluster_strata: Annotated[str, AfterValidator(_one_of([m.value for m in SingleClusterStrata]))] = "error"


class DesignConfig(_Model):
    degrees_of_freedom: int | None = Field(default=None, ge=1)
    weight: str
    variance: Literal["simple_random", "kish", "replicate", "linearization"]
    replicates: ReplicatesConfig | None = None
    linearization: LinearizationConfig | None = None


class DomainConfig(_Model):
    column: str
    categories: dict[int | str, str] | None = None
    breaks: list[float] | None = None
    labels: list[str] | None = None


class TableConfig(_Model):
    by: list[str] = Field(default_factory=list)
    down_to: str | None = None


class IndicatorConfig(_Model):
    label: str
    universe: str = "true"
    condition: str
    description: str = ""


def _one_of(allowed: list[str]):
    """A pydantic field validator: the value must be one of `allowed`, with a close match named."""

    def check(value: str) -> str:
        if value not in allowed:
            raise PydanticCustomError("choice", "{text}", {"text": not_allowed(value, allowed)})
        return value

    return check


class EstimationConfig(_Model):
    interval: Annotated[str, AfterValidator(_one_of(AVAILABLE_INTERVALS))] = "wilson"
    confidence: float = Field(default=0.95, gt=0, lt=1)
    margin_confidence: float = Field(default=0.90, gt=0, lt=1)


class ReliabilityConfig(_Model):
    min_sample: int = Field(default=30, ge=0)
    min_expected: float = Field(default=10, ge=0)
    expected_basis: Literal["effective", "sample"] = "effective"
    on_normal_approx_failure: Literal["suppress", "caution"] = "suppress"
    cv_caution: float = Field(default=0.30, gt=0)
    cv_suppress: float = Field(default=0.50, gt=0)
    standard: Literal["custom", "nchs_2017"] = "custom"


class ProtectionConfig(_Model):
    """How wide the range a reader can work out for a withheld confidential cell must be: upper −
    lower >= relative × the cell's value, and >= `respondents` persons' worth (the cell's mean
    weight times respondents for weighted counts; None: min_respondents). See DESIGN §4."""

    relative: float = Field(default=0.5, ge=0)
    respondents: int | None = Field(default=None, ge=0)


class DisclosureConfig(_Model):
    min_respondents: int = Field(default=5, ge=0)
    complementary: bool = True              # complementary suppression + audit (pipeline.methods.suppression)
    round_counts_to: int = Field(default=10, ge=0)
    protection: ProtectionConfig = Field(default_factory=ProtectionConfig)
    unanimous_below: int = Field(default=10, ge=0)  # x = 0 or x = n with n below this is primary; 0 = off
    cost: Literal["cells", "weighted_base"] = "cells"
    time_limit_seconds: float = Field(default=60, gt=0)
    decimals: int | None = Field(default=4, ge=0, le=12)   # estimates and intervals in the public files
    # indicators over the same persons print one sample size and base per cell: 'together' protects
    # them as one table (one pattern); 'apart' one by one, their sample sizes then printed for each other
    same_persons: Literal["together", "apart"] = "together"


class OutputConfig(_Model):
    dir: str
    formats: list[Literal["parquet", "csv"]] = Field(default_factory=lambda: ["parquet", "csv"], min_length=1)


class RatebookConfig(_Model):
    release: ReleaseConfig
    source: SourceConfig
    geography: GeographyConfig
    design: DesignConfig
    domains: dict[str, DomainConfig] = Field(default_factory=dict)
    tables: list[TableConfig] = Field(default_factory=lambda: [TableConfig()], min_length=1)
    indicators: dict[str, IndicatorConfig] = Field(min_length=1)
    estimation: EstimationConfig = Field(default_factory=EstimationConfig)
    reliability: ReliabilityConfig = Field(default_factory=ReliabilityConfig)
    disclosure: DisclosureConfig = Field(default_factory=DisclosureConfig)
    output: OutputConfig


class Config:
    """A loaded config: the validated settings plus what was derived from them.

    `settings` is the frozen pydantic tree exactly as written; paths are resolved to absolute
    paths here, expressions are compiled once here.
    """

    def __init__(self, settings: RatebookConfig, *, path: Path, sha256: str,
                 universes: dict[str, CompiledExpression], conditions: dict[str, CompiledExpression]):
        self.settings = settings
        self.path = path
        self.sha256 = sha256
        self.universes = universes
        self.conditions = conditions
        base = path.parent
        self.source_path = _resolve(base, settings.source.path)
        self.lookup_path = _resolve(base, settings.geography.lookup)
        self.output_dir = _resolve(base, settings.output.dir)

    def __getattr__(self, name: str) -> Any:
        # config.source, config.design ... read straight from the settings tree
        return getattr(self.settings, name)

    @property
    def replicate_columns(self) -> list[str]:
        reps = self.settings.design.replicates
        if self.settings.design.variance != "replicate" or reps is None:
            return []
        return [f"{reps.prefix}{r}" for r in range(1, reps.count + 1)]

    @property
    def level_names(self) -> list[str]:
        return [lv.level for lv in self.settings.geography.levels]


def _resolve(base: Path, text: str) -> Path:
    p = Path(text).expanduser()
    return p if p.is_absolute() else (base / p).resolve()


# --------------------------------------------------------------------------------------------
# Loading


class _UniqueKeyLoader(yaml.SafeLoader):
    """SafeLoader that refuses a key written twice in one mapping (YAML would keep the last)."""


def _construct_mapping(loader: yaml.SafeLoader, node: yaml.MappingNode, deep: bool = False):
    seen: dict[Any, int] = {}
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=deep)
        if key in seen:
            raise ConfigError(
                f"config: key {key!r} is written twice in one mapping "
                f"(lines {seen[key] + 1} and {key_node.start_mark.line + 1}); each key may appear once"
            )
        seen[key] = key_node.start_mark.line
    return loader.construct_mapping(node, deep=deep)


_UniqueKeyLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


def load_config(path: str | Path) -> Config:
    """Read, validate and compile a config file. Raises ConfigError listing every problem."""
    path = Path(path).expanduser().resolve()
    try:
        raw_bytes = path.read_bytes()
    except OSError as exc:
        raise ConfigError(f"config: cannot read {path}: {exc.strerror or exc}") from None
    try:
        raw = yaml.load(raw_bytes.decode("utf-8"), Loader=_UniqueKeyLoader)  # noqa: S506 - safe loader subclass
    except yaml.YAMLError as exc:
        raise ConfigError(f"config: {path.name} is not valid YAML: {exc}") from None
    except UnicodeDecodeError as exc:
        raise ConfigError(f"config: {path.name} is not UTF-8 text: {exc}") from None
    if not isinstance(raw, dict):
        raise ConfigError(f"config: {path.name} must hold a mapping of sections, got {type(raw).__name__}")
    problems: list[str] = []
    try:
        settings = RatebookConfig.model_validate(raw)
    except ValidationError as exc:
        problems += [_describe_pydantic_error(e) for e in exc.errors()]
        settings = _salvage(raw, exc.errors())
    if settings is not None:
        universes, conditions = _compile_indicators(settings, problems)
        problems += _check_references(settings)
    if problems:
        raise ConfigError(f"config: {path.name} has {len(problems)} problem(s)", problems)
    return Config(settings, path=path, sha256=hashlib.sha256(raw_bytes).hexdigest(),
                  universes=universes, conditions=conditions)


def _salvage(raw: dict, errors: list[dict]) -> RatebookConfig | None:
    """The config with every key that failed removed (so defaults apply), or None when a required
    key is at fault. It lets the cross-reference checks run too, so that every problem of a file
    is reported in one go instead of one layer at a time."""
    data = copy.deepcopy(raw)
    for _ in range(3):
        for err in sorted(errors, key=lambda e: [str(p) for p in e["loc"]], reverse=True):
            _delete_at(data, tuple(err["loc"]))
        try:
            return RatebookConfig.model_validate(data)
        except ValidationError as exc:
            errors = exc.errors()
    return None


def _delete_at(data: Any, loc: tuple) -> None:
    for part in loc[:-1]:
        try:
            data = data[part]
        except (KeyError, IndexError, TypeError):
            return
    try:
        del data[loc[-1]]
    except (KeyError, IndexError, TypeError):
        pass


# --------------------------------------------------------------------------------------------
# Error wording


def not_allowed(value: Any, allowed: list) -> str:
    """"'x' is not allowed; allowed: a, b (did you mean 'a'?)" — one wording for every choice."""
    return f"{value!r} is not allowed; allowed: {', '.join(map(str, allowed))}{did_you_mean(value, allowed)}"


def did_you_mean(value: Any, allowed: typing.Iterable[Any]) -> str:
    """' (did you mean 'x'?)' when a close match exists, else ''."""
    match = difflib.get_close_matches(str(value), [str(a) for a in allowed], n=1, cutoff=0.6)
    return f" (did you mean {match[0]!r}?)" if match else ""


def _key_path(loc: tuple) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out


def _model_at(loc: tuple) -> type[BaseModel] | None:
    """The pydantic model that owns the mapping at `loc`, for listing its allowed keys."""
    current: Any = RatebookConfig
    for part in loc:
        current = _unwrap(current)
        if isinstance(current, type) and issubclass(current, BaseModel):
            field = current.model_fields.get(str(part))
            if field is None:
                return None
            current = field.annotation
        elif typing.get_origin(current) in (list, dict):
            current = typing.get_args(current)[-1]
        else:
            return None
    current = _unwrap(current)
    return current if isinstance(current, type) and issubclass(current, BaseModel) else None


def _unwrap(annotation: Any) -> Any:
    """Optional[X] -> X; leaves list/dict alone."""
    args = [a for a in typing.get_args(annotation) if a is not type(None)]
    if typing.get_origin(annotation) in (typing.Union, types.UnionType) and len(args) == 1:
        return args[0]
    return annotation


def _describe_pydantic_error(err: dict) -> str:
    loc = tuple(err["loc"])
    kind = err["type"]
    value = err.get("input")
    if kind == "extra_forbidden":
        owner = _model_at(loc[:-1])
        allowed = sorted(owner.model_fields) if owner else []
        return (f"{_key_path(loc)}: unknown key {loc[-1]!r}; allowed keys: {', '.join(allowed)}"
                f"{did_you_mean(loc[-1], allowed)}")
    if kind == "missing":
        return f"{_key_path(loc)}: required key is missing"
    if kind == "choice":
        return f"{_key_path(loc)}: {err['msg']}"
    if kind == "literal_error":
        allowed = re.findall(r"'([^']*)'", err.get("ctx", {}).get("expected", ""))
        return f"{_key_path(loc)}: {not_allowed(value, allowed)}"
    shown = value if not isinstance(value, (dict, list)) else type(value).__name__
    return f"{_key_path(loc)}: {shown!r} is not valid: {err['msg']}"


def _choice(path: str, value: str, allowed: typing.Iterable[str]) -> list[str]:
    allowed = list(allowed)
    if value in allowed:
        return []
    return [f"{path}: {not_allowed(value, allowed)}"]


# --------------------------------------------------------------------------------------------
# Cross-references: what pydantic cannot see from one key alone


def _compile_indicators(s: RatebookConfig, problems: list[str]):
    universes: dict[str, CompiledExpression] = {}
    conditions: dict[str, CompiledExpression] = {}
    declared = set(s.source.variables)
    for name, ind in s.indicators.items():
        for kind, text, store in (("universe", ind.universe, universes), ("condition", ind.condition, conditions)):
            try:
                store[name] = compile_expression(text, columns=declared, key_path=f"indicators.{name}.{kind}")
            except ExpressionError as exc:
                problems += exc.problems or [exc.message]
    return universes, conditions


def _check_linearization(s: RatebookConfig) -> list[str]:
    """design.linearization when design.variance is 'linearization': present, and each design
    column in one role only (a column shared with the weight, the id, the geography key, another
    design role or an analysis variable is almost always a typo)."""
    lin = s.design.linearization
    if lin is None:
        return ["design.linearization: required when design.variance is 'linearization' "
                "(clusters; optional strata, population_clusters, single_cluster_strata)"]
    problems: list[str] = []
    taken = {s.source.record_id: "source.record_id", s.design.weight: "design.weight",
             s.geography.key: "geography.key"}
    for key in ("strata", "clusters", "population_clusters"):
        column = getattr(lin, key)
        if column is None:
            continue
        path = f"design.linearization.{key}"
        if key == "strata" and column == s.geography.key:
            continue  # strata that are the finest geographic units: a common, sensible design
        if column in taken:
            problems.append(f"{path}: column {column!r} is already used as {taken[column]}; a column may have one role")
        elif column in s.source.variables:
            problems.append(f"{path}: column {column!r} is also declared in source.variables; "
                            "declare only analysis columns there")
        taken[column] = path
    return problems


def _check_references(s: RatebookConfig) -> list[str]:
    problems: list[str] = []
    variables = s.source.variables
    declared = list(variables)
    levels = [lv.level for lv in s.geography.levels]

    for name in s.indicators:
        if not re.match(NAME_PATTERN, name):
            problems.append(f"indicators.{name}: indicator names must be snake_case (pattern {NAME_PATTERN})")

    for name, var in variables.items():
        path = f"source.variables.{name}"
        if var.min is not None and var.max is not None and var.min > var.max:
            problems.append(f"{path}: min ({var.min:g}) must not exceed max ({var.max:g})")
        if var.type == "string" and (var.min is not None or var.max is not None):
            problems.append(f"{path}: min/max apply to numbers only; type is string")
        for v in var.values or []:
            if (var.type == "string") != isinstance(v, str) or (var.type == "integer" and v != int(v)):
                problems.append(f"{path}.values: {v!r} does not match type {var.type!r}")

    # Each role names its own column: a column in two roles is almost always a typo.
    roles = {"source.record_id": s.source.record_id, "design.weight": s.design.weight,
             "geography.key": s.geography.key}
    seen: dict[str, str] = {}
    for role, column in roles.items():
        if column in seen:
            problems.append(f"{role}: column {column!r} is already used as {seen[column]}; a column may have one role")
        elif column in variables:
            problems.append(f"{role}: column {column!r} is also declared in source.variables; "
                            "declare only analysis columns there")
        seen[column] = role

    if len(set(levels)) != len(levels):
        problems.append(f"geography.levels: level names must be unique, got {levels}")

    design = s.design
    if design.variance == "replicate":
        reps = design.replicates
        if reps is None:
            problems.append("design.replicates: required when design.variance is 'replicate' "
                            "(prefix, count, method)")
        else:
            if reps.method == "fay" and (reps.fay_rho is None or not 0 <= reps.fay_rho < 1):
                problems.append(f"design.replicates.fay_rho: {reps.fay_rho!r} must be in [0, 1) for method 'fay'")
            if reps.fay_rho is not None and reps.method != "fay":
                problems.append(f"design.replicates.fay_rho: only used with method 'fay', not {reps.method!r}")
            if reps.factor is not None and reps.method != "custom":
                problems.append(f"design.replicates.factor: only used with method 'custom', not {reps.method!r}")
            if reps.method == "custom" and (reps.factor is None or reps.factor <= 0):
                problems.append(f"design.replicates.factor: {reps.factor!r} must be > 0 for method 'custom'")
            if reps.method == "jackknife_stratified" and reps.multipliers is None:
                problems.append("design.replicates.multipliers: required for method 'jackknife_stratified' "
                                "((n_h − 1)/n_h for each replicate, n_h the clusters of its stratum)")
            if reps.multipliers is not None and len(reps.multipliers) != reps.count:
                problems.append(f"design.replicates.multipliers: {len(reps.multipliers)} given; "
                                f"one per replicate ({reps.count}) is needed")
            if reps.prefix in variables:
                problems.append(f"design.replicates.prefix: {reps.prefix!r} is a declared variable")
    elif design.replicates is not None:
        problems.append(f"design.replicates: given but design.variance is {design.variance!r}; "
                        "set variance: replicate or remove the section")
    if design.variance == "linearization":
        problems += _check_linearization(s)
    elif design.linearization is not None:
        problems.append(f"design.linearization: given but design.variance is {design.variance!r}; "
                        "set variance: linearization or remove the section")

    for name, dom in s.domains.items():
        path = f"domains.{name}"
        if not re.match(NAME_PATTERN, name):
            problems.append(f"{path}: domain names must be snake_case (pattern {NAME_PATTERN})")
        if dom.column not in variables:
            problems.append(f"{path}.column: {dom.column!r} is not declared in source.variables"
                            f"{did_you_mean(dom.column, declared)}")
            continue
        var = variables[dom.column]
        if var.missing == "allowed":
            problems.append(f"{path}.column: {dom.column!r} allows missing values; a domain needs a value "
                            "for every record (set source.variables."
                            f"{dom.column}.missing: forbidden)")
        if (dom.categories is None) == (dom.breaks is None):
            problems.append(f"{path}: give exactly one of 'categories' or 'breaks'")
            continue
        if dom.categories is not None:
            labels = list(dom.categories.values())
            if var.values is None:
                problems.append(f"{path}: categories need source.variables.{dom.column}.values "
                                "so that every record falls in a category")
            else:
                uncovered = [v for v in var.values if v not in dom.categories]
                extra = [k for k in dom.categories if k not in var.values]
                if uncovered:
                    problems.append(f"{path}.categories: values {uncovered} of {dom.column!r} have no category")
                if extra:
                    problems.append(f"{path}.categories: {extra} are not among the declared values {var.values}")
            if dom.labels is not None:
                problems.append(f"{path}.labels: only used with breaks")
        else:
            breaks = dom.breaks
            labels = dom.labels or []
            if len(breaks) < 2 or any(a >= b for a, b in zip(breaks, breaks[1:])):
                problems.append(f"{path}.breaks: {breaks} must be at least two strictly increasing numbers")
            if len(labels) != len(breaks) - 1:
                problems.append(f"{path}.labels: {len(labels)} labels given; {len(breaks) - 1} "
                                "(one per interval between breaks) are needed")
            if var.type == "string":
                problems.append(f"{path}.breaks: column {dom.column!r} is a string; breaks need numbers")
            elif var.min is None or var.max is None:
                problems.append(f"{path}.breaks: source.variables.{dom.column} needs min and max so that "
                                "every value falls between the breaks")
            elif len(breaks) >= 2 and not (breaks[0] <= var.min and var.max < breaks[-1]):
                problems.append(f"{path}.breaks: {breaks} do not cover {dom.column} from {var.min:g} to "
                                f"{var.max:g} (intervals are [lower, upper))")
        if len(set(labels)) != len(labels) or "all" in labels:
            problems.append(f"{path}: labels must be unique and must not be 'all' (the total's label)")

    seen_tables: set[tuple[str, ...]] = set()
    for i, table in enumerate(s.tables):
        path = f"tables[{i}]"
        for name in table.by:
            if name not in s.domains:
                problems.append(f"{path}.by: {name!r} is not a domain{did_you_mean(name, s.domains)}; "
                                f"domains: {', '.join(s.domains) or '(none)'}")
        if len(set(table.by)) != len(table.by):
            problems.append(f"{path}.by: {table.by} names a domain twice")
        key = tuple(sorted(table.by))
        if key in seen_tables:
            problems.append(f"{path}: the breakdown {table.by} is listed twice")
        seen_tables.add(key)
        if table.down_to is not None:
            problems += _choice(f"{path}.down_to", table.down_to, levels)

    rel = s.reliability
    if rel.standard == "nchs_2017" and (s.estimation.interval != "korn_graubard" or s.estimation.confidence != 0.95):
        problems.append(f"reliability.standard: 'nchs_2017' judges the Korn–Graubard 95% interval; set "
                        f"estimation.interval: korn_graubard (now {s.estimation.interval!r}) and "
                        f"estimation.confidence: 0.95 (now {s.estimation.confidence:g})")
    if rel.cv_caution > rel.cv_suppress:
        problems.append(f"reliability.cv_caution ({rel.cv_caution:g}) must not exceed "
                        f"reliability.cv_suppress ({rel.cv_suppress:g})")
    if len(set(s.output.formats)) != len(s.output.formats):
        problems.append(f"output.formats: {s.output.formats} names a format twice")
    return problems
