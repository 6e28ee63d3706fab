"""A sweep's events read back through a real tensorboard server, over its HTTP data API, as the browser does.

The routes are tensorboard's own (``/data/runs``, the scalars plugin, the hparams plugin's
``experiment`` and ``session_groups``, POSTed JSON as its frontend sends): internal, hence the
version range pinned in pyproject.toml.
"""

from __future__ import annotations

import json
import subprocess
import sys
import urllib.parse
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import numpy as np
from loopback import LOOPBACK, free_ports, http_json, stop_session, wait_for
from omegaconf import OmegaConf
from runtools import TINY, shell
from test_ray_launcher import run_folders

from qlab.config import flatten
from qlab.recording import read_metrics

ALL_STATUSES = ["STATUS_UNKNOWN", "STATUS_SUCCESS", "STATUS_FAILURE", "STATUS_RUNNING"]


@contextmanager
def tensorboard_server(logdir: Path, log: Path) -> Iterator[str]:
    """``python -m tensorboard.main`` on a free loopback port; yields its base URL, stops it (and its helpers) after."""
    port = free_ports(1)[0]
    args = [sys.executable, "-m", "tensorboard.main", "--logdir", str(logdir), "--host", LOOPBACK, "--port", str(port)]
    with log.open("w") as out:
        server = subprocess.Popen(args, stdout=out, stderr=subprocess.STDOUT, start_new_session=True)
    try:
        yield f"http://{LOOPBACK}:{port}"
    finally:
        stop_session(server, grace_s=10)


def answers(url: str) -> object:
    """The JSON at ``url``, or None while the server is not up yet."""
    try:
        return http_json(url)
    except OSError:
        return None


def float32(values: list[float]) -> list[np.float32]:
    """Values as tensorboard stores them."""
    return [np.float32(v) for v in values]


def as_shown(value: object) -> object:
    """A setting as the hparams view shows it: numbers (and flags) as numbers, anything else as text."""
    return float(value) if isinstance(value, int | float) else value if isinstance(value, str) else str(value)


def test_tensorboard_server_shows_runs_scalars_and_hparams_of_a_sweep(tmp_path):
    shell(["-m", "learner=tabular,linear", "series_name=board", f"results_dir={tmp_path}", *TINY], tmp_path)
    runs = run_folders(tmp_path / "board")
    assert len(runs) == 2
    tags = {name: {t for _, t, _ in read_metrics(run)} for name, run in runs.items()}
    finals = {name: json.loads((run / "summary.json").read_text())["final"] for name, run in runs.items()}
    expected_tags = {**{f"{name}/tb": tags[name] for name in runs},
                     **{f"{name}/tb/hparams": {f"final/{k}" for k in finals[name]} for name in runs}}

    with tensorboard_server(tmp_path / "board", tmp_path / "tensorboard.log") as base:
        def loaded() -> dict | None:  # events load in the background: wait until every run shows all its tags
            board = answers(f"{base}/data/plugin/scalars/tags")
            return board if board and {run: set(t) for run, t in board.items()} == expected_tags else None

        board_tags = wait_for(loaded, 120, "tensorboard loading the sweep")
        assert set(http_json(f"{base}/data/runs")) == set(expected_tags)
        assert set(board_tags) == set(expected_tags)

        name, run = sorted(runs.items())[0]
        query = urllib.parse.urlencode({"run": f"{name}/tb", "tag": "eval/discounted_return"})
        series = http_json(f"{base}/data/plugin/scalars/scalars?{query}")  # [[wall time, step, value], ...]
        table = [(s, v) for s, t, v in read_metrics(run) if t == "eval/discounted_return"]
        assert len(table) >= 3
        assert [s for _, s, _ in series] == [s for s, _ in table]
        assert float32([v for _, _, v in series]) == float32([v for _, v in table])

        experiment = http_json(f"{base}/data/plugin/hparams/experiment",
                               {"experimentName": "", "includeMetrics": True})
        settings = {name: flatten(OmegaConf.to_container(OmegaConf.load(run / "config.yaml"))) for name, run in
                    runs.items()}
        # The view's columns: tensorboard takes them from one run's experiment summary (torch writes one
        # per run), so a mixed-learner sweep shows one learner's settings as columns.
        assert {h["name"] for h in experiment["hparamInfos"]} in [set(s) for s in settings.values()]
        assert {m["name"]["tag"] for m in experiment["metricInfos"]} == {f"final/{k}" for k in finals[name]}

        groups = http_json(f"{base}/data/plugin/hparams/session_groups",
                           {"experimentName": "", "allowedStatuses": ALL_STATUSES, "startIndex": 0,
                            "sliceSize": 100, "includeMetrics": True})
        by_run = {g["name"].removesuffix("/tb/hparams"): g for g in groups["sessionGroups"]}
        assert sorted(by_run) == sorted(runs)
        for name, group in by_run.items():
            assert group["hparams"] == {k: as_shown(v) for k, v in settings[name].items()}
            shown = {m["name"]["tag"]: m["value"] for m in group["metricValues"]}
            assert sorted(shown) == sorted(f"final/{k}" for k in finals[name])
            assert float32([shown[f"final/{k}"] for k in sorted(finals[name])]) == float32(
                [finals[name][k] for k in sorted(finals[name])])
