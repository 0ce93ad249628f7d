"""The limits file: frozen phase-I centre and sigma per tag, with the provenance to trust them.

Phase I (``streamguard baseline``) writes it; phase II (replay, service) only reads it. Nothing
re-estimates limits while monitoring: a running estimate chases the very shift we want to see.
Both the individual sigma (process spread; what capability uses) and the standard error of a
subgroup mean (what subgroup limits use) are kept, labelled so the narrow one is never taken for
the spread of the product.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any, Literal

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from .config import format_validation_error
from .errors import ConfigError

FORMAT: Literal["streamguard-limits/1"] = "streamguard-limits/1"


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class EstimationPass(_Model):
    number: int
    mean: float
    sigma: float
    points_used: int
    points_dropped: int


class TagLimits(_Model):
    mean: float
    sigma: float = Field(gt=0, description="individual (process) sigma")
    subgroup_size: float = Field(1, ge=1, description="nominal subgroup size (mean n for time windows)")
    standard_error_of_subgroup_mean: float | None = None
    estimator: str = "given"
    window_start: str | None = None
    window_end: str | None = None
    samples_used: int = 0
    samples_excluded: dict[str, int] = Field(default_factory=dict)
    points_used: int = 0
    passes: list[EstimationPass] = Field(default_factory=list)
    lag1_autocorrelation: float | None = None
    autocorrelation: list[float] = Field(default_factory=list, description="lags 1..k of the charted points")
    effective_points: float | None = None
    sample_period_s: float | None = Field(None, description="median spacing of the tag's samples")
    model: Literal["none", "ar1"] = "none"
    ar1_phi: float | None = Field(None, description="frozen AR(1) coefficient of the charted points")
    residual_sigma: float | None = Field(None, description="sigma of the AR(1) one-step residuals")
    warnings: list[str] = Field(default_factory=list)


class InputFile(_Model):
    path: str
    sha256: str
    bytes: int


class LimitsFile(_Model):
    format: Literal["streamguard-limits/1"] = FORMAT
    limits_version: str = ""
    created: str = ""
    streamguard_version: str = ""
    config_path: str | None = None
    config_fingerprint: str | None = None
    estimator: str = ""
    inputs: list[InputFile] = Field(default_factory=list)
    tags: dict[str, TagLimits] = Field(default_factory=dict)
    refused: dict[str, str] = Field(default_factory=dict)


def limits_version(tags: dict[str, tuple[float, float]]) -> str:
    """A short content hash of every tag's (mean, sigma): equal numbers, equal version."""
    text = json.dumps({k: [repr(float(m)), repr(float(s))] for k, (m, s) in sorted(tags.items())})
    return hashlib.sha256(text.encode()).hexdigest()[:12]


def file_sha256(path: str | Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def load_limits(path: str | Path) -> LimitsFile:
    path = Path(path)
    try:
        data: Any = yaml.safe_load(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read limits file ({exc.strerror or exc})") from None
    except yaml.YAMLError as exc:
        raise ConfigError(f"{path}: not valid YAML ({exc})") from None
    if not isinstance(data, dict):
        raise ConfigError(f"{path}: a limits file is a mapping with format: {FORMAT}")
    try:
        limits = LimitsFile.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(format_validation_error(exc, prefix=f"{path}: ")) from None
    expected = limits_version({k: (v.mean, v.sigma) for k, v in limits.tags.items()})
    if limits.limits_version and limits.limits_version != expected:
        raise ConfigError(
            f"{path}: limits_version {limits.limits_version} does not match its numbers ({expected}); "
            "the file was edited by hand - re-run `streamguard baseline` or remove limits_version"
        )
    return limits.model_copy(update={"limits_version": expected})


def save_limits(limits: LimitsFile, path: str | Path) -> None:
    data = limits.model_dump(mode="json", exclude_none=True)
    header = (
        "# streamguard limits file: frozen phase-I estimates. Written by `streamguard baseline`.\n"
        "# sigma is the individual (process) sigma; standard_error_of_subgroup_mean is sigma/sqrt(n),\n"
        "# the spread of subgroup means only - never quote it as the spread of the product.\n"
    )
    target = Path(path)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_text(header + yaml.safe_dump(data, sort_keys=False, allow_unicode=True), encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"{target}: cannot write limits file ({exc.strerror or exc})") from None
