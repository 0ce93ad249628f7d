"""The config contract: defaults, pattern resolution, and errors that name the key path."""

from __future__ import annotations

import pytest

from streamguard.config import load_config, parse_config, resolve_tag
from streamguard.errors import ConfigError


def test_defaults_run_shewhart_cusum_and_ewma() -> None:
    """Without a detectors section the default set runs (Shewhart with WE rules, CUSUM, EWMA)."""
    config = parse_config({})
    assert list(config.detectors.enabled()) == ["shewhart", "cusum", "ewma"]
    assert config.detectors.shewhart is not None and config.detectors.shewhart.rules == ("we1", "we2", "we3", "we4")


def test_exactly_the_listed_detectors_run() -> None:
    """Listing detectors replaces the default set."""
    config = parse_config({"detectors": {"cusum": {"h": 4}}})
    assert list(config.detectors.enabled()) == ["cusum"]


def test_negative_h_names_the_key_path() -> None:
    """A bad per-tag override names tags.<tag>.detectors.<detector>.<key>."""
    with pytest.raises(ConfigError) as caught:
        parse_config({"detectors": {"cusum": {}}, "tags": {"TT-101": {"detectors": {"cusum": {"h": -1}}}}})
    assert "tags.TT-101.detectors.cusum.h: must be > 0" in str(caught.value)


def test_unknown_key_is_an_error() -> None:
    """Misspelt keys are errors, not silently ignored."""
    with pytest.raises(ConfigError) as caught:
        parse_config({"detectors": {"cusum": {"hh": 5}}})
    assert "detectors.cusum.hh: unknown key" in str(caught.value)


def test_override_of_detector_not_listed_is_an_error() -> None:
    """Overrides may only tune detectors listed at the top level."""
    with pytest.raises(ConfigError, match="tags.X.detectors.ewma: not listed"):
        parse_config({"detectors": {"cusum": {}}, "tags": {"X": {"detectors": {"ewma": {"lambda": 0.1}}}}})


def test_bad_rule_name_and_duration() -> None:
    """Rule names are the published ones; durations need a unit."""
    with pytest.raises(ConfigError, match="detectors.shewhart.rules"):
        parse_config({"detectors": {"shewhart": {"rules": ["we9"]}}})
    with pytest.raises(ConfigError, match="tags.X.max_gap"):
        parse_config({"tags": {"X": {"max_gap": "5 minutes"}}})


def test_most_specific_match_wins_key_by_key() -> None:
    """Exact name beats a longer pattern beats a shorter one; unrelated keys merge."""
    config = parse_config({
        "detectors": {"cusum": {"h": 5.0}},
        "tags": {
            "*": {"stale_after": 30, "max_gap": "5m"},
            "TT-*": {"stale_after": 10, "units": "degC", "detectors": {"cusum": {"k": 0.25}}},
            "TT-1*": {"stale_after": 20},
            "TT-101": {"detectors": {"cusum": {"h": 6.0}}},
        },
    })  # fmt: skip
    s = resolve_tag(config, "TT-101")
    assert s.stale_after == 20 and s.units == "degC" and s.max_gap_ns == 300 * 10**9
    assert s.detectors["cusum"].h == 6.0 and s.detectors["cusum"].k == 0.25
    other = resolve_tag(config, "FT-201")
    assert other.stale_after == 30 and other.units is None and other.detectors["cusum"].k == 0.5


def test_yaml_syntax_error_names_file_and_line(tmp_path) -> None:  # type: ignore[no-untyped-def]
    """A YAML error reports file:line."""
    path = tmp_path / "bad.yaml"
    path.write_text("detectors:\n  cusum: {k: 0.5\n")
    with pytest.raises(ConfigError, match=r"bad.yaml:\d+"):
        load_config(path)


def test_subgroup_size_or_window_not_both() -> None:
    """A subgroup is either a count or a time window."""
    with pytest.raises(ConfigError, match="subgroup"):
        parse_config({"subgroup": {"size": 5, "window": "60s"}})
    assert parse_config({"subgroup": {"window": "60s"}}).subgroup.window_ns == 60 * 10**9
