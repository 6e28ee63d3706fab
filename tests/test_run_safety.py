"""Results are never destroyed without being asked, and every failure is named in one line.

Each case here was found by trying qlab as a new user would (bad settings, damaged files, a
second process, signals). Every test asserts the message a user reads and that no finished
data was lost. Damaged files are made by the tests themselves.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
from runtools import QLAB_RUN, TINY, compose_run, measured, shell

from qlab import runfolder
from qlab.compare.markup import md_literal
from qlab.compare.runs import load_study
from qlab.config import override_problem, to_container
from qlab.recording import file_digest
from qlab.runspec import STORAGE_KEYS, build_run, run_digest, run_name

SERIES = "safe"


def runs_of(root: Path, series: str = SERIES) -> list[Path]:
    return sorted(p for p in (root / series).iterdir() if not p.name.startswith("."))


def finished_run(tmp_path: Path, *extra: str) -> tuple[list[str], Path]:
    args = [f"series_name={SERIES}", f"results_dir={tmp_path}", *TINY, *extra]
    shell(args, tmp_path)
    (run,) = runs_of(tmp_path)
    return args, run


def assert_one_line(done: subprocess.CompletedProcess, *needles: str) -> None:
    text = done.stderr.strip()
    assert "Traceback" not in done.stderr, done.stderr
    for needle in needles:
        assert needle in text, text


# --- run identity: one list, tested -----------------------------------------------------------

STORAGE_OVERRIDES = {
    "results_dir": "results_dir=elsewhere",
    "series_name": "series_name=other",
    "tensorboard": "tensorboard=false",
    "checkpoint_every_episodes": "checkpoint_every_episodes=5",
    "torch_threads": "torch_threads=2",
    "max_learner_mib": "max_learner_mib=64",
}
COMPUTING_OVERRIDES = ["seed=1", "budget_steps=999", "learner=linear", "shaping=potential", "task=crane",
                       "task.mass_kg=2100", "gamma=0.98", "evaluation.episodes=7", "learner.bins=[30]"]


def test_every_storage_key_is_tested():
    assert set(STORAGE_OVERRIDES) | {"study_name", "learner.torch_threads"} == set(STORAGE_KEYS)


@pytest.mark.parametrize("override", list(STORAGE_OVERRIDES.values()))
def test_storage_settings_change_neither_digest_nor_folder_name(override):
    base, changed = to_container(compose_run([])), to_container(compose_run([override]))
    assert run_digest(changed) == run_digest(base)
    assert run_name([override, "seed=3"]) == run_name(["seed=3"])


@pytest.mark.parametrize("override", COMPUTING_OVERRIDES)
def test_computing_settings_change_the_digest(override):
    assert run_digest(to_container(compose_run([override]))) != run_digest(to_container(compose_run([])))


@pytest.mark.parametrize("extra", ["tensorboard=false", "torch_threads=2", "checkpoint_every_episodes=5"])
def test_rerun_with_a_storage_setting_skips_the_finished_run(tmp_path, extra):
    args, run = finished_run(tmp_path)
    before = measured(run)
    done = shell([*args, extra], tmp_path)
    assert "already finished" in done.stderr
    assert runs_of(tmp_path) == [run] and measured(run) == before


def test_changed_settings_move_the_old_run_aside(tmp_path):
    args, run = finished_run(tmp_path)
    before = measured(run)
    (run / "config.hash").write_text("0000\n")  # as if the code behind this folder had computed something else
    done = shell(args, tmp_path)
    assert_one_line(done, "settings changed", ".replaced")
    (kept,) = list((tmp_path / SERIES / ".replaced").iterdir())
    assert measured(kept) == before  # the old run kept, not deleted
    assert measured(run) == before  # re-run from scratch, same seed, same numbers


def test_larger_budget_in_the_config_resumes_the_finished_run(tmp_path):
    overrides = [f"results_dir={tmp_path}", f"series_name={SERIES}", *TINY]
    cfg = compose_run(overrides)
    from qlab.experiment import run_experiment

    run = tmp_path / SERIES / "extended"
    short = run_experiment(cfg, run, bar=False)
    assert short["steps"] == 1600
    longer = compose_run([*overrides, "budget_steps=2400"])
    summary = run_experiment(longer, run, bar=False)
    whole = run_experiment(longer, tmp_path / SERIES / "whole", bar=False)
    assert summary["steps"] == 2400 and summary["final"] == whole["final"]
    assert not (tmp_path / SERIES / ".replaced").exists()


def test_folder_not_made_by_qlab_is_refused(tmp_path):
    run = tmp_path / SERIES / run_name(TINY)
    run.mkdir(parents=True)
    (run / "notes.txt").write_text("mine")
    done = shell([f"series_name={SERIES}", f"results_dir={tmp_path}", *TINY], tmp_path, check=False)
    assert done.returncode != 0
    assert_one_line(done, "was not made by qlab-run", str(run))
    assert sorted(p.name for p in run.iterdir()) == ["notes.txt"]


@pytest.mark.parametrize("name", ["../../x", "/tmp/abs", "..", "''", "a/b"])
def test_series_name_must_be_one_folder_name(tmp_path, name):
    done = shell([f"series_name={name}", f"results_dir={tmp_path / 'r'}", *TINY], tmp_path, check=False)
    assert done.returncode != 0
    assert_one_line(done, "series_name must be a single folder name")
    assert not (tmp_path / "r").exists() or not any((tmp_path / "r").iterdir())
    assert not (tmp_path / "x").exists()


# --- sizes before allocation -----------------------------------------------------------------


def test_every_task_builds_its_default_learners_within_the_memory_limit():
    for task in ("dock", "kiln", "crane"):
        for learner in ("tabular", "linear"):
            build_run(compose_run([f"task={task}", f"learner={learner}"]))


@pytest.mark.parametrize(("overrides", "setting"), [
    (["task=kiln", "learner.bins=[40]"], "bins"),
    (["task=kiln", "learner=linear", "learner.n_tilings=64", "learner.bins=[12]"], "bins, n_tilings"),
    (["learner=qnet", "learner.replay_capacity=1000000000"], "replay_capacity"),
])
def test_oversized_learner_fails_before_allocation_naming_its_setting(overrides, setting):
    with pytest.raises(ValueError, match=f"would need .* \\({setting}:.*max_learner_mib=2048; lower {setting}"):
        build_run(compose_run(overrides))


# --- integrity ---------------------------------------------------------------------------------

KILLER = textwrap.dedent(
    """
    import os, signal, sys
    from hydra import compose, initialize_config_dir
    from qlab.config import CONFIG_DIR, register_configs
    from qlab.experiment import run_experiment

    run_dir, n_stop, *overrides = sys.argv[1:]
    register_configs()
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose(config_name="config", overrides=overrides)

    def stop(n):
        if n == int(n_stop):
            os.kill(os.getpid(), signal.SIGKILL)

    run_experiment(cfg, run_dir, bar=False, on_checkpoint=stop)
    """
)


def killed_run(tmp_path: Path, n_stop: int = 2) -> tuple[Path, list[str]]:
    run = tmp_path / SERIES / "interrupted"
    overrides = [f"results_dir={tmp_path}", f"series_name={SERIES}", *TINY]
    done = subprocess.run([sys.executable, "-c", KILLER, str(run), str(n_stop), *overrides],
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == -signal.SIGKILL
    return run, overrides


def resume(run: Path, overrides: list[str]) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", KILLER, str(run), "0", *overrides],
                          capture_output=True, text=True, timeout=600)


@pytest.mark.parametrize("damage", ["delete", "cut"])
def test_damaged_metrics_of_an_interrupted_run_restart_it_with_a_message(tmp_path, damage):
    run, overrides = killed_run(tmp_path)
    metrics = run / "metrics.csv"
    if damage == "delete":
        metrics.unlink()
    else:
        metrics.write_text("".join(metrics.read_text().splitlines(keepends=True)[:-5]))
    done = resume(run, overrides)
    assert done.returncode == 0, done.stderr
    assert_one_line(done, "metrics.csv holds", "moved to")
    whole = tmp_path / "whole"
    assert resume(whole, overrides).returncode == 0
    assert measured(run) == measured(whole)  # restarted from scratch: no rows missing


@pytest.mark.parametrize("part", ["arrays.npz", "tensors.pt", "tree.json"])
def test_corrupt_checkpoint_is_named_and_the_run_restarts(tmp_path, part):
    run, overrides = killed_run(tmp_path)
    path = run / "checkpoint" / part
    path.write_bytes(path.read_bytes()[: len(path.read_bytes()) // 2])
    done = resume(run, overrides)
    assert done.returncode == 0, done.stderr
    assert_one_line(done, f"{path}: unreadable", "moved to")
    assert (run / "FINISHED").exists()


def test_resume_with_other_torch_threads_is_refused(tmp_path):
    run, overrides = killed_run(tmp_path)
    done = resume(run, [*overrides, "torch_threads=2"])
    assert done.returncode != 0
    assert "torch_threads=1" in done.stderr and "torch_threads=2" in done.stderr
    assert not (run / "FINISHED").exists() and (run / "checkpoint").exists()


def test_truncated_summary_does_not_stop_the_sweep(tmp_path):
    args = ["-m", "seed=0,1", f"series_name={SERIES}", f"results_dir={tmp_path}", *TINY]
    shell(args, tmp_path)
    first, second = runs_of(tmp_path)
    summary = first / "summary.json"
    summary.write_text(summary.read_text()[:40])
    (second / "summary.json").write_text((second / "summary.json").read_text())
    done = shell(args, tmp_path)
    assert_one_line(done, f"{summary}: unreadable", "moved to")
    assert json.loads(summary.read_text())["status"] == "finished"  # re-run, and the sweep went on
    assert "already finished" in done.stderr  # the intact run was skipped


def test_report_marks_damaged_runs_and_goes_on(tmp_path):
    shell(["-m", "seed=0,1,2", f"series_name={SERIES}", f"results_dir={tmp_path}", *TINY], tmp_path)
    cut, broken, intact = runs_of(tmp_path)
    (cut / "metrics.csv").write_text("".join((cut / "metrics.csv").read_text().splitlines(keepends=True)[:-3]))
    (broken / "summary.json").write_text("{")
    study = load_study(tmp_path / SERIES)
    status = {r.name: r.status for r in study.runs}
    assert status == {cut.name: "damaged", broken.name: "damaged", intact.name: "finished"}
    damage = {r.name: r.damage for r in study.runs}
    assert "metrics.csv" in damage[cut.name] and "summary.json" in damage[broken.name]
    from qlab.compare.report import main

    assert main([str(tmp_path / SERIES), "--no-diagnostics"]) == 0
    text = (tmp_path / SERIES / "report.md").read_text()
    assert "Damaged runs" in text and md_literal(cut.name) in text and md_literal(broken.name) in text


def test_duplicate_runs_are_counted_once(tmp_path):
    shell([f"series_name={SERIES}", f"results_dir={tmp_path}", *TINY], tmp_path)
    shell([f"series_name={SERIES}", f"results_dir={tmp_path}", "seed=0", *TINY], tmp_path)  # the same run again
    assert len(runs_of(tmp_path)) == 2
    study = load_study(tmp_path / SERIES)
    assert len(study.runs) == 1
    ((left_out, kept),) = study.duplicates
    assert {left_out, kept} == {run_name(TINY), run_name([*TINY, "seed=0"])}


# --- one line for every mistake ------------------------------------------------------------


@pytest.mark.parametrize(("args", "needle"), [
    (["+typo=1"], "unknown key 'typo'"),
    (["++typo=1"], "unknown key 'typo'"),
    (["learner=qnett", "seed=1"], "learner=qnett: no such option; choose from ['linear', 'lstdq', 'qnet', 'tabular']"),
    (["task=gym", "task.id=NoSuchTask-v9"], "'NoSuchTask-v9' is not a usable gymnasium id"),
])
def test_mistakes_end_in_one_line(tmp_path, args, needle):
    done = shell([f"results_dir={tmp_path}", *args], tmp_path, check=False)
    assert done.returncode != 0
    assert_one_line(done, needle)
    assert len(done.stderr.strip().splitlines()) == 1


def test_hydra_sweep_syntax_is_understood():
    assert override_problem(["-m", "learner=choice(tabular,linear)", "learner.step_size.start=0.1"]) is None
    assert override_problem(["-m", "task=glob(d*)", "task.mass_kg=2100", "seed=range(2)"]) is None
    assert "unknown key" in override_problem(["-m", "task=glob(d*)", "task.mass_kgs=2100"])


def test_sweep_with_choice_runs(tmp_path):
    shell(["-m", "seed=choice(0,1)", f"series_name={SERIES}", f"results_dir={tmp_path}", *TINY], tmp_path)
    assert [p.name for p in runs_of(tmp_path)] == [run_name([*TINY, f"seed={s}"]) for s in (0, 1)]


def test_second_process_on_the_same_run_is_refused(tmp_path):
    run = tmp_path / SERIES / run_name(TINY)
    with runfolder.locked(run):
        done = shell([f"series_name={SERIES}", f"results_dir={tmp_path}", *TINY], tmp_path, check=False)
    assert done.returncode != 0
    assert_one_line(done, "being written by another qlab-run process")
    shell([f"series_name={SERIES}", f"results_dir={tmp_path}", *TINY], tmp_path)  # released: runs now


SWEEP_STOPPER = textwrap.dedent(
    """
    # Loaded by every process of the sweep (PYTHONPATH): the first run to reach its 2nd checkpoint
    # sends SIGINT to the process group of its launcher (qlab-run), as Ctrl-C in a terminal does.
    import os, signal
    import qlab.experiment as experiment

    original = experiment.run_experiment

    def run_and_stop(cfg, run_dir, bar=True, on_checkpoint=None):
        def hook(n):
            if n == 2 and not os.path.exists(os.environ["QLAB_TEST_FLAG"]):
                open(os.environ["QLAB_TEST_FLAG"], "w").close()
                os.killpg(os.getpgid(os.getppid()), signal.SIGINT)  # the launcher's group, as a terminal does
        return original(cfg, run_dir, bar, hook)

    experiment.run_experiment = run_and_stop
    """
)


def test_ctrl_c_stops_a_parallel_sweep_once_without_traceback(tmp_path):
    hooks = tmp_path / "hooks"
    hooks.mkdir()
    (hooks / "sitecustomize.py").write_text(SWEEP_STOPPER)
    env = {**os.environ, "PYTHONPATH": f"{hooks}{os.pathsep}{os.environ.get('PYTHONPATH', '')}",
           "QLAB_TEST_FLAG": str(tmp_path / "sent")}
    args = ["-m", "hydra/launcher=local_pool", "seed=0,1,2,3", f"series_name={SERIES}", f"results_dir={tmp_path}",
            *TINY, "budget_steps=4000"]
    done = subprocess.run([QLAB_RUN, *args], cwd=tmp_path, env=env, capture_output=True, text=True, timeout=600,
                          start_new_session=True)
    assert (tmp_path / "sent").exists()
    assert done.returncode == 130, done.stdout + done.stderr
    assert "Traceback" not in done.stderr, done.stderr
    assert done.stderr.count("qlab-run: interrupted") == 1
    assert not any((run / "FINISHED").exists() for run in runs_of(tmp_path))


def test_report_reads_run_folders_written_with_the_old_names(tmp_path):
    shell([f"series_name={SERIES}", f"results_dir={tmp_path}", *TINY], tmp_path)
    (run,) = runs_of(tmp_path)
    fresh = load_study(tmp_path / SERIES).runs[0]
    metrics = run / "metrics.csv"
    metrics.write_text(metrics.read_text().replace("eval/success,", "eval/success_rate,"))
    summary = json.loads((run / "summary.json").read_text())
    summary["final"]["success_rate"] = summary["final"].pop("success")
    summary["metrics_sha256"] = file_digest(metrics)
    (run / "summary.json").write_text(json.dumps(summary))
    config = run / "config.yaml"
    config.write_text(config.read_text().replace("series_name:", "study_name:"))
    old = load_study(tmp_path / SERIES).runs[0]
    assert old.status == "finished" and old.final == fresh.final
    np.testing.assert_array_equal(old.evals["success"][1], fresh.evals["success"][1])
