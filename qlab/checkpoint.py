"""Checkpoints of nested state trees, written atomically and read back without unpickling objects.

A tree is a dict with string keys whose leaves are numpy arrays, torch tensors, or JSON-able
values (None, bool, int, float, str, and lists/dicts of them; tuples come back as lists, so
``random.getstate()`` returns as ``[version, [625 ints], gauss]``: rebuild tuples before
``random.setstate``). On disk a checkpoint is one folder:

* ``tree.json``: the structure and every scalar, arrays and tensors replaced by markers;
* ``arrays.npz``: numpy arrays (``np.savez``; read with ``allow_pickle=False``);
* ``tensors.pt``: a flat dict of tensors (read with ``torch.load(weights_only=True)``).

Saving writes a temporary folder beside the target and then swaps it in with renames: the
previous checkpoint moves to ``.<name>.previous`` until the new one is in place, and
:func:`load_checkpoint` falls back to it if a crash fell between the two renames. A failure
at any point leaves a complete checkpoint to load.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import torch

FORMAT_VERSION = 1
ARRAY_TAG = "__qlab_array__"
TENSOR_TAG = "__qlab_tensor__"
_TAGS = (ARRAY_TAG, TENSOR_TAG)
_TREE, _ARRAYS, _TENSORS = "tree.json", "arrays.npz", "tensors.pt"


class CheckpointError(ValueError):
    """A checkpoint on disk that cannot be read back; the message names the file."""


def _encode(node: Any, arrays: dict[str, np.ndarray], tensors: dict[str, torch.Tensor], path: str) -> Any:
    """Replace arrays and tensors by markers, collecting them; check everything else is JSON-able."""
    if isinstance(node, dict):
        out = {}
        for key, value in node.items():
            if not isinstance(key, str) or key in _TAGS:
                raise ValueError(f"checkpoint keys must be strings other than {list(_TAGS)}, got {key!r} at {path!r}")
            out[key] = _encode(value, arrays, tensors, f"{path}/{key}")
        return out
    if isinstance(node, list | tuple):
        return [_encode(v, arrays, tensors, f"{path}/{i}") for i, v in enumerate(node)]
    if isinstance(node, torch.Tensor):
        key = f"t{len(tensors)}"
        tensors[key] = node.detach().cpu().clone()
        return {TENSOR_TAG: key}
    if isinstance(node, np.ndarray):
        if node.dtype.hasobject:
            raise ValueError(f"checkpoint arrays must not hold Python objects (dtype object at {path!r})")
        key = f"a{len(arrays)}"
        arrays[key] = node
        return {ARRAY_TAG: key}
    if isinstance(node, np.generic):
        return node.item()
    if node is None or isinstance(node, bool | int | float | str):
        return node
    raise ValueError(
        f"checkpoint leaves must be numpy arrays, torch tensors, None, bool, int, float, str, "
        f"lists or dicts; got {type(node).__name__} at {path!r}"
    )


def _decode(node: Any, arrays: Any, tensors: dict[str, torch.Tensor]) -> Any:
    if isinstance(node, dict):
        if len(node) == 1 and ARRAY_TAG in node:
            return arrays[node[ARRAY_TAG]]
        if len(node) == 1 and TENSOR_TAG in node:
            return tensors[node[TENSOR_TAG]]
        return {k: _decode(v, arrays, tensors) for k, v in node.items()}
    if isinstance(node, list):
        return [_decode(v, arrays, tensors) for v in node]
    return node


def _fsync(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _write_files(folder: Path, structure: Any, arrays: dict[str, np.ndarray], tensors: dict[str, torch.Tensor]) -> None:
    with open(folder / _ARRAYS, "wb") as f:
        np.savez(f, **arrays)
    torch.save(tensors, folder / _TENSORS)
    with open(folder / _TREE, "w", encoding="utf-8") as f:
        json.dump({"format": FORMAT_VERSION, "tree": structure}, f)
    for name in (_ARRAYS, _TENSORS, _TREE):
        _fsync(folder / name)


def _previous(target: Path) -> Path:
    return target.parent / f".{target.name}.previous"


def save_checkpoint(directory: str | os.PathLike, tree: dict[str, Any]) -> Path:
    """Write ``tree`` to the folder ``directory`` atomically, replacing an older checkpoint there.

    The folder belongs to the checkpoint: an existing folder that is not a checkpoint is refused.
    """
    if not isinstance(tree, dict):
        raise ValueError(f"tree must be a dict, got {type(tree).__name__}")
    target = Path(directory)
    if target.exists() and not (target / _TREE).is_file():
        raise ValueError(f"directory {str(target)!r} exists and is not a checkpoint: refusing to replace it")
    target.parent.mkdir(parents=True, exist_ok=True)
    arrays: dict[str, np.ndarray] = {}
    tensors: dict[str, torch.Tensor] = {}
    structure = _encode(tree, arrays, tensors, "")
    previous = _previous(target)
    for stale in target.parent.glob(f".{target.name}.tmp-*"):  # left by a save that was killed
        shutil.rmtree(stale, ignore_errors=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.tmp-", dir=target.parent))
    try:
        _write_files(tmp, structure, arrays, tensors)
        if target.exists():
            if previous.exists():
                shutil.rmtree(previous)
            os.replace(target, previous)
        os.replace(tmp, target)
        _fsync(target.parent)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        if not target.exists() and previous.exists():
            os.replace(previous, target)
        raise
    if previous.exists():
        shutil.rmtree(previous)
    return target


def _readable(directory: str | os.PathLike) -> Path | None:
    target = Path(directory)
    for folder in (target, _previous(target)):
        if (folder / _TREE).is_file():
            return folder
    return None


def has_checkpoint(directory: str | os.PathLike) -> bool:
    """Whether :func:`load_checkpoint` would find a complete checkpoint at ``directory``."""
    return _readable(directory) is not None


def load_checkpoint(directory: str | os.PathLike) -> dict[str, Any]:
    """Read a tree written by :func:`save_checkpoint` (arrays as numpy, tensors as CPU tensors)."""
    folder = _readable(directory)
    if folder is None:
        raise FileNotFoundError(f"no checkpoint at {str(directory)!r}")
    try:
        with open(folder / _TREE, encoding="utf-8") as f:
            header = json.load(f)
    except (OSError, ValueError) as err:
        raise CheckpointError(f"{folder / _TREE}: unreadable ({type(err).__name__}: {err})") from None
    if not isinstance(header, dict) or header.get("format") != FORMAT_VERSION:
        raise CheckpointError(f"{folder / _TREE}: checkpoint format is not the supported {FORMAT_VERSION}")
    try:
        tensors = torch.load(folder / _TENSORS, map_location="cpu", weights_only=True)
    except Exception as err:  # torch raises many kinds for a cut or foreign file; pickled objects are refused too
        raise CheckpointError(f"{folder / _TENSORS}: unreadable ({type(err).__name__}: {_first_line(err)})") from None
    try:
        with np.load(folder / _ARRAYS, allow_pickle=False) as npz:
            arrays = {key: npz[key] for key in npz.files}
    except Exception as err:  # zipfile, OSError and ValueError (object arrays) among them
        raise CheckpointError(f"{folder / _ARRAYS}: unreadable ({type(err).__name__}: {_first_line(err)})") from None
    try:
        return _decode(header["tree"], arrays, tensors)
    except KeyError as err:
        raise CheckpointError(f"{folder / _TREE}: refers to a missing array or tensor {err}") from None


def _first_line(err: Exception) -> str:
    return (str(err).splitlines() or [""])[0][:200]
