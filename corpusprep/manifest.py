"""The manifest: the last file a run writes, and the proof of what it made.

``manifest.json`` holds the resolved definition and its hash, every input
file with its size and XXH3-128, the counts of every stage, the ledger's
totals, the tokenizer, and every shard with its shape, dtype and XXH3-128.
It is written to a temporary name and renamed, so a folder either has a
complete manifest or none.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

__all__ = ["MANIFEST_FILE", "SCHEMA_VERSION", "dump_json", "read_manifest", "write_json_atomic"]

MANIFEST_FILE = "manifest.json"
#: Raised whenever a key changes meaning or disappears (see CHANGELOG.md).
SCHEMA_VERSION = 1


def dump_json(data: Any) -> str:
    """The canonical text of a JSON document: two-space indent, UTF-8, final newline.

    >>> dump_json({"b": 1, "a": [1, 2]})
    '{\\n  "b": 1,\\n  "a": [\\n    1,\\n    2\\n  ]\\n}\\n'
    """
    return json.dumps(data, indent=2, ensure_ascii=False, allow_nan=False) + "\n"


def write_json_atomic(path: Path, data: Any) -> None:
    """Write ``data`` as canonical JSON to ``path`` via a temporary file and a rename."""
    temporary = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    with open(temporary, "w", encoding="utf-8", newline="\n") as handle:
        handle.write(dump_json(data))
        handle.flush()
        os.fsync(handle.fileno())
    os.replace(temporary, path)


def read_manifest(folder: Path) -> dict[str, Any]:
    """Load ``folder/manifest.json``."""
    with open(folder / MANIFEST_FILE, encoding="utf-8") as handle:
        data: dict[str, Any] = json.load(handle)
    return data
