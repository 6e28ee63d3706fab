"""The hydra app from the shell: config errors, sweeps, recording, resume, launchers, divergence.

Runs here are tiny (Dock with a short start distance, a few thousand steps) so the whole file
stays quick; each shell test starts ``qlab-run`` as a subprocess, exactly as a user would.
"""

from __future__ import annotations

import csv
import json
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
from hydra.errors import ConfigCompositionException
from omegaconf import OmegaConf
from omegaconf.errors import ConfigAttributeError, ValidationError
from runtools import TINY, assert_tensorboard_matches_csv, compose_run, measured, shell, tensorboard_scalars

from qlab.config import override_problem, to_container, validate
from qlab.recording import read_metrics
from qlab.runspec import build_run, run_digest

# --- config errors -------------------------------------------------------------------------


def test_unknown_group_option_lists_the_valid_ones():
    with pytest.raises(ConfigCompositionException) as err:
        compose_run(["learner=tabulr"])
    message = str(err.value.__cause__ or err.value)
    assert "tabulr" in message
    for option in ("linear", "lstdq", "qnet", "tabular"):
        assert option in message
    assert "schema/" not in message and "schema_" not in message  # schemas are kept out of the options


def test_wrong_type_names_the_key():
    with pytest.raises(ConfigCompositionException) as err:
        compose_run(["budget_steps=lots"])
    message = str(err.value.__cause__)
    assert "budget_steps" in message and "lots" in message


def test_unknown_key_names_the_key():
    with pytest.raises(ConfigCompositionException) as err:
        compose_run(["learner.step_sise.start=0.5"])
    message = str(err.value.__cause__)
    assert "step_sise" in message


def test_unknown_key_lists_the_valid_keys_of_its_node():
    message = override_problem(["learner=qnet", "learner.hidden_size=[8]"])
    assert message is not None and "unknown key 'learner.hidden_size'" in message
    assert "'hidden_sizes'" in message and "'learning_rate'" in message
    message = override_problem(["task=crane", "task.mass_kgs=5"])
    assert "'task' has [" in message and "'mass_trolley_kg'" in message and "'mass_load_kg'" in message
    assert override_problem(["learner=tabular,qnet", "learner.hidden_sizes=[8]"]) is None  # qnet has it
    assert override_problem(["-m", "seed=0,1", "learner.epsilon.start=0.5"]) is None


def test_unknown_key_from_the_shell_fails_before_any_work(tmp_path):
    done = shell(["task.mass_kgs=5", f"results_dir={tmp_path}"], tmp_path, check=False)
    assert done.returncode != 0
    assert "unknown key 'task.mass_kgs': 'task' has [" in done.stderr and "'mass_kg'" in done.stderr
    assert not (tmp_path / "scratch").exists()


def test_negative_seed_is_refused():
    with pytest.raises(ValueError, match="seed must be an integer >= 0, got -1"):
        validate(compose_run(["seed=-1"]))


def test_unknown_key_in_a_structured_node_is_refused():
    cfg = compose_run([])
    with pytest.raises((ConfigAttributeError, ValidationError)):
        OmegaConf.update(cfg, "task.mass_kgs", 5.0, merge=True)


def test_negative_budget_is_refused_before_any_work():
    cfg = compose_run(["budget_steps=-100"])
    with pytest.raises(ValueError, match="budget_steps must be a positive integer, got -100"):
        validate(cfg)


def test_bad_physical_parameter_names_group_and_parameter():
    cfg = compose_run(["task.mass_kg=0"])
    with pytest.raises(ValueError, match=r"task \(qlab/Dock-v0\): mass_kg must be"):
        build_run(cfg)


def test_invalid_setting_from_the_shell_fails_plainly(tmp_path):
    done = shell(["learner=qnet", "learner.batch_size=0", f"results_dir={tmp_path}"], tmp_path, check=False)
    assert done.returncode != 0
    assert "invalid setting: learner (qnet): batch_size must be an integer >= 1, got 0" in done.stderr
    assert "Traceback" not in done.stderr
    assert not any(p.name != ".hydra" for p in (tmp_path / "scratch").glob("*"))  # nothing was run


def test_config_hash_ignores_storage_but_not_settings():
    base = compose_run([])
    assert run_digest(to_container(base)) == run_digest(to_container(compose_run(["results_dir=elsewhere",
                                                                                "series_name=other"])))
    assert run_digest(to_container(base)) != run_digest(to_container(compose_run(["seed=1"])))


# --- sweeps and recording ------------------------------------------------------------------


def test_two_run_sweep_writes_folders_and_tensorboard_matches_csv(tmp_path):
    shell(["-m", "seed=0,1", "series_name=pair", f"results_dir={tmp_path}", *TINY], tmp_path)
    runs = sorted(p for p in (tmp_path / "pair").iterdir() if not p.name.startswith("."))
    assert sorted(next(o for o in p.name.split(",") if o.startswith("seed=")) for p in runs) == ["seed=0", "seed=1"]
    for run in runs:
        for name in ("config.yaml", "config.hash", "metrics.csv", "summary.json", "FINISHED"):
            assert (run / name).is_file(), name
        assert (run / "checkpoint").is_dir()
        summary = json.loads((run / "summary.json").read_text())
        assert summary["status"] == "finished" and summary["steps"] == 1600
        tags = {t for _, t, _ in read_metrics(run)}
        assert {"eval/success", "eval/discounted_return", "eval/return", "eval/length"} <= tags
        assert any(t.startswith("episode/") for t in tags) and any(t.startswith("learn/") for t in tags)
        assert_tensorboard_matches_csv(run)
        assert (run / "tb" / "hparams").is_dir()


def test_rerun_skips_finished_and_reruns_changed(tmp_path):
    args = ["series_name=again", f"results_dir={tmp_path}", *TINY]
    shell(args, tmp_path)
    run = next(p for p in (tmp_path / "again").iterdir() if not p.name.startswith("."))
    first = measured(run)
    done = shell(args, tmp_path)
    assert "already finished" in done.stderr
    assert measured(run) == first
    (run / "config.hash").write_text("0000\n")  # as if the config behind this folder had changed
    (run / "FINISHED").write_text("0000\n")
    done = shell(args, tmp_path)
    assert "already finished" not in done.stderr
    assert measured(run) == first  # re-run from scratch, same seed, same numbers


# --- resume after a kill -------------------------------------------------------------------

KILLER = textwrap.dedent(
    """
    import os, signal, sys
    from hydra import compose, initialize_config_dir
    from qlab.config import CONFIG_DIR, register_configs
    from qlab.experiment import run_experiment
    from qlab.recording import Recorder

    run_dir, n_kill, sig, *overrides = sys.argv[1:]
    register_configs()
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose(config_name="config", overrides=overrides)

    # After the n_kill-th checkpoint, let 12 more scalars reach the tensorboard file (written and
    # flushed, as a commit or a clean stop writes them), then kill: the resumed run must purge them
    # and record them once.
    armed, after = [False], [0]
    scalar = Recorder.scalar

    def scalar_then_maybe_kill(self, tag, value, step):
        scalar(self, tag, value, step)
        if armed[0]:
            after[0] += 1
            if after[0] == 12:
                self._flush_tensorboard()
                os.kill(os.getpid(), getattr(signal, sig))

    Recorder.scalar = scalar_then_maybe_kill

    def arm(n):
        armed[0] = armed[0] or n == int(n_kill)

    run_experiment(cfg, run_dir, bar=False, on_checkpoint=arm)
    """
)


def run_script(run_dir: Path, n_kill: int, sig: str, overrides: list[str]) -> subprocess.CompletedProcess:
    args = [sys.executable, "-c", KILLER, str(run_dir), str(n_kill), sig, *overrides]
    return subprocess.run(args, capture_output=True, text=True, timeout=600)


@pytest.mark.parametrize(("learner", "sig"), [("tabular", "SIGKILL"), ("qnet", "SIGKILL"), ("tabular", "SIGINT"),
                                              ("qnet", "SIGTERM")])
def test_killed_run_resumes_to_the_uninterrupted_result(tmp_path, learner, sig):
    overrides = [f"learner={learner}", "learner.warmup_steps=100" if learner == "qnet" else "seed=0", "copies=4", *TINY]
    whole, killed = tmp_path / "whole", tmp_path / "killed"
    assert run_script(whole, 0, sig, overrides).returncode == 0
    stopped = run_script(killed, 3, sig, overrides)  # signalled a little after its 3rd checkpoint
    assert not (killed / "FINISHED").exists()
    if sig == "SIGKILL":
        assert stopped.returncode == -signal.SIGKILL
        on_disk = tensorboard_scalars(killed)
        assert max(s for s, _, _ in on_disk) > max(s for s, _, _ in read_metrics(killed))  # events past the checkpoint
    else:  # a clean stop: 128 + signal number, one line, no traceback
        assert stopped.returncode == 128 + getattr(signal, sig)
        assert "Traceback" not in stopped.stderr and f"stopped by {sig}" in stopped.stderr
    assert run_script(killed, 0, sig, overrides).returncode == 0  # the same command again resumes and finishes
    rows = read_metrics(killed)
    assert len(rows) == len(set((s, t) for s, t, _ in rows))  # nothing recorded twice
    assert measured(killed) == measured(whole)  # nothing lost, and the resumed run repeats the uninterrupted one
    assert_tensorboard_matches_csv(killed)
    summary = json.loads((killed / "summary.json").read_text())
    assert summary["final"] == json.loads((whole / "summary.json").read_text())["final"]


# --- launchers and divergence --------------------------------------------------------------


def test_submitit_local_launcher_runs_a_two_job_sweep(tmp_path):
    shell(["-m", "hydra/launcher=local_submitit", "seed=0,1", "series_name=sub", f"results_dir={tmp_path}", *TINY],
          tmp_path)
    runs = sorted(p for p in (tmp_path / "sub").iterdir() if not p.name.startswith("."))
    assert len(runs) == 2
    assert all((run / "FINISHED").exists() for run in runs)
    assert all(json.loads((run / "summary.json").read_text())["status"] == "finished" for run in runs)


def test_divergence_is_recorded_and_the_sweep_goes_on(tmp_path):
    shell(
        ["-m", "learner=qnet", "learner.loss=squared", "learner.grad_clip_norm=0", "learner.warmup_steps=50",
         "learner.learning_rate=1e12,1e-3", "series_name=blowup", f"results_dir={tmp_path}", *TINY],
        tmp_path,
    )
    runs = {OmegaConf.load(p / "config.yaml").learner.learning_rate: p
            for p in (tmp_path / "blowup").iterdir() if not p.name.startswith(".")}
    assert sorted(runs) == [1e-3, 1e12]
    huge, sane = runs[1e12], runs[1e-3]
    summary = json.loads((huge / "summary.json").read_text())
    assert summary["status"] == "diverged" and 0 < summary["diverged_at_step"] < 1600
    assert (huge / "FINISHED").exists()
    assert json.loads((sane / "summary.json").read_text())["status"] == "finished"
    with (huge / "metrics.csv").open() as fh:
        assert max(int(r["step"]) for r in csv.DictReader(fh)) <= summary["diverged_at_step"]
