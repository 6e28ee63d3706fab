"""The comparison report on tiny real studies: files, embedded figures, failures, colours, statistics, seed split,
task settings reported apart.

The studies are real runs of ``qlab.experiment.run_experiment`` (Dock with a short start distance,
tabular Q-learning, a budget of 1,000 or 1,500 steps), built once per module.
"""

from __future__ import annotations

import csv
import json
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg
from hydra import compose, initialize_config_dir
from matplotlib.colors import to_hex
from omegaconf import OmegaConf
from scipy.stats import mannwhitneyu, trim_mean, uniform
from test_markup import Page

from qlab.compare import figures, stats
from qlab.compare.exact import restore
from qlab.compare.report import main
from qlab.compare.runs import (
    MAX_SETTING_NAME,
    START_AT_POTENTIAL_ARM,
    Run,
    eval_matrix,
    load_study,
    setting_folder,
)
from qlab.compare.selection import select, swept_keys
from qlab.config import CONFIG_DIR, register_configs
from qlab.experiment import run_experiment
from qlab.recording import file_digest

TINY = ["task.start_distance_m=[8,12]", "budget_steps=1500", "evaluation.every_steps=500", "evaluation.episodes=3",
        "learner=tabular", "tensorboard=false", "copies=1"]
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


#: the two task settings of the ``delay`` study: (start_distance_m override, report folder name)
DELAYS = {"near": ("[8.0,12.0]", "task.start_distance_m=8.0-12.0"),
          "far": ("[10.0,14.0]", "task.start_distance_m=10.0-14.0")}


@pytest.fixture(scope="module")
def delay(tmp_path_factory) -> Path:
    """Two task settings (start distance ranges) x two shaping variants x two seeds, 1,000 steps."""
    runs = [(f"delay={d},shaping={v},seed={s}",
             [f"task.start_distance_m={DELAYS[d][0]}", f"shaping={v}", f"seed={s}", "budget_steps=1000"])
            for d in DELAYS for v in ("none", "potential") for s in (0, 1)]
    folder = tmp_path_factory.mktemp("delay")
    register_configs()
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        base = [o for o in TINY if not o.startswith("task.start_distance_m=")]
        for name, overrides in runs:
            run_experiment(compose(config_name="config", overrides=base + overrides), folder / name, bar=False)
    return folder


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
        success = np.array(list(finals(study, folder_name, "success").values()))
        ret = np.array(list(finals(study, folder_name, "discounted_return").values()))
        # scipy.stats.trim_mean(x, 0.25) is the interquartile mean (Agarwal et al. 2021)
        assert stats.iqm(success) == pytest.approx(trim_mean(success, 0.25))
        assert by_arm[arm][3].split(" [")[0] == f"{stats.iqm(success):.2f}"
        assert by_arm[arm][4].split(" [")[0] == f"{stats.iqm(ret):.3f}"
        assert by_arm[arm][2] == str(len(success))


AGAINST_START = "Potential shaping against Q started at Phi"


def test_potential_is_set_against_q_started_at_phi(report, study):
    out, _ = report
    markdown = (out / "report.md").read_text()
    rows = table(section(markdown, AGAINST_START))
    assert [row[0] for row in rows] == ["tabular"]
    row = rows[0]
    intervals = []
    for column, key in ((1, "success"), (2, "discounted_return")):
        shaped = np.array(list(finals(study, "potential", key).values()))
        start = np.array(list(finals(study, "potential_start", key).values()))
        p = stats.probability_of_improvement(shaped, start)
        # scipy.stats.mannwhitneyu: U of the first sample counts pairs it wins, ties half (Mann & Whitney 1947),
        # so U / (n m) = P(X > Y) + P(X = Y) / 2
        assert p == pytest.approx(mannwhitneyu(shaped, start).statistic / (shaped.size * start.size))
        low, high = stats.probability_of_improvement_ci(shaped, start, 0.95, seed=0)
        assert row[column] == f"{p:.2f} [{low:.2f}, {high:.2f}]"
        intervals.append((low, high))
        if key == "success":
            # scipy.stats.trim_mean(x, 0.25) is the interquartile mean (Agarwal et al. 2021)
            a, b = trim_mean(shaped, 0.25), trim_mean(start, 0.25)
            assert row[5] == f"{a:.2f} - {b:.2f} = {a - b:+.2f}"
            summary = section(markdown, "Summary")
            assert f"P(`potential` beats `{START_AT_POTENTIAL_ARM}`) on final success {row[1]}" in summary
    medians = []
    for arm in ("potential", "potential_start"):
        first = [first_reach(r) for r in sorted(study.glob(f"shaping={arm},seed=*"))]
        # never reached: censored, infinitely many steps; half or more censored: only "> budget" (1,500 steps)
        median = np.median([np.inf if f is None else f for f in first])
        medians.append("> 1,500" if 2 * sum(f is None for f in first) >= len(first) else f"{median:,.0f}")
    assert row[3] == " / ".join(medians)
    if medians[0] == medians[1] and not medians[0].startswith(">"):
        assert row[4].startswith(f"the same median steps as `{START_AT_POTENTIAL_ARM}` (median runs; speed-up 1.00 [")
    if all(low <= 0.5 <= high for low, high in intervals):
        assert row[6] == "indistinguishable (interval covers 0.5): consistent with Wiewiora (2003)"
    for low, high in intervals:
        if low > 0.5:
            assert "`potential` better" in row[6]
        if high < 0.5:
            assert f"`{START_AT_POTENTIAL_ARM}` better" in row[6]


@pytest.mark.parametrize("dropped", ["potential", "potential_start"])
def test_against_start_section_needs_both_arms(study, tmp_path, dropped):
    kept = Path(shutil.copytree(study, tmp_path / "kept", ignore=shutil.ignore_patterns(f"shaping={dropped},seed=*")))
    assert main([str(kept), "--no-diagnostics"]) == 0
    markdown = (kept / "report.md").read_text()
    assert {row[1] for row in table(section(markdown, "Final performance"))} == set(ARMS.values()) - {ARMS[dropped]}
    assert f"## {AGAINST_START}" not in markdown
    assert f"against `{START_AT_POTENTIAL_ARM}`" not in markdown


def test_diverged_and_crashed_runs_count_as_failures(study, tmp_path):
    broken = Path(shutil.copytree(study, tmp_path / "broken"))
    summary_file = broken / "shaping=potential,seed=1" / "summary.json"
    summary = json.loads(summary_file.read_text())
    assert summary["final"]["success"] > 0  # the edit below must change the score
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
    success = np.array(list(finals(broken, "potential", "success").values()))
    assert success[1] == 0.0
    assert final["potential"][3].split(" [")[0] == f"{stats.iqm(success):.2f}"
    # the learning curve drops to 0 from the failure step on
    run = next(r for r in load_study(broken).runs if r.status == "diverged")
    steps = np.array([0, 500, 1000, 1500])
    curve = eval_matrix([run], "success", steps)[0]
    recorded = dict(zip(*run.evals["success"], strict=True))
    assert curve[:2].tolist() == [recorded[0], recorded[500]]
    assert curve[2:].tolist() == [0.0, 0.0]


def test_finished_runs_without_a_checkpoint_are_not_called_failed(study, tmp_path):
    # a clone of a committed study has no checkpoints (they are never committed): say so, not "failed"
    copied = Path(shutil.copytree(study, tmp_path / "copied"))
    shutil.rmtree(copied / "shaping=none,seed=0" / "checkpoint")
    assert main([str(copied), "--grid", "21"]) == 0
    markdown = (copied / "report.md").read_text()
    assert "1 finished run(s) without a checkpoint (its learner cannot be restored) left out of the errors" in markdown
    assert "failed run(s)" not in markdown


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
        scores[alpha] = (stats.iqm([x["final"]["success"] for x in summaries]),
                         stats.iqm([x["final"]["discounted_return"] for x in summaries]))
    winner = max(sorted(scores), key=lambda a: scores[a])
    assert row[7] == f"learner.step_size.start={float(winner)!r}"
    assert {r.seed for r in best.runs["none"]} == {2, 3}
    assert main([str(sweep), "--no-diagnostics", "--selection-seeds", "3"]) == 0
    assert table(section((sweep / "report.md").read_text(), "Runs"))[0][3] == "0, 1, 2"
    assert main([str(sweep), "--no-diagnostics", "--selection-seeds", "0,1,2,3"]) == 2  # nothing left to report


def read_eval(run: Path, tag: str) -> dict[int, float]:
    """Evaluation ``tag`` by step, read straight from the run's metrics.csv."""
    with (run / "metrics.csv").open(newline="") as fh:
        return {int(r["step"]): float(r["value"]) for r in csv.DictReader(fh) if r["tag"] == f"eval/{tag}"}


def first_reach(run: Path, threshold: float = 0.5) -> int | None:
    """First evaluation step with success rate >= threshold, read from metrics.csv; None if never reached."""
    return min((s for s, v in read_eval(run, "success").items() if v >= threshold), default=None)


def shift_returns(run: Path, by: float) -> None:
    """Add ``by`` to every evaluation discounted return of a run folder, in metrics.csv and summary.json."""
    path = run / "metrics.csv"
    with path.open(newline="") as fh:
        rows = list(csv.DictReader(fh))
    for row in rows:
        if row["tag"] == "eval/discounted_return":
            row["value"] = repr(float(row["value"]) + by)
    with path.open("w", newline="") as fh:
        writer = csv.DictWriter(fh, fieldnames=list(rows[0]))
        writer.writeheader()
        writer.writerows(rows)
    summary = json.loads((run / "summary.json").read_text())
    summary["final"]["discounted_return"] += by
    summary["metrics_sha256"] = file_digest(path)  # as if the run had recorded these values
    (run / "summary.json").write_text(json.dumps(summary))


def test_task_settings_get_their_own_reports_and_tables_across(delay, monkeypatch):
    saved = []
    original = figures.save_png
    monkeypatch.setattr(figures, "save_png", lambda fig, path: saved.append(fig) or original(fig, path))
    assert main([str(delay), "--no-diagnostics"]) == 0
    study = load_study(delay)
    assert len(study.runs) == 8 and study.unreadable == []  # the report folders are not read as runs
    markdown = (delay / "report.md").read_text()
    page = (delay / "report.html").read_text()
    folders = [folder for _, folder in DELAYS.values()]
    assert re.findall(r"\]\(([^)]+)/report\.md\)", section(markdown, "Task settings")) == folders
    for folder in folders:
        assert f'href="{folder}/report.html"' in page
        sub = (delay / folder / "report.md").read_text()
        assert "**tabular**: no hyperparameter sweep" in sub  # the start distance is not a hyperparameter
        assert {row[2] for row in table(section(sub, "Final performance"))} == {"2"}
        assert (delay / folder / "report.html").exists()
    iqm_rows = {row[1]: row for row in table(section(markdown, "Final success across task settings"))}
    steps_text = section(markdown, "Steps to a success rate of 0.5 across task settings")
    steps_rows = {row[1]: row for row in table(steps_text)}
    assert set(iqm_rows) == set(steps_rows) == {"none", "potential"}
    for arm in iqm_rows:
        for column, delay_name in enumerate(DELAYS):
            runs = sorted(delay.glob(f"delay={delay_name},shaping={arm},seed=*"))
            success = [json.loads((r / "summary.json").read_text())["final"]["success"] for r in runs]
            # scipy.stats.trim_mean(x, 0.25) is the interquartile mean (Agarwal et al. 2021)
            iqm_cell = iqm_rows[arm][2 + column]
            assert iqm_cell.split(" [")[0] == f"{trim_mean(success, 0.25):.2f}" == f"{stats.iqm(success):.2f}"
            # first evaluation with success >= 0.5, a run that never reaches it at the 1,000-step budget
            first = [min((s for s, v in read_eval(r, "success").items() if v >= 0.5), default=None) for r in runs]
            censored = sum(f is None for f in first)
            median = np.median([np.inf if f is None else f for f in first])  # never reached: infinitely many steps
            steps_cell = steps_rows[arm][2 + column]
            if 2 * censored >= len(runs):
                assert steps_cell == "> 1,000"  # a bound, no interval
            else:
                assert steps_cell.split(" [")[0] == f"{median:,.0f}"
    assert "![steps_by_task_setting](steps_by_task_setting.png)" in markdown
    assert (delay / "steps_by_task_setting.png").read_bytes().startswith(PNG_SIGNATURE)
    ax = saved[-1].axes[0]
    assert ax.get_xlabel() == "task.start_distance_m, far end of the range"
    assert list(ax.get_xticks()) == [12.0, 14.0]  # far ends of [8, 12] and [10, 14]


def test_swept_keys_ignore_task_settings(delay, sweep):
    study = load_study(delay)
    assert swept_keys(study.runs) == []
    assert swept_keys(load_study(sweep).runs) == ["learner.step_size.start"]
    with pytest.raises(ValueError, match="task setting"):
        select(study, "tabular")  # runs of two task settings are never pooled


def test_a_setting_added_after_some_runs_is_not_a_swept_key(sweep):
    runs = load_study(sweep).runs
    for run in runs[::2]:  # as if these ran before the setting existed: their configs lack it
        del run.flat["learner.step_size_count"]
    assert swept_keys(runs) == ["learner.step_size.start"]
    runs[1].flat["learner.step_size_count"] = "visits"  # two values among the runs that have it: swept
    assert swept_keys(runs) == ["learner.step_size.start", "learner.step_size_count"]


def test_runs_made_before_a_recorded_setting_existed_carry_the_value_they_computed_with(tmp_path):
    # standardise_unbounded came in with default true, the earlier behaviour, and later became false:
    # old runs must not be pooled with new ones as if they had computed the same thing
    def run(learner: dict) -> Run:
        return Run("r", tmp_path, OmegaConf.create({"seed": 0, "learner": learner}), "finished", None, {}, {})

    old = run({"kind": "qnet", "scale_inputs": True})
    new = run({"kind": "qnet", "scale_inputs": True, "standardise_unbounded": False})
    assert old.flat["learner.standardise_unbounded"] is True
    assert "learner.standardise_unbounded" not in run({"kind": "tabular"}).flat  # a setting of the Q-network only
    assert swept_keys([old, new]) == ["learner.standardise_unbounded"]


def test_failures_score_the_worst_return_of_their_task_setting(delay, tmp_path):
    broken = Path(shutil.copytree(delay, tmp_path / "broken"))
    for run in broken.glob("delay=*"):
        shift_returns(run, -1.0 if "delay=near" in run.name else -3.0)  # negative returns, the far ones lower
    diverged = broken / "delay=near,shaping=potential,seed=1"
    summary = json.loads((diverged / "summary.json").read_text())
    summary.update(status="diverged", diverged_at_step=500)
    (diverged / "summary.json").write_text(json.dumps(summary))
    crashed = broken / "delay=near,shaping=none,seed=0"
    (crashed / "FINISHED").unlink()
    near = [r for r in sorted(broken.glob("delay=near,*")) if r not in (diverged, crashed)]
    # the rule (qlab/compare/runs.py docstring): min(0, worst observed in the same task setting), read from the files
    worst_final = min(0.0, *(json.loads((r / "summary.json").read_text())["final"]["discounted_return"] for r in near))
    observed = [read_eval(r, "discounted_return") for r in [*near, crashed]]
    worst = {step: min(0.0, *(o[step] for o in observed if step in o)) for step in (500, 1000)}
    assert worst_final < 0.0  # scoring the failure 0 would flatter it
    runs = {r.name: r for r in load_study(broken).runs}
    run = runs[diverged.name]
    assert run.final["success"] == 0.0
    assert run.final["discounted_return"] == pytest.approx(worst_final)
    assert runs[crashed.name].final["discounted_return"] == pytest.approx(worst_final)
    curve = eval_matrix([run], "discounted_return", np.array([0, 500, 1000]))[0]
    assert curve.tolist() == pytest.approx([read_eval(diverged, "discounted_return")[0], worst[500], worst[1000]])
    assert eval_matrix([run], "success", np.array([500, 1000]))[0].tolist() == [0.0, 0.0]
    assert main([str(broken), "--no-diagnostics"]) == 0
    final = {row[1]: row for row in table(section((broken / DELAYS["near"][1] / "report.md").read_text(),
                                                  "Final performance"))}
    kept = json.loads((broken / "delay=near,shaping=potential,seed=0" / "summary.json").read_text())
    assert final["potential"][4].split(" [")[0] == f"{stats.iqm([kept['final']['discounted_return'], worst_final]):.3f}"


def test_setting_folder_names_are_short_safe_and_distinct():
    names = [setting_folder({"task.id": "qlab/Dock-v0", "task.start_distance_m": (10.0 + i, 20.0)}) for i in range(2)]
    names += [setting_folder({"task.schedule_k": tuple(range(60 + i))}) for i in range(2)]  # far over the limit
    assert len(set(names)) == len(names)
    assert all(len(n) <= MAX_SETTING_NAME and re.fullmatch(r"[A-Za-z0-9=,._+\-]+", n) for n in names)
    assert names[0] == setting_folder({"task.id": "qlab/Dock-v0", "task.start_distance_m": (10.0, 20.0)})


#: hostile names: the study folder, an unreadable folder in it ("/" cannot be in a folder name) and config strings
HOSTILE_STUDY = "<img src=x onerror=alert(1)> *study* [x](javascript:alert(1))"
HOSTILE_FOLDER = "<script>alert(1)"
HOSTILE_NOTES = {"none": "a|b <script>alert(1)", "potential": "[y](javascript:alert(2))",
                 "potential_start": "*bold* `tick` &amp;"}


def hostile_copy(study: Path, tmp_path: Path) -> Path:
    """The study copied under a hostile folder name, each arm given its own hostile ``learner.note`` (a sweep key)."""
    folder = Path(shutil.copytree(study, tmp_path / HOSTILE_STUDY))
    (folder / HOSTILE_FOLDER).mkdir()
    for arm_folder, note in HOSTILE_NOTES.items():
        for run in folder.glob(f"shaping={arm_folder},seed=*"):
            config = OmegaConf.load(run / "config.yaml")
            config.learner.note = note
            OmegaConf.save(config, run / "config.yaml")
    return folder


def assert_inert(page: Page) -> None:
    """No script, no event handler, no link target, and images only the embedded PNG figures."""
    assert "script" not in page.tags()
    assert not any(key.startswith("on") for _, attrs, _ in page.elements for key in attrs)
    for attrs, _ in page.find("img"):
        assert attrs["src"].startswith("data:image/png;base64,")


def test_hostile_names_come_out_as_text_in_a_real_report(study, tmp_path):
    folder = hostile_copy(study, tmp_path)
    assert main([str(folder), "--no-diagnostics"]) == 0
    # html.parser (Python standard library) decodes the page as a browser does
    page = Page((folder / "report.html").read_text())
    assert_inert(page)
    assert all(attrs.get("href") is None for attrs, _ in page.find("a"))
    assert page.find("h1") == [({}, f"Comparison report: {HOSTILE_STUDY}")]
    notes = [t for _, t in page.find("li")]
    assert f"Folders without a readable config.yaml, not read as runs: {HOSTILE_FOLDER}." in notes
    cells = [t for _, t in page.find("td")]
    rows = [cells[i : i + 8] for i in range(0, 8 * len(ARMS), 8)]  # the Runs table comes first, 8 cells a row
    assert {row[1]: row[7] for row in rows} == {ARMS[a]: f"learner.note={note!r}" for a, note in HOSTILE_NOTES.items()}
    assert "tabular sweeps learner.note: each arm" in "".join(t for _, t in page.find("li"))


def test_a_hostile_study_name_links_back_as_text(delay, tmp_path):
    def reports(where: str, names: list[str]) -> list[str]:
        """What the delay study's own test wrote beside its runs: left out of the copy."""
        return [n for n in names if not n.startswith("delay=")] if Path(where) == delay else []

    folder = Path(shutil.copytree(delay, tmp_path / HOSTILE_STUDY, ignore=reports))
    assert main([str(folder), "--no-diagnostics"]) == 0
    top = Page((folder / "report.html").read_text())
    assert_inert(top)
    assert top.find("h1") == [({}, f"Comparison report: {HOSTILE_STUDY}")]
    for _, setting_folder_name in DELAYS.values():
        page = Page((folder / setting_folder_name / "report.html").read_text())
        assert_inert(page)
        assert [(attrs.get("href"), text) for attrs, text in page.find("a")] == [("../report.html", HOSTILE_STUDY)]


LQ_TINY = ["task=linear_quadratic", "learner=lstdq", "learner.features=quadratic", "learner.refit_every=250",
           "task.max_steps=100", "gamma=0.95", "budget_steps=1000", "evaluation.every_steps=500",
           "evaluation.episodes=3", "tensorboard=false", "copies=4"]


def test_lq_study_gets_the_closed_form_section_with_maps(tmp_path, monkeypatch):
    folder = tmp_path / "lq"
    register_configs()
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        for seed in (0, 1):
            run_experiment(compose(config_name="config", overrides=[*LQ_TINY, f"seed={seed}"]), folder / f"seed={seed}",
                           bar=False)
    saved = []
    original = figures.save_png
    monkeypatch.setattr(figures, "save_png", lambda fig, path: saved.append((path.name, fig)) or original(fig, path))
    out = tmp_path / "report"
    assert main([str(folder), "--out", str(out)]) == 0
    markdown = (out / "report.md").read_text()
    text = section(markdown, "Q-function diagnostics")
    assert "### Linear-quadratic: learned Q against the closed form" in text
    [row] = table(text)
    assert row[:3] == ["lstdq", "none", "2"]
    assert float(row[8]) < 1e-8  # quadratic features span Q*: no approximation error
    assert row[9] == row[7]  # so the remainder is the whole error
    losses = []
    for run in load_study(folder).runs:
        learner, task = restore(run)
        K, root = learner.head.gain, np.sqrt(0.95)
        P = scipy.linalg.solve_discrete_are(root * task.A, root * task.B, task.Q, task.R)  # scipy, discounted DARE
        # scipy.linalg.solve_discrete_lyapunov: cost-to-go matrix of u = -K x
        P_K = scipy.linalg.solve_discrete_lyapunov(root * (task.A - task.B @ K).T, task.Q + K.T @ task.R @ K)
        moment = np.diag(uniform(loc=-1.0, scale=2.0).var() * np.ones(2))  # scipy.stats.uniform: x0 ~ U[-1, 1]^2
        losses.append(np.trace((P_K - P) @ moment))
    # scipy.stats.trim_mean(x, 0.25) is the interquartile mean (Agarwal et al. 2021)
    assert row[10] == f"{trim_mean(losses, 0.25):.3g}"
    assert "![lq_values_lstdq](lq_values_lstdq.png)" in markdown
    assert (out / "lq_values_lstdq.png").read_bytes().startswith(PNG_SIGNATURE)
    fig = dict(saved)["lq_values_lstdq.png"]
    maps = [ax for ax in fig.axes if ax.get_images()]
    assert len(maps) == 3
    labels = {(ax.get_xlabel(), ax.get_ylabel()) for ax in maps}
    assert labels == {("state x1: position (m)", "state x2: velocity (m/s)")}
