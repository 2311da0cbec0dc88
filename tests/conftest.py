"""Shared test setup.

HF libraries read their offline switches once, at import time (REFERENCES §9,
a huggingface_hub maintainer's note), so they are set here, before any test
module imports them. Tests never use the network.
"""

from __future__ import annotations

import os

os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("HF_DATASETS_OFFLINE", "1")
os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")

import shutil
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).parent.parent
DEMO_DEFINITION = ROOT / "pipelines" / "demo.toml"


@pytest.fixture(scope="session")
def archive(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The invented ferry archive (the demo data), built once per test session."""
    sys.path.insert(0, str(ROOT / "fixtures"))
    import make_ferry_archive

    folder = tmp_path_factory.mktemp("ferry") / "ferry"
    make_ferry_archive.build(folder)
    return folder


@pytest.fixture(scope="session")
def demo_output(archive: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    """pipelines/demo.toml run once on the archive; tests must not change it (use ``copy``)."""
    from corpusprep.definition import load_definition
    from corpusprep.pipeline import run_pipeline

    output = tmp_path_factory.mktemp("runs") / "demo"
    run_pipeline(load_definition(DEMO_DEFINITION).with_folders(input=archive, output=output), workers=1)
    return output


@pytest.fixture(scope="session")
def demo(demo_output: Path) -> Path:
    """The demo output under the name the audit tests use."""
    return demo_output


@pytest.fixture()
def copy(demo_output: Path, tmp_path: Path) -> Path:
    """A private copy of the demo output, free to alter."""
    target = tmp_path / "out"
    shutil.copytree(demo_output, target)
    return target
