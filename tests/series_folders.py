"""Hand-made run folders for report tests: a composed config, chosen evaluations, no training.

Each folder holds what :func:`qlab.compare.runs.load_run` reads: ``config.yaml``, ``metrics.csv``
(``eval/success`` and ``eval/discounted_return`` rows), ``summary.json`` (final scores = the last
evaluation, the table's SHA-256) and the ``FINISHED`` marker.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path
from typing import Any

from omegaconf import OmegaConf
from runtools import compose_run

from qlab.recording import file_digest


def base_config(overrides: list[str]) -> dict[str, Any]:
    """A resolved run config composed from the project's configs (``tensorboard=false``)."""
    return OmegaConf.to_container(compose_run([*overrides, "tensorboard=false"]), resolve=True)


def write_run(
    folder: Path, config: dict[str, Any], steps: list[int], success: list[float], returns: list[float],
    diverged_at: int | None = None,
) -> Path:
    """One finished (or, with ``diverged_at``, diverged) run folder with these evaluations at ``steps``."""
    folder.mkdir(parents=True)
    OmegaConf.save(OmegaConf.create(config), folder / "config.yaml")
    with (folder / "metrics.csv").open("w", newline="") as fh:
        out = csv.writer(fh, lineterminator="\n")
        out.writerow(["step", "tag", "value"])
        for step, s, r in zip(steps, success, returns, strict=True):
            out.writerows([(step, "eval/success", repr(float(s))), (step, "eval/discounted_return", repr(float(r)))])
    summary = {"final": {"success": success[-1], "discounted_return": returns[-1]}, "steps": steps[-1],
               "status": "finished" if diverged_at is None else "diverged", "diverged_at_step": diverged_at,
               "metrics_sha256": file_digest(folder / "metrics.csv")}
    (folder / "summary.json").write_text(json.dumps(summary))
    (folder / "FINISHED").write_text("hand-made\n")
    return folder


def with_keys(config: dict[str, Any], **dotted: Any) -> dict[str, Any]:
    """A copy of ``config`` with dotted keys set, e.g. ``with_keys(c, **{"shaping.variant": "potential"})``."""
    tree = OmegaConf.create(config)
    for key, value in dotted.items():
        OmegaConf.update(tree, key, value, force_add=True)
    return OmegaConf.to_container(tree, resolve=True)
