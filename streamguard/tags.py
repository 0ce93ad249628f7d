"""The tag table: tag names to dense indices, and each tag's resolved settings as parameter arrays.

A new tag gets the next index the first time it is seen; its settings are resolved once (config
defaults, then matching patterns, then the exact entry) and written into every stage's parameter
arrays, so the kernels never look at a name or a dict.
"""

from __future__ import annotations

import math

import numpy as np

from .arrays import Columns
from .config import BaselineGiven, Config, ResolvedTag, matching_patterns, resolve_tag
from .detectors.cusum import CusumParams
from .detectors.ewma import EwmaParams
from .detectors.shewhart import ShewhartParams, rule_mask, rule_order
from .detectors.spread import SpreadParams
from .gate import GateParams
from .limits import LimitsFile, TagLimits, limits_version
from .subgroup import SubgroupParams


class Centres(Columns):
    """Frozen phase-I numbers per tag. ``chart_sigma`` is what the detectors divide by: the individual
    sigma, or for ``model: ar1`` the sigma of the one-step residuals."""

    spec = {
        "mean": (np.float64, (), 0.0),
        "sigma": (np.float64, (), 1.0),
        "phi": (np.float64, (), 0.0),
        "chart_sigma": (np.float64, (), 1.0),
    }


class TagTable:
    """Names, indices and per-tag parameters for every stage."""

    def __init__(self, config: Config, limits: LimitsFile | None = None, all_active: bool = False) -> None:
        self.config = config
        self.all_active = all_active  # phase I: gate every tag, none has limits yet
        self.limits = limits
        self.names: list[str] = []
        self.index: dict[str, int] = {}
        self.settings: list[ResolvedTag] = []
        self.units: list[str | None] = []
        self.limit_source: list[str] = []  # "config", "limits file" or "" (none: tag is skipped)
        self.gate = GateParams()
        self.subgroup = SubgroupParams()
        self.centres = Centres()
        self.detector_params: dict[str, Columns] = {}
        enabled = config.detectors.enabled()
        if "shewhart" in enabled:
            self.detector_params["shewhart"] = ShewhartParams()
        if "cusum" in enabled:
            self.detector_params["cusum"] = CusumParams()
        if "ewma" in enabled:
            self.detector_params["ewma"] = EwmaParams()
        if "spread" in enabled:
            self.detector_params["spread"] = SpreadParams()
        self.all_individuals = True
        self.any_ar1 = False  # some tag charts AR(1) residuals (the pipeline then keeps a previous value)
        # Config-given baselines are versioned by the config entries that give them, hashed once: hashing
        # the tags that use them would cost O(tags) on every new tag and a dict entry per tag.
        given = {pattern: (entry.baseline.mean, entry.baseline.sigma) for pattern, entry in config.tags.items()
                 if isinstance(entry.baseline, BaselineGiven)}  # fmt: skip
        self._config_version = "cfg-" + limits_version(given) if given else ""
        self._uses_config = False
        self._version: str | None = None
        self._resolved: dict[tuple[str, ...], ResolvedTag] = {}
        self.skip_reason: dict[str, str] = {}

    def __len__(self) -> int:
        return len(self.names)

    @property
    def limits_version(self) -> str:
        """The limits file's version, or a hash of config-given baselines (prefixed so they differ)."""
        if self._version is not None:
            return self._version
        parts = []
        if self.limits is not None:
            parts.append(self.limits.limits_version)
        if self._uses_config:
            parts.append(self._config_version)
        self._version = "+".join(parts) or "none"
        return self._version

    def lookup(self, names: list[str]) -> np.ndarray:
        """Indices for a chunk's tag names, adding the new ones."""
        out = np.empty(len(names), dtype=np.int32)
        for j, name in enumerate(names):
            i = self.index.get(name)
            out[j] = self.add(name) if i is None else i
        return out

    def add(self, name: str) -> int:
        i = len(self.names)
        # One resolved-settings object per distinct set of matching entries: with 100,000 tags under a few
        # patterns this saves most of the table's memory (~0.8 KB a tag measured).
        matches = matching_patterns(self.config, name)
        settings = self._resolved.get(matches)
        if settings is None:
            settings = self._resolved[matches] = resolve_tag(self.config, name, matches)
        self.names.append(name)
        self.index[name] = i
        self.settings.append(settings)
        self.units.append(settings.units)
        for columns in (self.gate, self.subgroup, self.centres, *self.detector_params.values()):
            columns.ensure(i + 1)
        self._fill(i, name, settings)
        return i

    def _fill(self, i: int, name: str, s: ResolvedTag) -> None:
        mean, sigma, source = self._baseline(name, s)
        phi, residual_sigma = 0.0, sigma
        if s.model == "ar1":
            found = self.limits.tags.get(name) if self.limits else None
            if source == "limits file" and found is not None and found.model == "ar1" and found.residual_sigma:
                phi, residual_sigma = float(found.ar1_phi or 0.0), float(found.residual_sigma)
            else:
                # Charting an autocorrelated tag as if independent is the failure ar1 exists to avoid:
                # skip the tag rather than fall back silently.
                source = ""
                self.skip_reason[name] = "model: ar1 needs limits estimated with model: ar1 (re-run baseline)"
        self.limit_source.append(source)
        if source == "config" and not self._uses_config:
            self._uses_config = True
            self._version = None
        self.centres.mean[i] = mean
        self.centres.sigma[i] = sigma
        self.centres.phi[i] = phi
        self.any_ar1 = self.any_ar1 or phi != 0.0
        self.centres.chart_sigma[i] = residual_sigma
        gate = self.gate
        gate.active[i] = bool(source) or self.all_active
        gate.range_low[i], gate.range_high[i] = s.range if s.range else (-np.inf, np.inf)
        gate.stale_after[i] = s.stale_after
        gate.max_gap[i] = s.max_gap_ns
        gate.use_uncertain[i] = s.use_uncertain
        self.subgroup.size[i] = s.subgroup.count
        self.subgroup.window[i] = s.subgroup.window_ns
        if s.subgroup.window_ns or s.subgroup.count != 1:
            self.all_individuals = False
        for name, columns in self.detector_params.items():
            p = s.detectors[name]
            if name == "shewhart":
                columns.limit[i] = p.limit
                columns.order[i] = rule_order(p.rules)
                columns.mask[i] = rule_mask(p.rules)
                columns.run_length[i] = p.run_length
            elif name == "cusum":
                columns.k[i], columns.h[i], columns.headstart[i] = p.k, p.h, p.headstart
            elif name == "ewma":
                columns.lam[i], columns.L[i], columns.exact[i] = p.lambda_, p.L, p.limits == "exact"
            elif name == "spread":
                columns.limit[i] = p.limit

    def _baseline(self, name: str, s: ResolvedTag) -> tuple[float, float, str]:
        if isinstance(s.baseline, BaselineGiven):
            return s.baseline.mean, s.baseline.sigma, "config"
        found: TagLimits | None = self.limits.tags.get(name) if self.limits else None
        if found is not None and math.isfinite(found.sigma) and found.sigma > 0:
            return found.mean, found.sigma, "limits file"
        return 0.0, 1.0, ""

    def unconfigured(self) -> list[str]:
        return [n for n, src in zip(self.names, self.limit_source, strict=True) if not src]
