"""The comparison report on tiny real studies: files, embedded figures, failures, colours, statistics, seed split.

The studies are real runs of ``qlab.experiment.run_experiment`` (Dock with a short start distance,
tabular Q-learning, a 1,500-step budget), built once per module.
"""

from __future__ import annotations

import json
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
from hydra import compose, initialize_config_dir
from matplotlib.colors import to_hex
from scipy.stats import trim_mean

from qlab.compare import figures, stats
from qlab.compare.report import main
from qlab.compare.runs import START_AT_POTENTIAL_ARM, eval_matrix, load_study
from qlab.compare.selection import select
from qlab.config import CONFIG_DIR, register_configs
from qlab.experiment import run_experiment

TINY = ["task.start_distance_m=[8,12]", "budget_steps=1500", "evaluation.every_steps=500", "evaluation.episodes=3",
        "learner=tabular", "tensorboard=false"]
ARMS = {"none": "none", "potential": "potential", "potential_start": START_AT_POTENTIAL_ARM}
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (W3C / RFC 2083), section 3.1


def build_study(folder: Path, runs: list[tuple[str, list[str]]]) -> Path:
    register_configs()
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        for name, overrides in runs:
            run_experiment(compose(config_name="config", overrides=TINY + overrides), folder / name, bar=False)
    return folder


@pytest.fixture(scope="module")
def study(tmp_path_factory) -> Path:
    """Three arms x two seeds."""
    runs = [(f"shaping={v},seed={s}", [f"shaping={v}", f"seed={s}"]) for v in ARMS for s in (0, 1)]
    return build_study(tmp_path_factory.mktemp("study"), runs)


@pytest.fixture(scope="module")
def sweep(tmp_path_factory) -> Path:
    """A step-size sweep: two settings x four seeds, unshaped."""
    runs = [(f"alpha={a},seed={s}", [f"learner.step_size.start={a}", f"seed={s}", "budget_steps=1000"])
            for a in (0.05, 0.5) for s in range(4)]
    return build_study(tmp_path_factory.mktemp("sweep"), runs)


@pytest.fixture(scope="module")
def report(study, tmp_path_factory, request) -> tuple[Path, list]:
    """The full report (diagnostics on a small grid), with every figure the report saved."""
    out = tmp_path_factory.mktemp("report")
    saved = []
    original = figures.save_png
    patch = pytest.MonkeyPatch()
    patch.setattr(figures, "save_png", lambda fig, path: saved.append(fig) or original(fig, path))
    request.addfinalizer(patch.undo)
    assert main([str(study), "--out", str(out), "--grid", "21"]) == 0
    return out, saved


def section(markdown: str, title: str) -> str:
    start = markdown.index(f"## {title}")
    end = markdown.find("\n## ", start + 1)
    return markdown[start : end if end >= 0 else None]


def table(text: str) -> list[list[str]]:
    """Rows (cells) of the first pipe table in ``text``, header and separator dropped."""
    rows = [line for line in text.splitlines() if line.startswith("|")]
    return [[c.strip() for c in row.strip("|").split("|")] for row in rows[2:]]


def finals(folder: Path, arm_folder: str, key: str) -> dict[int, float]:
    """Final metric per seed read straight from summary.json; a run that did not finish scores 0."""
    out = {}
    for run in sorted(folder.glob(f"shaping={arm_folder},seed=*")):
        summary = json.loads((run / "summary.json").read_text())
        ok = (run / "FINISHED").exists() and summary["status"] == "finished"
        out[int(run.name.rsplit("=", 1)[1])] = summary["final"][key] if ok else 0.0
    return out


def test_report_files_and_html_embeds_every_figure(report):
    out, _ = report
    markdown = (out / "report.md").read_text()
    page = (out / "report.html").read_text()
    pictures = re.findall(r"!\[[^\]]*\]\(([^)]+)\)", markdown)
    assert {"curves_success.png", "curves_return.png", "final_scores.png", "profiles.png",
            "overestimation.png", "values_tabular.png"} <= set(pictures)
    for name in pictures:
        assert (out / name).read_bytes().startswith(PNG_SIGNATURE)
    sources = re.findall(r'src="([^"]*)"', page)
    assert len(sources) == len(pictures)
    assert all(s.startswith("data:image/png;base64,") for s in sources)
    assert "href=" not in page
    assert "simulation only" in markdown
    assert "| potential |" in section(markdown, "Shaping audit")
    exact_rows = table(section(markdown, "Q-function diagnostics"))
    assert {row[1] for row in exact_rows} == set(ARMS.values())


def test_arm_colours_agree_across_figures(report):
    _, saved = report
    colours: dict[str, set[str]] = {}
    figures_with_arm: dict[str, int] = {}
    for fig in saved:
        seen = set()
        for ax in fig.axes:
            for line in ax.get_lines():
                if not line.get_label().startswith("_"):
                    colours.setdefault(line.get_label(), set()).add(to_hex(line.get_color()))
                    seen.add(line.get_label())
        for arm in seen:
            figures_with_arm[arm] = figures_with_arm.get(arm, 0) + 1
    assert set(colours) == set(ARMS.values())
    assert all(len(c) == 1 for c in colours.values())  # one colour per arm in every figure
    assert len({next(iter(c)) for c in colours.values()}) == len(colours)  # arms told apart
    assert min(figures_with_arm.values()) >= 4  # curves (2), final scores, profiles, overestimation


def test_final_table_is_the_iqm_of_the_summaries(report, study):
    out, _ = report
    rows = table(section((out / "report.md").read_text(), "Final performance"))
    by_arm = {row[1]: row for row in rows}
    for folder_name, arm in ARMS.items():
        success = np.array(list(finals(study, folder_name, "success_rate").values()))
        ret = np.array(list(finals(study, folder_name, "discounted_return").values()))
        # scipy.stats.trim_mean(x, 0.25) is the interquartile mean (Agarwal et al. 2021)
        assert stats.iqm(success) == pytest.approx(trim_mean(success, 0.25))
        assert by_arm[arm][3].split(" [")[0] == f"{stats.iqm(success):.2f}"
        assert by_arm[arm][4].split(" [")[0] == f"{stats.iqm(ret):.3f}"
        assert by_arm[arm][2] == str(len(success))


def test_diverged_and_crashed_runs_count_as_failures(study, tmp_path):
    broken = Path(shutil.copytree(study, tmp_path / "broken"))
    summary_file = broken / "shaping=potential,seed=1" / "summary.json"
    summary = json.loads(summary_file.read_text())
    assert summary["final"]["success_rate"] > 0  # the edit below must change the score
    summary.update(status="diverged", diverged_at_step=1000)
    summary_file.write_text(json.dumps(summary))
    (broken / "shaping=none,seed=0" / "FINISHED").unlink()
    assert main([str(broken), "--no-diagnostics"]) == 0
    markdown = (broken / "report.md").read_text()
    assert "6 runs read: 1 diverged, 1 crashed" in markdown
    runs = {row[1]: row for row in table(section(markdown, "Runs"))}
    assert runs["potential"][2:7] == ["2", "0, 1", "1", "1", "0"]  # reported, seeds, finished, diverged, crashed
    assert runs["none"][2:7] == ["2", "0, 1", "1", "0", "1"]
    final = {row[1]: row for row in table(section(markdown, "Final performance"))}
    success = np.array(list(finals(broken, "potential", "success_rate").values()))
    assert success[1] == 0.0
    assert final["potential"][3].split(" [")[0] == f"{stats.iqm(success):.2f}"
    # the learning curve drops to 0 from the failure step on
    run = next(r for r in load_study(broken).runs if r.status == "diverged")
    steps = np.array([0, 500, 1000, 1500])
    curve = eval_matrix([run], "success_rate", steps)[0]
    recorded = dict(zip(*run.evals["success_rate"], strict=True))
    assert curve[:2].tolist() == [recorded[0], recorded[500]]
    assert curve[2:].tolist() == [0.0, 0.0]


def test_sweep_reports_each_arm_on_seeds_it_was_not_chosen_on(sweep):
    assert main([str(sweep), "--no-diagnostics"]) == 0
    markdown = (sweep / "report.md").read_text()
    assert "chosen by IQM final success on selection seeds [0, 1]" in markdown
    row = table(section(markdown, "Runs"))[0]
    assert row[3] == "2, 3"
    best = select(load_study(sweep), "tabular")
    assert set(best.selection_seeds).isdisjoint(best.report_seeds)
    assert sorted(best.selection_seeds + best.report_seeds) == [0, 1, 2, 3]
    # the chosen step size has the highest IQM final success on seeds 0 and 1 (ties: discounted return, label)
    scores = {}
    for alpha in ("0.05", "0.5"):
        summaries = [json.loads((sweep / f"alpha={alpha},seed={s}" / "summary.json").read_text()) for s in (0, 1)]
        scores[alpha] = (stats.iqm([x["final"]["success_rate"] for x in summaries]),
                         stats.iqm([x["final"]["discounted_return"] for x in summaries]))
    winner = max(sorted(scores), key=lambda a: scores[a])
    assert row[7] == f"learner.step_size.start={float(winner)!r}"
    assert {r.seed for r in best.runs["none"]} == {2, 3}
    assert main([str(sweep), "--no-diagnostics", "--selection-seeds", "3"]) == 0
    assert table(section((sweep / "report.md").read_text(), "Runs"))[0][3] == "0, 1, 2"
    assert main([str(sweep), "--no-diagnostics", "--selection-seeds", "0,1,2,3"]) == 2  # nothing left to report
