"""Publishing a run's output folder: refuse to overwrite by accident, replace by renames."""

from __future__ import annotations

import os
import shutil
from pathlib import Path

from corpusprep.errors import OutputExistsError

__all__ = ["check_output_folder", "publish_folder"]


def publish_folder(partial: Path, output: Path) -> None:
    """Replace ``output`` by ``partial`` with renames; an old output is removed only after."""
    old = None
    if output.exists():
        if output.is_dir() and not any(output.iterdir()):
            output.rmdir()
        else:
            old = output.with_name(f".{output.name}.old-{os.getpid()}")
            output.rename(old)
    partial.rename(output)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def check_output_folder(output: Path, force: bool) -> None:
    """Refuse a path that is not a folder, or a non-empty folder unless ``force``."""
    if output.exists() and not output.is_dir():
        raise OutputExistsError(f"{output}: the output path exists and is not a folder")
    if output.is_dir() and any(output.iterdir()) and not force:
        raise OutputExistsError(
            f"{output}: the output folder is not empty; choose another folder or pass --force to replace it"
        )
