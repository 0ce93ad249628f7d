"""The YAML config: its pydantic model, loading, and error messages that name the key path.

Validation happens here, once, at the boundary. Inside the pipeline the settings are trusted.
The schema is a contract: configs written today keep working.
"""

from __future__ import annotations

import fnmatch
from collections.abc import Mapping
from pathlib import Path
from typing import Any, Literal

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from .durations import parse_duration
from .errors import ConfigError
from .service_config import CheckpointSection, MetricsSection, OutputSection, SourceSection
from .timeparse import parse_time

RULE_NAMES = (
    "we1", "we2", "we3", "we4",
    "nelson1", "nelson2", "nelson3", "nelson4", "nelson5", "nelson6", "nelson7", "nelson8",
)  # fmt: skip
RuleName = Literal[
    "we1", "we2", "we3", "we4",
    "nelson1", "nelson2", "nelson3", "nelson4", "nelson5", "nelson6", "nelson7", "nelson8",
]  # fmt: skip
DETECTOR_NAMES = ("shewhart", "cusum", "ewma", "spread")


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)


class ShewhartParams(_Strict):
    limit: float = Field(3.0, gt=0)
    rules: tuple[RuleName, ...] = ("we1",)
    run_length: int = Field(8, ge=2, le=15)

    @field_validator("rules")
    @classmethod
    def _rules_not_empty(cls, rules: tuple[str, ...]) -> tuple[str, ...]:
        if not rules:
            raise ValueError("list at least one rule (e.g. [we1])")
        return tuple(dict.fromkeys(rules))


class CusumParams(_Strict):
    k: float = Field(0.5, ge=0)
    h: float = Field(5.0, gt=0)
    headstart: float = Field(0.0, ge=0, lt=1)


class EwmaParams(_Strict):
    lambda_: float = Field(0.2, gt=0, le=1, alias="lambda")
    L: float = Field(2.962, gt=0)
    limits: Literal["exact", "asymptotic"] = "exact"


class SpreadParams(_Strict):
    limit: float = Field(3.0, gt=0)


DETECTOR_MODELS: dict[str, type[_Strict]] = {
    "shewhart": ShewhartParams,
    "cusum": CusumParams,
    "ewma": EwmaParams,
    "spread": SpreadParams,
}


class Detectors(_Strict):
    shewhart: ShewhartParams | None = None
    cusum: CusumParams | None = None
    ewma: EwmaParams | None = None
    spread: SpreadParams | None = None

    def enabled(self) -> dict[str, _Strict]:
        return {name: getattr(self, name) for name in DETECTOR_NAMES if getattr(self, name) is not None}


def default_detectors() -> Detectors:
    return Detectors(
        shewhart=ShewhartParams(rules=("we1", "we2", "we3", "we4")),
        cusum=CusumParams(),
        ewma=EwmaParams(),
    )


class Subgroup(_Strict):
    size: int | None = Field(None, ge=1, le=1000)
    window: str | None = None

    @field_validator("window")
    @classmethod
    def _window_is_duration(cls, value: str | None) -> str | None:
        if value is not None:
            parse_duration(value)
        return value

    @model_validator(mode="after")
    def _exactly_one(self) -> Subgroup:
        if self.size is not None and self.window is not None:
            raise ValueError("give either size or window, not both")
        return self

    @property
    def window_ns(self) -> int:
        return parse_duration(self.window) if self.window else 0

    @property
    def count(self) -> int:
        return 1 if self.window else (self.size or 1)


class BaselineGiven(_Strict):
    mean: float
    sigma: float = Field(gt=0)


class BaselineWindow(_Strict):
    start: str
    end: str

    @field_validator("start", "end")
    @classmethod
    def _is_time(cls, value: str) -> str:
        parse_time(value)
        return value

    @model_validator(mode="after")
    def _ordered(self) -> BaselineWindow:
        if parse_time(self.end) <= parse_time(self.start):
            raise ValueError("end must be after start")
        return self

    @property
    def start_ns(self) -> int:
        return parse_time(self.start)

    @property
    def end_ns(self) -> int:
        return parse_time(self.end)


class TagSettings(_Strict):
    """Settings for a tag name or glob pattern; every key optional, merged key by key."""

    baseline: BaselineGiven | BaselineWindow | None = None
    detectors: dict[str, dict[str, Any]] | None = None
    range: tuple[float, float] | None = None
    stale_after: int | None = Field(None, ge=2)
    max_gap: str | None = None
    uncertain: Literal["exclude", "use"] | None = None
    units: str | None = None
    subgroup: Subgroup | None = None
    model: Literal["none", "ar1"] | None = None

    @field_validator("max_gap")
    @classmethod
    def _gap_is_duration(cls, value: str | None) -> str | None:
        if value is not None:
            parse_duration(value)
        return value

    @field_validator("range")
    @classmethod
    def _range_ordered(cls, value: tuple[float, float] | None) -> tuple[float, float] | None:
        if value is not None and not value[0] < value[1]:
            raise ValueError("range must be [low, high] with low < high")
        return value


class InputConfig(_Strict):
    shape: Literal["auto", "long", "wide"] = "auto"
    timestamp: str = "timestamp"
    tag: str = "tag"
    value: str = "value"
    quality: str = "quality"
    timestamp_format: Literal["auto", "iso", "epoch_s", "epoch_ms"] = "auto"
    quality_encoding: Literal["auto", "opcua", "opc_classic", "bool", "word"] = "auto"


class Alarms(_Strict):
    clear_after: int = Field(5, ge=1)


class Pair(_Strict):
    """Two tags that measure the same thing; their difference a - (scale * b + offset) is charted as a
    derived tag named by the pair's key, with its own baseline and detectors from ``tags:``."""

    a: str
    b: str
    scale: float = 1.0
    offset: float = 0.0
    tolerance: str = "5s"
    window: str = "1h"
    threshold: float = Field(gt=0, description="practical bias, engineering units")
    confidence: float = Field(0.95, gt=0.5, lt=1)

    @field_validator("tolerance", "window")
    @classmethod
    def _duration(cls, value: str) -> str:
        parse_duration(value)
        return value

    @model_validator(mode="after")
    def _two_tags(self) -> Pair:
        if self.a == self.b:
            raise ValueError("a and b must be different tags")
        return self


class Config(_Strict):
    input: InputConfig = InputConfig()
    subgroup: Subgroup = Subgroup(size=1)
    detectors: Detectors = Field(default_factory=default_detectors)
    alarms: Alarms = Alarms()
    tags: dict[str, TagSettings] = Field(default_factory=dict)
    pairs: dict[str, Pair] = Field(default_factory=dict)
    # The live service's sections (streamguard/service_config.py); replay and baseline ignore them.
    source: SourceSection | None = None
    output: OutputSection | None = None
    metrics: MetricsSection | None = None
    checkpoint: CheckpointSection | None = None

    @model_validator(mode="after")
    def _detectors_listed(self) -> Config:
        if not self.detectors.enabled():
            raise ValueError("detectors: list at least one of " + ", ".join(DETECTOR_NAMES))
        members: dict[str, str] = {}
        for name, pair in self.pairs.items():
            for member in (pair.a, pair.b):
                if member in members:
                    raise ValueError(f"pairs.{name}: {member} is already a member of pair {members[member]}")
                members[member] = name
        for name in self.pairs:
            if name in members:
                raise ValueError(f"pairs.{name}: a pair's name names its difference and must not be a member tag")
        return self


class ResolvedTag:
    """A tag's settings after merging defaults, matching patterns and the exact entry.

    Shared by every tag matched by the same entries (``name`` is the first of them)."""

    __slots__ = ("name", "baseline", "detectors", "range", "stale_after", "max_gap_ns", "use_uncertain",
                 "units", "subgroup", "sources", "model")  # fmt: skip

    def __init__(self, name: str, config: Config, merged: dict[str, Any], sources: list[str]) -> None:
        self.name = name
        self.sources = sources
        self.baseline: BaselineGiven | BaselineWindow | None = merged.get("baseline")
        self.range: tuple[float, float] | None = merged.get("range")
        self.stale_after: int = merged.get("stale_after") or 0
        gap = merged.get("max_gap")
        self.max_gap_ns: int = parse_duration(gap) if gap else 0
        self.use_uncertain: bool = merged.get("uncertain") == "use"
        self.units: str | None = merged.get("units")
        self.subgroup: Subgroup = merged.get("subgroup") or config.subgroup
        self.model: str = merged.get("model") or "none"
        overrides: dict[str, dict[str, Any]] = merged.get("detectors") or {}
        self.detectors: dict[str, Any] = {}
        for det_name, params in config.detectors.enabled().items():
            if det_name in overrides:
                data = params.model_dump(by_alias=True) | overrides[det_name]
                self.detectors[det_name] = DETECTOR_MODELS[det_name].model_validate(data)
            else:
                self.detectors[det_name] = params


def _specificity(pattern: str) -> tuple[int, int]:
    """Exact names beat patterns; among patterns, the longer one is the more specific."""
    is_exact = not any(ch in pattern for ch in "*?[")
    return (1 if is_exact else 0, len(pattern))


def matching_patterns(config: Config, name: str) -> tuple[str, ...]:
    """The `tags:` entries that apply to a name, least specific first."""
    matches = [p for p in config.tags if p == name or fnmatch.fnmatchcase(name, p)]
    matches.sort(key=_specificity)
    return tuple(matches)


def resolve_tag(config: Config, name: str, matches: tuple[str, ...] | None = None) -> ResolvedTag:
    """Merge every matching `tags:` entry, least specific first, so the most specific wins per key.

    Tags matched by the same entries share their settings; pass ``matches`` to reuse them.
    """
    if matches is None:
        matches = matching_patterns(config, name)
    merged: dict[str, Any] = {}
    for pattern in matches:
        entry = config.tags[pattern]
        for key in entry.model_fields_set:
            value = getattr(entry, key)
            if key == "detectors" and value is not None:
                combined = {k: dict(v) for k, v in (merged.get("detectors") or {}).items()}
                for det_name, params in value.items():
                    combined[det_name] = combined.get(det_name, {}) | params
                merged["detectors"] = combined
            else:
                merged[key] = value
    return ResolvedTag(name, config, merged, list(matches))


def _format_location(loc: tuple[Any, ...]) -> str:
    parts = [str(p) for p in loc if not (isinstance(p, str) and p in ("BaselineGiven", "BaselineWindow"))]
    parts = [p for p in parts if not p.startswith(("function-", "tagged-union"))]
    return ".".join(parts) or "(top level)"


def _format_message(error: Mapping[str, Any]) -> str:
    kind = error.get("type", "")
    ctx = error.get("ctx") or {}
    if kind == "extra_forbidden":
        return "unknown key (check spelling; unknown keys are errors)"
    if kind in ("greater_than", "greater_than_equal", "less_than", "less_than_equal"):
        sym = {"greater_than": ">", "greater_than_equal": ">=", "less_than": "<", "less_than_equal": "<="}[kind]
        limit = next(iter(ctx.values()), "?")
        return f"must be {sym} {limit}"
    msg = str(error.get("msg", "invalid"))
    return msg.removeprefix("Value error, ")


def format_validation_error(exc: ValidationError, prefix: str = "") -> str:
    lines = []
    seen: set[str] = set()
    for error in exc.errors():
        loc = _format_location(tuple(error["loc"]))
        line = f"{prefix}{loc}: {_format_message(error)}"
        if line not in seen:
            seen.add(line)
            lines.append(line)
    return "\n".join(lines)


def _check_overrides(config: Config) -> None:
    """Per-tag detector overrides are validated merged with the top-level parameters, path and all."""
    enabled = config.detectors.enabled()
    problems = []
    for pattern, entry in config.tags.items():
        for det_name, params in (entry.detectors or {}).items():
            where = f"tags.{pattern}.detectors.{det_name}"
            if det_name not in DETECTOR_MODELS:
                problems.append(f"{where}: unknown detector (known: {', '.join(DETECTOR_NAMES)})")
                continue
            if det_name not in enabled:
                problems.append(f"{where}: not listed under top-level detectors (exactly those run)")
                continue
            if not isinstance(params, dict):
                problems.append(f"{where}: must be a mapping of parameters")
                continue
            data = enabled[det_name].model_dump(by_alias=True) | params
            try:
                DETECTOR_MODELS[det_name].model_validate(data)
            except ValidationError as exc:
                problems.append(format_validation_error(exc, prefix=where + "."))
    if problems:
        raise ConfigError("\n".join(problems))


def parse_config(data: Any, source: str = "config") -> Config:
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise ConfigError(f"{source}: the top level must be a mapping of keys")
    try:
        config = Config.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(format_validation_error(exc, prefix=f"{source}: ")) from None
    try:
        _check_overrides(config)
    except ConfigError as exc:
        raise ConfigError("\n".join(f"{source}: {line}" for line in str(exc).splitlines())) from None
    return config


def load_config(path: str | Path) -> Config:
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read config ({exc.strerror or exc})") from None
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f"{path}:{mark.line + 1}" if mark is not None else str(path)
        raise ConfigError(f"{where}: not valid YAML ({getattr(exc, 'problem', exc)})") from None
    return parse_config(data, source=str(path))


def config_fingerprint(config: Config) -> str:
    """A short hash of the settings that shape detector state; a checkpoint from another one is not mixed in."""
    import hashlib
    import json

    # Input columns and the live service's sections (broker, outputs, metrics, state) shape no statistic.
    exclude = {"input", "source", "output", "metrics", "checkpoint"}
    text = json.dumps(config.model_dump(mode="json", by_alias=True, exclude=exclude), sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:16]
