"""Report sections on hand-made series (collapse, steps to threshold): numbers worked out by hand from the
evaluations written."""

from __future__ import annotations

from pathlib import Path

import pytest
from series_folders import base_config, with_keys, write_run
from test_report import section, table

from qlab.compare.measures import collapse_score
from qlab.compare.report import main
from qlab.compare.runs import load_study

STEPS = [0, 500, 1000]
COLLAPSE = "Collapse after the best evaluation"


@pytest.fixture(scope="module")
def dock(tmp_path_factory) -> Path:
    """Dock, tabular, arms none and potential, three seeds each; success rates chosen to sit on the rule's edges."""
    folder = tmp_path_factory.mktemp("collapse_dock")
    config = base_config(["learner=tabular", "budget_steps=1000"])
    success = {
        ("none", 0): [0.0, 1.0, 0.4],  # 0.4 < 0.5 * 1.0: collapsed, lost (1.0 - 0.4) / 1.0 = 0.6
        ("none", 1): [0.0, 0.8, 0.4],  # 0.4 = 0.5 * 0.8 exactly: not collapsed (the rule is strict), lost 0.5
        ("none", 2): [0.0, 0.0, 0.0],  # best 0: nothing to lose, lost 0
        ("potential", 0): [0.2, 0.6, 0.2],  # 0.2 < 0.3: collapsed, lost 0.4 / 0.6 = 0.667
        ("potential", 1): [0.0, 0.9, 0.9],  # diverges at step 1000: final scored 0, collapsed, lost 0.9 / 0.9 = 1
        ("potential", 2): [0.0, 0.5, 1.0],  # still rising: lost 0
    }
    for (arm, seed), s in success.items():
        cfg = with_keys(config, **{"shaping.variant": arm, "seed": seed})
        write_run(folder / f"{arm},seed={seed}", cfg, STEPS, s, [0.5 * v for v in s],
                  diverged_at=1000 if (arm, seed) == ("potential", 1) else None)
    return folder


@pytest.fixture(scope="module")
def linear_quadratic(tmp_path_factory) -> Path:
    """Linear-quadratic (no success signal: success is always 0), negative discounted returns, three seeds."""
    folder = tmp_path_factory.mktemp("collapse_lq")
    config = base_config(["task=linear_quadratic", "learner=lstdq", "learner.features=quadratic",
                          "budget_steps=1000"])
    returns = {
        0: [-5.0, -1.0, -4.0],  # best -1, worst -5: lost (-1 - -4) / (-1 - -5) = 3 / 4 = 0.75, collapsed
        1: [-5.0, -2.0, -3.0],  # lost (-2 - -3) / (-2 - -5) = 1 / 3: kept, though -3 < 0.5 * -2 = -1
        2: [-2.0, -2.0, -2.0],  # flat: best = worst, nothing to lose
    }
    for seed, r in returns.items():
        write_run(folder / f"seed={seed}", with_keys(config, seed=seed), STEPS, [0.0, 0.0, 0.0], r)
    return folder


def test_collapse_on_success_counts_runs_below_half_their_best(dock):
    assert collapse_score(load_study(dock).runs) == "success"
    assert main([str(dock), "--no-diagnostics"]) == 0
    text = section((dock / "report.md").read_text(), COLLAPSE)
    assert "scored on the evaluated success rate" in text
    assert "a run collapsed when final < 0.5 x best, with best > 0" in text
    rows = {row[1]: row[2:] for row in table(text)}
    # none: seed 0 only; median of lost shares [0.6, 0.5, 0] = 0.5
    assert rows["none"] == ["3", "1", "0.50"]
    # potential: seeds 0 and 1 (the diverged run scores 0 at the end); median of [0.667, 1, 0] = 0.667
    assert rows["potential"] == ["3", "2", "0.67"]


def test_collapse_without_success_signal_uses_the_return_range(linear_quadratic):
    assert collapse_score(load_study(linear_quadratic).runs) == "discounted_return"
    assert main([str(linear_quadratic), "--no-diagnostics"]) == 0
    text = section((linear_quadratic / "report.md").read_text(), COLLAPSE)
    assert "scored on the evaluated discounted return, because no run of this task setting ever evaluated" in text
    assert "(best - final) / (best - worst)" in text
    # one collapse (seed 0); median of lost shares [0.75, 0.333, 0] = 0.333
    assert table(text) == [["lstdq", "none", "3", "1", "0.33"]]


#: first evaluation step at which each run reaches success 1.0 (None: never), on a grid of 250 steps, budget 1,000
FIRST_REACH = {"none": [500, 750, None, None], "potential": [250, 500, 1000, None]}


@pytest.fixture(scope="module")
def reaching(tmp_path_factory) -> Path:
    """Dock, tabular, arms none and potential, four seeds each, success 0 until the run's first reach, then 1."""
    folder = tmp_path_factory.mktemp("reaching")
    config = base_config(["learner=tabular", "budget_steps=1000"])
    steps = [0, 250, 500, 750, 1000]
    for arm, reach in FIRST_REACH.items():
        for seed, first in enumerate(reach):
            success = [float(first is not None and s >= first) for s in steps]
            write_run(folder / f"{arm},seed={seed}", with_keys(config, **{"shaping.variant": arm, "seed": seed}),
                      steps, success, [0.5 * v for v in success])
    return folder


def test_steps_to_threshold_counts_runs_that_never_reach_it_as_never(reaching):
    assert main([str(reaching), "--no-diagnostics"]) == 0
    markdown = (reaching / "report.md").read_text()
    rows = {row[1]: row[2:] for row in table(section(markdown, "Steps to a success rate of 0.5"))}
    # none: 500, 750, never, never: half censored, so the median is beyond the budget, printed "> 1,000"
    assert rows["none"] == ["4", "2", "2", "1,000", "> 1,000"]
    # potential: 250, 500, 1000, never: one censored; sorted middle pair 500 and 1000, median 750
    assert rows["potential"] == ["4", "3", "1", "1,000", "750"]
    # median(none) > 1,000 and median(potential) = 750: potential needs more than 1000 / 750 = 1.3 times fewer
    assert ("`potential` against `none`: more than 1.3 times fewer steps than `none` (half or more `none` runs never "
            "reached the threshold within the budget)") in section(markdown, "Summary")
