"""One table of a hyperparameter sweep: every setting's IQM final score per shaping arm on chosen seeds.

``qlab-report`` picks each arm's best setting on its own; a learner's defaults must be one
setting for every arm. This table ranks the settings by the mean over arms of the interquartile
mean (IQM) of final success on the given seeds, ties broken by the same mean of the IQM final
discounted return, and names the first as the pick. Duplicate runs (same identity, two folders)
count once.

Usage: ``python scripts/sweep_table.py results/qnet_tuning_dock --seeds 0,1,2,3,4 --learner qnet
[--out results/qnet_tuning_dock/selection.md]``.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np

from qlab.compare.runs import arm_sort_key, load_study
from qlab.compare.selection import parse_seeds, setting_label, swept_keys
from qlab.compare.stats import iqm


def sweep_table(folder: Path, learner: str, seeds: list[int]) -> str:
    """The markdown table of ``learner``'s settings in the study at ``folder``, best first."""
    runs = [r for r in load_study(folder).runs if r.learner == learner and r.seed in seeds]
    if not runs:
        raise SystemExit(f"no runs of learner {learner!r} on seeds {seeds} in {folder}")
    keys = swept_keys(runs)
    arms = sorted({r.arm for r in runs}, key=arm_sort_key)
    cells: dict[str, dict[str, tuple[float, float, int]]] = {}
    for label in sorted({setting_label(r, keys) for r in runs}):
        for arm in arms:
            group = [r for r in runs if r.arm == arm and setting_label(r, keys) == label]
            if group:
                success = np.array([r.final["success"] for r in group])
                ret = np.array([r.final["discounted_return"] for r in group])
                cells.setdefault(label, {})[arm] = (float(iqm(success)), float(iqm(ret)), len(group))

    def rank(label: str) -> tuple[float, float]:
        scores = [cells[label].get(arm, (0.0, 0.0, 0))[:2] for arm in arms]
        return float(np.mean([s for s, _ in scores])), float(np.mean([r for _, r in scores]))

    order = sorted(cells, key=lambda label: (rank(label), label), reverse=True)
    head = " | ".join(f"`{arm}`: IQM success (return, runs)" for arm in arms)
    lines = [f"Sweep of `{learner}` over {', '.join(f'`{k}`' for k in keys)} on seeds {seeds}: settings ranked by",
             "the mean over arms of the IQM final success (ties: of the IQM final discounted return); a missing",
             "arm counts 0.", "", f"| setting | mean over arms | {head} |",
             "|---|---|" + "---|" * len(arms)]
    for label in order:
        row = [f"{cells[label][a][0]:.2f} ({cells[label][a][1]:.3f}, {cells[label][a][2]})" if a in cells[label]
               else "-" for a in arms]
        lines.append(f"| {label} | {rank(label)[0]:.2f} | " + " | ".join(row) + " |")
    lines += ["", f"Pick: {order[0]}"]
    return "\n".join(lines) + "\n"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("folder", type=Path)
    parser.add_argument("--learner", required=True)
    parser.add_argument("--seeds", required=True, help="comma-separated seeds the table is computed on")
    parser.add_argument("--out", type=Path, help="also write the table to this markdown file")
    args = parser.parse_args()
    table = sweep_table(args.folder, args.learner, parse_seeds(args.seeds) or [])
    print(table, end="")
    if args.out:
        args.out.write_text(table)


if __name__ == "__main__":
    main()
