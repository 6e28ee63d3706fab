"""One table of a hyperparameter sweep: every setting's IQM final score per shaping arm on chosen seeds.

``qlab-report`` picks each arm's best setting on its own; a learner's defaults must be one
setting for every arm. This table ranks the settings by the mean over arms of the interquartile
mean (IQM) of final success on the given seeds, ties broken by the same mean of the IQM final
discounted return, and names the first as the pick. Duplicate runs (same identity, two folders)
count once. For a task without a success signal (CartPole-v1), ``--return-threshold R`` ranks by the
share of runs whose final undiscounted return reaches ``R`` instead, ties broken by the mean final
return (a failed or unfinished run scores 0).

Usage: ``python scripts/sweep_table.py results/qnet_tuning_dock --seeds 0,1,2,3,4 --learner qnet
[--return-threshold 475] [--out results/qnet_tuning_dock/selection.md]``.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np

from qlab.compare.runs import arm_sort_key, load_study
from qlab.compare.selection import parse_seeds, setting_label, swept_keys
from qlab.compare.stats import iqm


def sweep_table(folder: Path, learner: str, seeds: list[int], return_threshold: float | None = None) -> str:
    """The markdown table of ``learner``'s settings in the study at ``folder``, best first.

    Scores per arm: (IQM final success, IQM final discounted return), or with ``return_threshold``
    (share of runs whose final return reaches it, mean final return).
    """
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
                if return_threshold is None:
                    score = float(iqm(np.array([r.final["success"] for r in group])))
                    tie = float(iqm(np.array([r.final["discounted_return"] for r in group])))
                else:
                    returns = np.array([r.final.get("return", 0.0) for r in group])  # failed or unfinished: 0
                    score, tie = float(np.mean(returns >= return_threshold)), float(np.mean(returns))
                cells.setdefault(label, {})[arm] = (score, tie, len(group))

    def rank(label: str) -> tuple[float, float]:
        scores = [cells[label].get(arm, (0.0, 0.0, 0))[:2] for arm in arms]
        return float(np.mean([s for s, _ in scores])), float(np.mean([r for _, r in scores]))

    order = sorted(cells, key=lambda label: (rank(label), label), reverse=True)
    if return_threshold is None:
        cell_name, rule = "IQM success (return, runs)", ["the mean over arms of the IQM final success (ties: of "
                                                         "the IQM final discounted return); a missing arm counts 0."]
    else:
        cell_name = f"share >= {return_threshold:g} (mean return, runs)"
        rule = [f"the mean over arms of the share of runs whose final return is >= {return_threshold:g} (ties: of",
                "the mean final return); a missing arm counts 0."]
    head = " | ".join(f"`{arm}`: {cell_name}" for arm in arms)
    lines = [f"Sweep of `{learner}` over {', '.join(f'`{k}`' for k in keys)} on seeds {seeds}: settings ranked by",
             *rule, "", f"| setting | mean over arms | {head} |",
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
    parser.add_argument("--return-threshold", type=float,
                        help="rank by the share of runs whose final return reaches this value (tasks without success)")
    parser.add_argument("--out", type=Path, help="also write the table to this markdown file")
    args = parser.parse_args()
    table = sweep_table(args.folder, args.learner, parse_seeds(args.seeds) or [], args.return_threshold)
    print(table, end="")
    if args.out:
        args.out.write_text(table)


if __name__ == "__main__":
    main()
