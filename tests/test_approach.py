"""The delay study's approaches (configs/approach/): one channel, budgets fixed in advance, 25
evaluations per run, and the same exploration for every learner, scaled with each budget."""

from __future__ import annotations

import pytest
from runtools import compose_run

from qlab.config import group_options, validate
from qlab.runspec import run_name

APPROACHES = ("near", "mid", "far")


def test_the_approach_group_has_the_studys_three_settings():
    assert group_options("approach") == sorted(APPROACHES)


@pytest.mark.parametrize("approach", APPROACHES)
def test_every_learner_of_an_approach_explores_alike(approach):
    epsilons = set()
    for learner in ("tabular", "linear", "qnet"):
        cfg = compose_run([f"approach={approach}", f"learner={learner}"])
        validate(cfg)
        eps = cfg.learner.epsilon
        epsilons.add((eps.kind, eps.start, eps.end, eps.horizon))
        assert eps.kind == "linear" and eps.horizon == pytest.approx(0.3 * cfg.budget_steps)
        assert cfg.task.channel_length_m == 150.0
        assert cfg.budget_steps == 25 * cfg.evaluation.every_steps
    assert len(epsilons) == 1


def test_approaches_differ_in_the_delay_only_where_the_task_is_concerned():
    tasks = [compose_run([f"approach={a}"]).task for a in APPROACHES]
    starts = [tuple(t.start_distance_m) for t in tasks]
    assert starts == sorted(starts) and starts[-1] == (80.0, 120.0)  # far: Dock's default start
    for task in tasks:
        rest = {k: v for k, v in task.items() if k != "start_distance_m"}
        assert rest == {k: v for k, v in tasks[0].items() if k != "start_distance_m"}


def test_an_unknown_approach_names_the_choices():
    from qlab.config import override_problem

    problem = override_problem(["approach=nearby"])
    assert problem == f"approach=nearby: no such option; choose from {sorted(APPROACHES)}"


def test_the_approach_names_the_run_folder():
    assert run_name(["approach=mid", "learner=qnet", "series=delay_demo"]) == "approach=mid,learner=qnet"
