"""Speed of the clean stage against ftfy.fix_text with the same ftfy settings, on real text.

Run: ``.venv/bin/python bench/clean_speed.py [FOLDER ...]`` (default: the Python
documentation sources, ``*.rst.txt``). Prints MB/s (MB = 10**6 bytes of UTF-8
input) of:

* ``clean_text`` (the stage: fast repair plus its own steps);
* ``ftfy.fix_text`` with :func:`corpusprep.clean.repair_settings` on every document
  (the same ftfy settings the stage uses);
* ``reference_clean_text`` (the stage with ftfy run on every line);

and how many documents differ between ``clean_text`` and the reference (must be
0), and between ``clean_text`` and plain ftfy (documents the stage's own steps
change: blank lines, trailing spaces, controls).
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable
from pathlib import Path

import ftfy

from corpusprep.clean import CleanConfig, clean_text, reference_clean_text, repair_settings

PYTHON_DOCS = Path("/usr/share/doc/python3.11-doc/html/_sources")


def _timed(function: Callable[[str], str], docs: list[str], repeats: int) -> tuple[float, list[str]]:
    """Best wall time of ``repeats`` passes over ``docs``, and the outputs of the last pass."""
    best = float("inf")
    outputs: list[str] = []
    for _ in range(repeats):
        start = time.perf_counter()
        outputs = [function(doc) for doc in docs]
        best = min(best, time.perf_counter() - start)
    return best, outputs


def measure(docs: list[str], config: CleanConfig, *, repeats: int = 3) -> dict[str, float]:
    """MB/s of the clean stage and of ftfy with the same settings, their ratio, and output differences."""
    megabytes = sum(len(doc.encode("utf-8", "surrogatepass")) for doc in docs) / 1e6
    fixer = repair_settings(config)
    clean_seconds, cleaned = _timed(lambda doc: clean_text(doc, config)[0], docs, repeats)
    ftfy_seconds, fixed = _timed(lambda doc: ftfy.fix_text(doc, fixer), docs, repeats)
    reference_seconds, reference = _timed(lambda doc: reference_clean_text(doc, config)[0], docs, 1)
    return {
        "documents": float(len(docs)),
        "megabytes": megabytes,
        "clean_mb_per_s": megabytes / clean_seconds,
        "ftfy_mb_per_s": megabytes / ftfy_seconds,
        "ratio": ftfy_seconds / clean_seconds,
        "reference_mb_per_s": megabytes / reference_seconds,
        "differing_from_reference": float(sum(a != b for a, b in zip(cleaned, reference, strict=True))),
        "differing_from_plain_ftfy": float(sum(a != b for a, b in zip(cleaned, fixed, strict=True))),
    }


def _read_folder(folder: Path) -> list[str]:
    pattern = "*.rst.txt" if folder == PYTHON_DOCS else "*"
    docs = []
    for path in sorted(folder.rglob(pattern)):
        if path.is_file():
            try:
                docs.append(path.read_text(encoding="utf-8"))
            except UnicodeDecodeError:
                continue
    return docs


def main(arguments: list[str]) -> int:
    folders = [Path(argument) for argument in arguments] or [PYTHON_DOCS]
    docs = [doc for folder in folders for doc in _read_folder(folder)]
    if not docs:
        print(f"no UTF-8 documents in {', '.join(map(str, folders))}", file=sys.stderr)
        return 1
    shown = ", ".join(map(str, folders))
    print(f"ftfy {ftfy.__version__}, Python {sys.version.split()[0]}, folders: {shown}")
    for label, config in (("default settings", CleanConfig()), ("NFKC", CleanConfig(normalization="NFKC"))):
        figures = measure(docs, config)
        print(
            f"{label}: {int(figures['documents'])} documents, {figures['megabytes']:.2f} MB; "
            f"clean_text {figures['clean_mb_per_s']:.1f} MB/s, "
            f"ftfy.fix_text (same settings) {figures['ftfy_mb_per_s']:.2f} MB/s, "
            f"ratio {figures['ratio']:.1f}x; "
            f"reference (ftfy on every line) {figures['reference_mb_per_s']:.2f} MB/s; "
            f"differing from reference: {int(figures['differing_from_reference'])}, "
            f"from plain ftfy: {int(figures['differing_from_plain_ftfy'])}"
        )
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
