"""A plain (not editable) install runs ``qlab-run`` from any folder: the wheel carries the configs.

The project is copied, built and installed offline into a fresh virtual environment that sees
this interpreter's packages (``--system-site-packages``, so torch and the rest are not fetched
again); its ``qlab-run`` must compose the same config as the editable install of this tree.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

from omegaconf import OmegaConf

ROOT = Path(__file__).resolve().parent.parent
SOURCES = ("pyproject.toml", "README.md", "qlab", "configs")
OVERRIDES = ["learner=linear", "seed=7", "shaping=potential"]


def run(args: list[str], cwd: Path) -> str:
    """Run a command (bounded); its stdout, or ``AssertionError`` with its output if it fails."""
    done = subprocess.run(args, cwd=cwd, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, f"{args} failed ({done.returncode}):\n{done.stdout}\n{done.stderr}"
    return done.stdout


def files(folder: Path, pattern: str) -> set[str]:
    """Paths (relative to ``folder``) of the files matching ``pattern`` below it."""
    return {p.relative_to(folder).as_posix() for p in folder.rglob(pattern) if "__pycache__" not in p.parts}


def test_plain_install_runs_qlab_run_from_another_folder(tmp_path):
    source, venv, elsewhere = tmp_path / "source", tmp_path / "venv", tmp_path / "elsewhere"
    source.mkdir()
    for name in SOURCES:  # a copy, so the build leaves nothing in the working tree
        origin = ROOT / name
        if origin.is_dir():
            shutil.copytree(origin, source / name, ignore=shutil.ignore_patterns("__pycache__", "*.egg-info"))
        else:
            shutil.copy2(origin, source / name)
    elsewhere.mkdir()
    run([sys.executable, "-m", "venv", "--system-site-packages", "--without-pip", str(venv)], tmp_path)
    python = str(venv / "bin" / "python")
    run([python, "-m", "pip", "install", "--no-deps", "--no-build-isolation", "--no-index", "--no-cache-dir",
         "--disable-pip-version-check", str(source)], tmp_path)

    installed = Path(run([python, "-c", "import qlab; print(qlab.__file__)"], elsewhere).strip()).parent
    assert installed.is_relative_to(venv)  # the wheel's copy, not this tree's editable one
    assert files(installed, "*.py") == files(ROOT / "qlab", "*.py")  # every module made it into the wheel
    assert files(installed / "configs", "*.yaml") == files(ROOT / "configs", "*.yaml")
    config_dir = run([python, "-c", "from qlab.config import CONFIG_DIR; print(CONFIG_DIR)"], elsewhere).strip()
    assert Path(config_dir) == installed / "configs"

    shown = run([str(venv / "bin" / "qlab-run"), "--cfg", "job", *OVERRIDES], elsewhere)
    cfg = OmegaConf.create(shown)
    assert cfg.seed == 7 and cfg.learner.kind == "linear" and cfg.shaping.variant == "potential"
    assert shown == run([str(Path(sys.executable).parent / "qlab-run"), "--cfg", "job", *OVERRIDES], elsewhere)
