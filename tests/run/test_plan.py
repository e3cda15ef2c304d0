"""`composition plan` costs every side and query part through the side registry, and its breakdown
says which figures are totals."""

from __future__ import annotations

import pytest

from composition.compose import sides
from composition.extract import load_weights
from composition.options import ScanOptions
from composition.run.plan import plan_scan

from ..small_checkpoint import random_gpt2


@pytest.fixture(scope="module")
def weights(tmp_path_factory):
    path, _, _ = random_gpt2(str(tmp_path_factory.mktemp("plan") / "model"))
    return load_weights(path)


@pytest.mark.parametrize("side", sides.every(), ids=lambda s: f"{s.name}-{s.part}")
def test_plan_builds_the_sides_own_factors(weights, side, monkeypatch):
    """For every registered side and part, plan times that side's per-layer factor and written-token
    factor (the registry's own builders are called), and the breakdown names the side.
    Common practice, no source"""
    calls = []
    for name in ("fixed", "written"):
        original = getattr(side, name)
        monkeypatch.setattr(side, name, lambda *a, _o=original, _n=name: calls.append(_n) or _o(*a))
    plan = plan_scan(weights, ScanOptions(side=side.name, query_part=side.part, writers="0", responders="2"),
                     calibrate_seconds=0.1)
    assert calls.count("fixed") == 1 and calls.count("written") == 1
    assert plan.pairs == 16 and plan.side == side.title
    assert plan.seconds["factors"] > 0 and plan.seconds["per_pair"] > 0
    text = plan.describe()
    assert f"side               {side.title}" in text


def test_plan_breakdown_says_which_figures_are_totals(weights):
    """Common practice, no source: the per-pair figure is labelled as a total with its per-pair share."""
    plan = plan_scan(weights, ScanOptions(writers="0", responders="1,2"), calibrate_seconds=0.1)
    text = plan.describe()
    assert "totals over the scan" in text and "per-pair factors" in text and "a pair)" in text
    assert "per pair " not in text.replace("per pair  ", "")  # no bare "per pair 49.2 s" for a total
