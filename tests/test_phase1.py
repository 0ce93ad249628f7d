"""Phase I: the baseline estimates, their refusals and warnings, and the limits file's provenance."""

from __future__ import annotations

import math

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pytest

from streamguard.config import parse_config
from streamguard.limits import file_sha256, load_limits, save_limits
from streamguard.phase1 import autocorrelation, estimate_tag, run_baseline

SEED = 4242


def _individuals(x: np.ndarray):  # type: ignore[no-untyped-def]
    n = x.shape[0]
    return estimate_tag("T", x, np.full(n, np.nan), np.ones(n, np.int32), np.zeros(n, bool))


def test_moving_range_sigma_is_unbiased_within_sampling_error() -> None:
    """MR-bar/d2(2) estimates sigma without bias (d2(2) = 2/sqrt(pi) = 1.128, ASTM E2587). For n = 20,000
    normal points the relative SE of MR-bar/d2 is about 0.83/sqrt(n) (Montgomery, individuals chart, from
    memory), so 4 SE is 2.4 %."""
    rng = np.random.default_rng(SEED)
    limits, why = _individuals(rng.normal(10.0, 2.0, 20_000))
    assert limits is not None, why
    assert limits.sigma == pytest.approx(2.0, rel=4 * 0.83 / math.sqrt(20_000))
    assert limits.mean == pytest.approx(10.0, abs=4 * 2.0 / math.sqrt(20_000))
    assert limits.estimator == "moving_range"


def test_subgroup_sigma_uses_c4_and_reports_standard_error() -> None:
    """s-bar/c4(n) estimates sigma (c4(5) = 0.9400, Montgomery App. VI); the standard error of a subgroup
    mean, sigma/sqrt(n), is reported apart from sigma."""
    rng = np.random.default_rng(SEED + 1)
    data = rng.normal(0.0, 3.0, (4000, 5))
    limits, _ = estimate_tag("T", data.mean(1), data.std(1, ddof=1), np.full(4000, 5, np.int32), np.zeros(4000, bool))
    assert limits is not None
    # SE of s/c4 for n = 5 is sigma*sqrt(1-c4^2)/c4 per subgroup = 0.363 sigma; over 4000: 0.57 %.
    assert limits.sigma == pytest.approx(3.0, rel=4 * 0.363 / math.sqrt(4000))
    assert limits.standard_error_of_subgroup_mean == pytest.approx(limits.sigma / math.sqrt(5))


def test_outliers_are_dropped_and_each_pass_reported() -> None:
    """Points beyond 3 sigma are dropped and sigma re-estimated; the passes are kept."""
    rng = np.random.default_rng(SEED + 2)
    x = rng.normal(0, 1, 2000)
    x[[100, 700, 1500]] = [9.0, -8.0, 12.0]
    limits, _ = _individuals(x)
    assert limits is not None
    assert limits.passes[0].points_dropped >= 3 and limits.passes[-1].points_dropped == 0
    assert limits.points_used <= 1997


def test_refuses_too_few_points_and_flat_signal() -> None:
    """Fewer than 100 individuals (common practice) or sigma = 0 is refused with the tag's name."""
    limits, why = _individuals(np.random.default_rng(1).normal(0, 1, 99))
    assert limits is None and "need at least 100" in why and why.startswith("T:")
    limits, why = _individuals(np.full(500, 4.2))
    assert limits is None and "sigma is zero" in why


def test_autocorrelation_is_reported_and_warned() -> None:
    """AR(1) with phi = 0.8: the lag-1 ACF estimates phi (Bartlett SE about sqrt((1-phi^2)/n), from memory)
    and a warning is given above 0.5."""
    rng = np.random.default_rng(SEED + 3)
    n, phi = 5000, 0.8
    e = rng.normal(0, 1, n)
    x = np.empty(n)
    x[0] = e[0]
    for i in range(1, n):
        x[i] = phi * x[i - 1] + e[i]
    limits, _ = _individuals(x)
    assert limits is not None and limits.lag1_autocorrelation is not None
    assert limits.lag1_autocorrelation == pytest.approx(phi, abs=4 * math.sqrt((1 - phi**2) / n) + 0.01)
    assert any("autocorrelation" in w for w in limits.warnings)
    assert limits.effective_points is not None and limits.effective_points < n / 5


def test_acf_matches_numpy_definition() -> None:
    """The ACF is the Box-Jenkins estimator r_k = sum d_t d_(t+k) / sum d_t^2."""
    x = np.random.default_rng(7).normal(0, 1, 300)
    d = x - x.mean()
    assert autocorrelation(x, 3)[2] == pytest.approx(float(d[:-3] @ d[3:] / (d @ d)))


def _write(path, rows: list[tuple[str, str, float]]) -> None:  # type: ignore[no-untyped-def]
    table = pa.table({"timestamp": [r[0] for r in rows], "tag": [r[1] for r in rows], "value": [r[2] for r in rows]})
    pacsv.write_csv(table, path)


def test_baseline_end_to_end_writes_provenance(tmp_path) -> None:  # type: ignore[no-untyped-def]
    """`run_baseline` estimates tags with a window, refuses the short one by name, and the limits file
    carries inputs with sha256, the window, counts, estimator and a version that round-trips."""
    rng = np.random.default_rng(SEED + 4)
    rows = []
    for i in range(600):
        ts = f"2026-01-01T00:{i // 60:02d}:{i % 60:02d}Z"
        rows.append((ts, "GOOD-1", float(rng.normal(5, 0.5))))
        if i < 50:
            rows.append((ts, "SHORT-1", float(rng.normal(1, 0.1))))
    path = tmp_path / "data.csv"
    _write(path, rows)
    window = {"start": "2026-01-01T00:00:00Z", "end": "2026-01-02T00:00:00Z"}
    config = parse_config({"tags": {"*": {"baseline": window}}})
    result = run_baseline(config, [path])
    assert set(result.limits.tags) == {"GOOD-1"} and "SHORT-1" in result.refused
    good = result.limits.tags["GOOD-1"]
    assert good.samples_used == 600 and good.sample_period_s == 1.0
    assert result.limits.inputs[0].sha256 == file_sha256(path)
    out = tmp_path / "limits.yaml"
    save_limits(result.limits, out)
    again = load_limits(out)
    assert again.limits_version == result.limits.limits_version
    assert again.tags["GOOD-1"].sigma == good.sigma


def _ar1(rng: np.random.Generator, n_series: int, length: int, phi: float) -> np.ndarray:
    x = np.empty((n_series, length))
    x[:, 0] = rng.normal(0, 1 / math.sqrt(1 - phi**2), n_series)
    e = rng.normal(0, 1, (n_series, length))
    for i in range(1, length):
        x[:, i] = phi * x[:, i - 1] + e[:, i]
    return x


def test_ar1_model_restores_the_designed_false_alarm_rate() -> None:
    """AR(1) data (phi = 0.8) charted as individuals with MR-bar/d2 limits alarms far more often than the
    370.4-point ARL of a 3-sigma chart; charting the AR(1) residuals (model: ar1, Alwan & Roberts 1988)
    brings the run length back to 370.4 (normal theory), within 4 simulation standard errors."""
    from streamguard.limits import LimitsFile
    from streamguard.pipeline import Pipeline

    from .helpers import first_raise_points, interleaved

    rng = np.random.default_rng(SEED + 5)
    baseline = _ar1(rng, 1, 20_000, 0.8)[0]
    plain, _ = _individuals(baseline)
    fitted, why = estimate_tag("T", baseline, np.full(baseline.size, np.nan), np.ones(baseline.size, np.int32),
                               np.zeros(baseline.size, bool), model="ar1")  # fmt: skip
    assert plain is not None and fitted is not None, why
    assert fitted.ar1_phi == pytest.approx(0.8, abs=4 * math.sqrt((1 - 0.64) / 20_000))
    assert fitted.residual_sigma == pytest.approx(1.0, rel=0.03)
    assert "model: ar1" in plain.warnings[0]

    reps, length = 1500, 3000
    data = _ar1(rng, reps, length, 0.8)
    runs = {}
    for model, limits in (("none", plain), ("ar1", fitted)):
        names = [f"T{i}" for i in range(reps)]
        limits_file = LimitsFile(tags={name: limits for name in names})
        config = parse_config({"detectors": {"shewhart": {"rules": ["we1"]}},
                               "tags": {"*": {"model": model}}})  # fmt: skip
        pipeline = Pipeline(config, limits_file)
        pipeline.tags.lookup(names)
        events = pipeline.process(interleaved(data))
        runs[model] = first_raise_points(pipeline, events, length, "shewhart")
    assert runs["none"].mean() < 370.4 / 3
    censored = runs["ar1"] > length
    assert censored.mean() < 0.01
    rl = runs["ar1"][~censored]
    assert abs(rl.mean() - 370.4) < 4 * rl.std(ddof=1) / math.sqrt(rl.size) + 370.4 * censored.mean()
