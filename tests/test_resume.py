"""Runs killed with SIGKILL resume from their last checkpoint and give the same bytes.

The reference is an uninterrupted run of the same definition on the same input: byte-identical
shards, ledger, tokenizer and manifest (the determinism rule of the design, common practice for
reproducible data pipelines).
"""

from __future__ import annotations

import dataclasses
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import pytest

from corpusprep.checkpoint import STEPS
from corpusprep.definition import load_definition
from corpusprep.pipeline import run_pipeline

ROOT = Path(__file__).parent.parent

DEMO = ROOT / "pipelines" / "demo.toml"


def _tree(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def reference(demo_output: Path) -> dict[str, bytes]:
    return _tree(demo_output)


def _command(archive: Path, output: Path) -> list[str]:
    return [
        sys.executable,
        "-m",
        "corpusprep",
        "run",
        str(DEMO),
        "--input",
        str(archive),
        "--output",
        str(output),
        "--workers",
        "1",
        "--quiet",
    ]


@pytest.mark.slow
@pytest.mark.parametrize("step", list(STEPS))
def test_killed_after_each_checkpoint_resumes_to_identical_bytes(
    step: str, archive: Path, reference: dict[str, bytes], tmp_path: Path
) -> None:
    output = tmp_path / "out"
    env = dict(os.environ, CORPUSPREP_FAULT_KILL_AFTER=step)
    killed = subprocess.run(_command(archive, output), env=env, capture_output=True, text=True)
    assert killed.returncode == -signal.SIGKILL
    assert not output.exists(), "a killed run never leaves a folder that looks finished"
    assert (tmp_path / ".out.partial" / ".work" / "checkpoints.json").exists()
    resumed = subprocess.run(_command(archive, output), capture_output=True, text=True)
    assert resumed.returncode == 0, resumed.stderr
    assert _tree(output) == reference
    assert not (tmp_path / ".out.partial").exists()


@pytest.mark.slow
def test_killed_mid_stage_at_several_moments_resumes_to_identical_bytes(
    archive: Path, reference: dict[str, bytes], tmp_path: Path
) -> None:
    for moment, delay in enumerate((0.8, 1.6, 2.4, 3.2)):
        output = tmp_path / f"out{moment}"
        process = subprocess.Popen(
            _command(archive, output), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
        )
        time.sleep(delay)
        process.send_signal(signal.SIGKILL)
        process.wait()
        if output.exists():  # the run finished before the kill: nothing to resume
            assert _tree(output) == reference
            continue
        resumed = subprocess.run(_command(archive, output), capture_output=True, text=True)
        assert resumed.returncode == 0, resumed.stderr
        assert _tree(output) == reference


@pytest.mark.slow
def test_a_changed_setting_redoes_only_the_steps_it_affects(archive: Path, tmp_path: Path) -> None:
    output = tmp_path / "out"
    env = dict(os.environ, CORPUSPREP_FAULT_KILL_AFTER="split_step")
    subprocess.run(_command(archive, output), env=env, capture_output=True)
    base = load_definition(DEMO).with_folders(input=archive, output=output)
    changed = dataclasses.replace(base, split=dataclasses.replace(base.split, seed=base.split.seed + 1))
    stages_seen: set[str] = set()
    run_pipeline(changed, workers=1, progress=lambda stage, done, total: stages_seen.add(stage))
    assert "read" not in stages_seen, "read/clean/exact/near were checkpointed and must not run again"
    fresh = run_pipeline(changed.with_folders(output=tmp_path / "fresh"), workers=1).output
    assert _tree(output) == _tree(fresh)


def test_an_interrupt_keeps_the_checkpoints(archive: Path, tmp_path: Path) -> None:
    output = tmp_path / "out"
    definition = load_definition(DEMO).with_folders(input=archive, output=output)

    def interrupt(stage: str, done: int, total: int | None) -> None:
        if stage == "tokenize":
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_pipeline(definition, workers=1, progress=interrupt)
    assert not output.exists()
    assert (tmp_path / ".out.partial" / ".work" / "checkpoints.json").exists()
    stages_seen: set[str] = set()
    run_pipeline(definition, workers=1, progress=lambda stage, done, total: stages_seen.add(stage))
    assert "read" not in stages_seen and (output / "manifest.json").exists()


@pytest.mark.slow
def test_a_changed_pack_setting_keeps_the_trained_tokenizer(archive: Path, tmp_path: Path) -> None:
    output = tmp_path / "out"
    env = dict(os.environ, CORPUSPREP_FAULT_KILL_AFTER="pack_validation")
    subprocess.run(_command(archive, output), env=env, capture_output=True)
    base = load_definition(DEMO).with_folders(input=archive, output=output)
    changed = dataclasses.replace(base, pack=dataclasses.replace(base.pack, length=base.pack.length // 2))
    stages_seen: set[str] = set()
    run_pipeline(changed, workers=1, progress=lambda stage, done, total: stages_seen.add(stage))
    assert not {"read", "tokenize"} & stages_seen, "the tokenizer checkpoint must be reused"
    fresh = run_pipeline(changed.with_folders(output=tmp_path / "fresh"), workers=1).output
    assert _tree(output) == _tree(fresh)


@pytest.mark.slow
def test_half_written_shards_of_a_killed_run_do_not_reach_the_output(
    archive: Path, reference: dict[str, bytes], tmp_path: Path
) -> None:
    # A shard task killed while writing leaves a hidden '.NAME.partial' file (shards.write_shard
    # writes there, then renames); the resumed run must repack the split without it.
    output = tmp_path / "out"
    env = dict(os.environ, CORPUSPREP_FAULT_KILL_AFTER="pack_train")
    killed = subprocess.run(_command(archive, output), env=env, capture_output=True, text=True)
    assert killed.returncode == -signal.SIGKILL
    shards = tmp_path / ".out.partial" / "shards"
    (shards / ".validation-00999.npy.partial").write_bytes(b"\x93NUMPY half a shard")
    resumed = subprocess.run(_command(archive, output), capture_output=True, text=True)
    assert resumed.returncode == 0, resumed.stderr
    assert _tree(output) == reference


def test_a_run_killed_while_deleting_its_work_folder_starts_over(
    archive: Path, reference: dict[str, bytes], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Deleting the work folder is not atomic: stop it after its first file, as a kill would
    # (the staged documents gone, say). The next run must not resume from the checkpoints.
    import shutil as shutil_module

    import corpusprep.pipeline as pipeline_module

    output = tmp_path / "out"
    definition = load_definition(DEMO).with_folders(input=archive, output=output)
    real_rmtree = shutil_module.rmtree

    def interrupted_rmtree(path: Any, *args: Any, **kwargs: Any) -> None:
        if Path(path).name == ".work":
            (Path(path) / "documents.arrow").unlink()
            raise KeyboardInterrupt
        real_rmtree(path, *args, **kwargs)

    monkeypatch.setattr(pipeline_module.shutil, "rmtree", interrupted_rmtree)
    with pytest.raises(KeyboardInterrupt):
        run_pipeline(definition)
    monkeypatch.setattr(pipeline_module.shutil, "rmtree", real_rmtree)
    run_pipeline(definition)
    assert _tree(output) == reference
