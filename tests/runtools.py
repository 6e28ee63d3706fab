"""Shared helpers of the tests that drive runs: tiny settings, the shell command, readers of what a run left."""

from __future__ import annotations

import subprocess
import sys
from collections import Counter
from pathlib import Path

import pytest
from hydra import compose, initialize_config_dir

from qlab.config import CONFIG_DIR, register_configs
from qlab.recording import read_metrics

QLAB_RUN = str(Path(sys.executable).parent / "qlab-run")
TINY = [
    "task.start_distance_m=[8.0,12.0]",
    "task.max_steps=100",
    "budget_steps=1600",
    "evaluation.every_steps=400",
    "evaluation.episodes=3",
    "checkpoint_every_episodes=2",
]


def compose_run(overrides: list[str]):
    register_configs()
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return compose(config_name="config", overrides=overrides)


def shell(args: list[str], cwd: Path, check: bool = True) -> subprocess.CompletedProcess:
    done = subprocess.run([QLAB_RUN, *args], cwd=cwd, capture_output=True, text=True, timeout=600)
    if check and done.returncode != 0:
        raise AssertionError(f"qlab-run {args} failed ({done.returncode}):\n{done.stdout}\n{done.stderr}")
    return done


def tensorboard_scalars(run_dir: Path) -> list[tuple[int, str, float]]:
    """Scalars as tensorboard's own reader sees them (purged events dropped)."""
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    acc = EventAccumulator(str(run_dir / "tb"), size_guidance={"scalars": 0})
    acc.Reload()
    return [(e.step, tag, e.value) for tag in acc.Tags()["scalars"] for e in acc.Scalars(tag)]


def measured(run_dir: Path) -> list[tuple[int, str, float]]:
    """Metrics rows minus wall-clock speed, which no two runs share."""
    return [row for row in read_metrics(run_dir) if not row[1].startswith("speed/")]


def assert_tensorboard_matches_csv(run_dir: Path) -> None:
    table = read_metrics(run_dir)
    board = tensorboard_scalars(run_dir)
    assert Counter((s, t) for s, t, _ in board) == Counter((s, t) for s, t, _ in table)
    by_key = {(s, t): v for s, t, v in table}
    for step, tag, value in board:  # tensorboard stores float32
        assert value == pytest.approx(by_key[(step, tag)], rel=1e-6, abs=1e-6)
