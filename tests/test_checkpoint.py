"""Checkpoints: exact round trips of nested state, no pickled objects, atomic replacement."""

from __future__ import annotations

import json
import os
import random

import numpy as np
import pytest
import torch

from qlab import checkpoint
from qlab.checkpoint import has_checkpoint, load_checkpoint, save_checkpoint


def _tree() -> dict:
    random.seed(5)
    rng = np.random.default_rng(7)
    rng.random(3)
    gen = torch.Generator().manual_seed(9)
    torch.rand(4, generator=gen)
    return {
        "weights": {"layer.0": torch.randn(3, 4, generator=gen), "scale": torch.tensor(2.5, dtype=torch.float64)},
        "replay": {"obs": rng.normal(size=(5, 2)).astype(np.float32), "done": np.array([True, False]),
                   "action": np.arange(5, dtype=np.int64), "empty": np.zeros((0, 3))},
        "counters": {"steps": 12345, "rate": 0.25, "name": "dock", "flag": True, "none": None, "np_int": np.int64(3)},
        "rng": {"numpy": rng.bit_generator.state, "torch": gen.get_state(), "python": random.getstate()},
        "history": [1.0, [2, 3], {"deep": np.array([1.5])}],
    }


def test_round_trip_restores_values_types_and_rng_streams(tmp_path):
    tree = _tree()
    save_checkpoint(tmp_path / "ckpt", tree)
    back = load_checkpoint(tmp_path / "ckpt")
    assert torch.equal(back["weights"]["layer.0"], tree["weights"]["layer.0"])
    assert back["weights"]["scale"].dtype == torch.float64
    for key, arr in tree["replay"].items():
        np.testing.assert_array_equal(back["replay"][key], arr)
        assert back["replay"][key].dtype == arr.dtype and back["replay"][key].shape == arr.shape
    assert back["counters"] == {"steps": 12345, "rate": 0.25, "name": "dock", "flag": True, "none": None, "np_int": 3}
    assert back["history"][:2] == [1.0, [2, 3]]
    np.testing.assert_array_equal(back["history"][2]["deep"], [1.5])
    # RNG streams continue identically after restoring their saved states
    rng_a, rng_b = np.random.default_rng(), np.random.default_rng()
    rng_a.bit_generator.state, rng_b.bit_generator.state = tree["rng"]["numpy"], back["rng"]["numpy"]
    np.testing.assert_array_equal(rng_a.random(5), rng_b.random(5))
    gen_a, gen_b = torch.Generator(), torch.Generator()
    gen_a.set_state(tree["rng"]["torch"])
    gen_b.set_state(back["rng"]["torch"])
    assert torch.equal(torch.rand(5, generator=gen_a), torch.rand(5, generator=gen_b))
    version, internal, gauss = back["rng"]["python"]  # tuples come back as lists
    random.setstate((version, tuple(internal), gauss))
    restored = [random.random() for _ in range(5)]
    random.setstate(tree["rng"]["python"])
    assert restored == [random.random() for _ in range(5)]


def test_files_load_without_unpickling(tmp_path):
    save_checkpoint(tmp_path / "ckpt", _tree())
    folder = tmp_path / "ckpt"
    assert sorted(os.listdir(folder)) == ["arrays.npz", "tensors.pt", "tree.json"]
    with np.load(folder / "arrays.npz", allow_pickle=False) as npz:  # raises if any array needs pickle
        assert len(npz.files) == 5
    tensors = torch.load(folder / "tensors.pt", weights_only=True)  # torch's restricted unpickler
    assert all(isinstance(t, torch.Tensor) for t in tensors.values())
    with open(folder / "tree.json") as f:
        json.load(f)


def test_unsupported_leaves_raise(tmp_path):
    with pytest.raises(ValueError, match="dtype object"):
        save_checkpoint(tmp_path / "a", {"x": np.array([{}, 1], dtype=object)})
    with pytest.raises(ValueError, match="leaves must be"):
        save_checkpoint(tmp_path / "b", {"x": {1, 2}})
    with pytest.raises(ValueError, match="keys must be strings"):
        save_checkpoint(tmp_path / "c", {"x": {0: 1}})
    assert not has_checkpoint(tmp_path / "a")


def test_failure_mid_save_keeps_the_previous_checkpoint(tmp_path, monkeypatch):
    target = tmp_path / "ckpt"
    save_checkpoint(target, {"step": 1, "w": np.ones(3)})

    def broken_save(*args, **kwargs):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(checkpoint.torch, "save", broken_save)
    with pytest.raises(OSError, match="simulated"):
        save_checkpoint(target, {"step": 2, "w": np.zeros(3), "t": torch.zeros(1)})
    back = load_checkpoint(target)
    assert back["step"] == 1
    np.testing.assert_array_equal(back["w"], np.ones(3))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["ckpt"]  # temp folder cleaned up


def test_crash_between_renames_falls_back_to_previous(tmp_path, monkeypatch):
    target = tmp_path / "ckpt"
    save_checkpoint(target, {"step": 1})
    real_replace = os.replace
    calls = []

    def replace_then_die(src, dst):
        calls.append(dst)
        if len(calls) >= 2:  # killed after the old checkpoint moved aside, before the new one moved in
            raise KeyboardInterrupt
        real_replace(src, dst)

    monkeypatch.setattr(checkpoint.os, "replace", replace_then_die)
    monkeypatch.setattr(checkpoint.shutil, "rmtree", lambda *a, **k: None)  # as if killed: no clean-up
    with pytest.raises(KeyboardInterrupt):
        save_checkpoint(target, {"step": 2})
    monkeypatch.undo()
    assert has_checkpoint(target)
    assert load_checkpoint(target)["step"] == 1
    save_checkpoint(target, {"step": 3})  # the next save recovers the normal layout
    assert load_checkpoint(target)["step"] == 3
    assert sorted(p.name for p in tmp_path.iterdir()) == ["ckpt"]


def test_replacing_a_checkpoint(tmp_path):
    save_checkpoint(tmp_path / "ckpt", {"step": 1, "w": torch.ones(2)})
    save_checkpoint(tmp_path / "ckpt", {"step": 2, "w": torch.zeros(2)})
    back = load_checkpoint(tmp_path / "ckpt")
    assert back["step"] == 2 and torch.equal(back["w"], torch.zeros(2))
    with pytest.raises(FileNotFoundError):
        load_checkpoint(tmp_path / "missing")


def test_refuses_to_replace_a_folder_that_is_not_a_checkpoint(tmp_path):
    (tmp_path / "results").mkdir()
    (tmp_path / "results" / "notes.txt").write_text("keep me")
    with pytest.raises(ValueError, match="not a checkpoint"):
        save_checkpoint(tmp_path / "results", {"step": 1})
    assert (tmp_path / "results" / "notes.txt").read_text() == "keep me"
