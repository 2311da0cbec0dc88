"""Resume checkpoints: what a killed run leaves so the next run can go on.

A run works in a hidden sibling of its output folder (``.NAME.partial``).
After each barrier step it saves that step's results (NumPy arrays as
``.npy`` without pickles, everything else as JSON) under ``.work/state/`` and
records the step in ``.work/checkpoints.json`` with a *step key*, written
last and atomically, so a step counts as done only once its state is whole.

A step key hashes the tool version, the input fingerprint (relative path,
size and modification time of every entry under the input folder), the
settings the step depends on, and the previous step's key. A later run with
the same keys loads the last valid step and continues; a changed setting
changes the key of the first step that depends on it and of every step
after it, and only those are redone.

Steps recorded: ``first_pass`` (read, clean, exact keys, signatures),
``exact_step``, ``near_step``, ``split_step``, ``tokenize_step`` (the trained
tokenizer and the token streams) and ``pack_train``, ``pack_validation``,
``pack_test`` (each split's shards).
"""

from __future__ import annotations

import dataclasses
import json
import os
import shutil
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from corpusprep.hashing import hash_text
from corpusprep.manifest import write_json_atomic

__all__ = ["STEPS", "Checkpoints", "input_fingerprint", "step_keys"]

#: Step -> {definition table: settings it depends on (None: all of them)}, in run order.
STEPS: dict[str, dict[str, tuple[str, ...] | None]] = {
    "first_pass": {
        "read": None,
        "clean": None,
        "exact": ("key",),
        "near": ("enabled", "unit", "ngram", "permutations", "seed"),
    },
    "exact_step": {"exact": ("enabled",)},
    "near_step": {"near": None},
    "split_step": {"split": None},
    "tokenize_step": {"tokenizer": None},
    "pack_train": {"pack": None},
    "pack_validation": {"pack": None},
    "pack_test": {"pack": None},
}
_FILE = "checkpoints.json"


def input_fingerprint(folder: Path) -> str:
    """XXH3-128 over (relative path, type, size, mtime) of every entry under ``folder``.

    Links are not followed: a link counts by its own entry.
    """
    entries = []
    for directory, folders, files in os.walk(folder, followlinks=False):
        folders.sort()
        for name in sorted(files + folders):
            path = os.path.join(directory, name)
            try:
                info = os.lstat(path)
            except OSError:
                continue
            relative = os.path.relpath(path, folder).encode("utf-8", "surrogateescape").hex()
            entries.append(f"{relative}:{info.st_mode:o}:{info.st_size}:{info.st_mtime_ns}")
    return hash_text("\n".join(entries))


def step_keys(resolved: Mapping[str, Mapping[str, Any]], fingerprint: str, version: str) -> dict[str, str]:
    """The chained key of every step for a resolved definition.

    >>> a = step_keys({"read": {}, "clean": {}, "exact": {"key": "text", "enabled": True},
    ...                "near": {"seed": 0, "threshold": 0.8}, "split": {"seed": 1}}, "f", "1")
    >>> b = step_keys({"read": {}, "clean": {}, "exact": {"key": "text", "enabled": True},
    ...                "near": {"seed": 0, "threshold": 0.9}, "split": {"seed": 1}}, "f", "1")
    >>> [a[s] == b[s] for s in STEPS]
    [True, True, False, False, False, False, False, False]
    """
    keys: dict[str, str] = {}
    previous = hash_text(f"{version}\n{fingerprint}")
    for step, depends in STEPS.items():
        chosen = {
            table: {
                key: value for key, value in resolved.get(table, {}).items() if names is None or key in names
            }
            for table, names in depends.items()
        }
        previous = hash_text(previous + json.dumps(chosen, sort_keys=True, separators=(",", ":")))
        keys[step] = previous
    return keys


def _encode(value: Any) -> Any:
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {"__dataclass__": type(value).__name__, **dataclasses.asdict(value)}
    if isinstance(value, np.dtype):
        return {"__dtype__": value.str}
    if isinstance(value, list):
        return [_encode(item) for item in value]
    if isinstance(value, dict):
        return {key: _encode(item) for key, item in value.items()}
    return value


def _decode(value: Any, classes: Mapping[str, type]) -> Any:
    if isinstance(value, dict):
        if "__dtype__" in value:
            return np.dtype(value["__dtype__"])
        if "__dataclass__" in value:
            fields = {key: item for key, item in value.items() if key != "__dataclass__"}
            return classes[value["__dataclass__"]](**fields)
        return {key: _decode(item, classes) for key, item in value.items()}
    if isinstance(value, list):
        return [_decode(item, classes) for item in value]
    return value


class Checkpoints:
    """The checkpoint record of one work folder."""

    def __init__(self, work: Path) -> None:
        self.work = work
        self.folder = work / "state"

    def recorded(self) -> dict[str, str]:
        """Step -> key of the steps recorded as complete (empty if none or unreadable)."""
        try:
            with open(self.work / _FILE, encoding="utf-8") as handle:
                data = json.load(handle)
        except (OSError, ValueError):
            return {}
        steps = data.get("steps", {}) if isinstance(data, dict) else {}
        return {str(k): str(v) for k, v in steps.items()} if isinstance(steps, dict) else {}

    def resume_point(self, keys: Mapping[str, str]) -> str | None:
        """The last step whose key and all earlier keys match the record, or None."""
        recorded = self.recorded()
        last = None
        for step in STEPS:
            if recorded.get(step) != keys[step]:
                break
            last = step
        return last

    def save(self, step: str, key: str, state: Mapping[str, Any]) -> None:
        """Save ``state`` of ``step``, then record the step as complete."""
        folder = self.folder / step
        if folder.exists():
            shutil.rmtree(folder)
        folder.mkdir(parents=True)
        plain: dict[str, Any] = {}
        for name, value in state.items():
            if isinstance(value, np.ndarray):
                np.save(folder / f"{name}.npy", value, allow_pickle=False)
            else:
                plain[name] = _encode(value)
        write_json_atomic(folder / "values.json", plain)
        recorded = {
            s: k for s, k in self.recorded().items() if list(STEPS).index(s) < list(STEPS).index(step)
        }
        recorded[step] = key
        write_json_atomic(self.work / _FILE, {"steps": recorded})

    def forget(self) -> None:
        """Remove the record, so no later run resumes from this work folder (done before deleting it)."""
        (self.work / _FILE).unlink(missing_ok=True)

    def load(self, step: str, classes: Mapping[str, type]) -> dict[str, Any]:
        """The state saved by ``step``."""
        folder = self.folder / step
        with open(folder / "values.json", encoding="utf-8") as handle:
            state: dict[str, Any] = _decode(json.load(handle), classes)
        for path in sorted(folder.glob("*.npy")):
            state[path.stem] = np.load(path, allow_pickle=False)
        return state
