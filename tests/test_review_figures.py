"""Figures: display thinning keeps every extreme, SVG stays valid and self-contained, episodes draw their parts.

Data here is invented (seeded) for drawing only; what is checked is what the drawing promises.
"""

from __future__ import annotations

import re
import xml.etree.ElementTree as ElementTree

import numpy as np
import pytest

from streamguard.config import parse_config
from streamguard.review import figures
from streamguard.review.tag_traces import TagSamples, trace_tags

SVG = "{http://www.w3.org/2000/svg}"


def test_envelope_keeps_each_buckets_lowest_and_highest() -> None:
    rng = np.random.default_rng(7)
    x = np.arange(100_000, dtype=np.int64)
    y = rng.standard_normal(100_000)
    y[54_321] = 50.0
    y[12_345] = -50.0
    tx, ty = figures.envelope(x, y, buckets=300)
    assert tx.shape[0] <= 600
    assert np.all(np.diff(tx) >= 0)
    assert ty.max() == 50.0 and ty.min() == -50.0
    # Every bucket's own extremes survive: compare with a direct computation per bucket.
    size = -(-x.shape[0] // 300)
    for b in (0, 150, 299):
        chunk = y[b * size:(b + 1) * size]
        kept = ty[(tx >= b * size) & (tx < (b + 1) * size)]
        assert set(kept) == {chunk.min(), chunk.max()}


def test_short_series_are_drawn_whole() -> None:
    x, y = np.arange(10), np.arange(10.0)
    tx, ty = figures.envelope(x, y, buckets=300)
    assert np.array_equal(tx, x) and np.array_equal(ty, y)


@pytest.fixture(scope="module")
def episode_svg() -> str:
    """A tag with a step, a stuck stretch and a NaN, drawn with centre, limits, CUSUM and EWMA."""
    config = parse_config({
        "subgroup": {"size": 4},
        "tags": {"FT-9": {"baseline": {"mean": 100.0, "sigma": 2.0}, "units": "m3/h", "stale_after": 5}},
    })  # fmt: skip
    rng = np.random.default_rng(11)
    n = 4000
    ts = (1.8e9 + np.arange(n) * 10.0).astype(np.int64) * 10**9
    value = 100.0 + 2.0 * rng.standard_normal(n)
    value[2000:] += 3.0
    value[3000:3010] = value[2999]
    value[3500] = np.nan
    traces = trace_tags(config, None, {"FT-9": TagSamples(ts, value, np.zeros(n, np.uint8))})
    trace = traces["FT-9"]
    assert (trace.reason != 0).sum() >= 6  # the stuck stretch and the NaN are excluded
    intervals = [("cusum", int(ts[2100]), int(ts[3900]), 1), ("shewhart", int(ts[2050]), -1, 1)]
    return figures.episode_figure(trace, (int(ts[1500]), int(ts[3999])), intervals, [], int(ts[-1]), "FT-9 step")


def test_episode_figure_is_valid_svg_with_its_panels(episode_svg: str) -> None:
    root = ElementTree.fromstring(episode_svg)
    texts = " ".join("".join(t.itertext()) for t in root.iter(f"{SVG}text"))
    for expected in ("FT-9 step", "[m3/h]", "CUSUM", "EWMA", "in alarm", "clear", "excluded"):
        assert expected in texts
    assert len(list(root.iter(f"{SVG}path"))) > 20


def test_svg_coordinates_are_compact_and_references_internal(episode_svg: str) -> None:
    for d in re.findall(r' d="([^"]*)"', episode_svg):
        assert not re.search(r"\d\.\d\d", d)  # coordinates to 0.1 pt
    refs = re.findall(r'(?:href|xlink:href|src)="([^"]*)"', episode_svg)
    assert refs and all(ref.startswith("#") for ref in refs)
    assert "<metadata" not in episode_svg and "<?xml" not in episode_svg
    assert len(episode_svg) < 150_000
