"""Speed of the tokenize stage beside HF ``tokenizers`` ``encode_batch`` on the same text and cores.

Run: ``.venv/bin/python bench/tokens_speed.py [KIND ...]`` (default: every kind but 'file').
The text is the Python documentation sources (``*.rst.txt``, Debian's python3.11-doc). For each
kind a tokenizer is built (trained on every second document; the other half is unseen text),
its ``tokenizer.json`` is loaded by HF ``tokenizers``, and both encode all documents in batches
of 256, as the pipeline hands them to a worker:

* ``ours``: :meth:`Tokenizer.encode_batch` (ids as NumPy arrays, what the stage writes);
* ``hf``: ``tokenizers.Tokenizer.encode_batch(batch, add_special_tokens=False)`` and ``.ids``
  of every encoding (HF's own multi-threaded path, ids as Python lists).

Figures are MB/s of UTF-8 input (MB = 10**6 bytes), best of ``repeats`` passes, and
``ratio = hf_seconds / ours_seconds`` (target >= 0.8). ``ids_equal`` checks that both gave the
same ids. Both sides run in this process with the same thread settings (HF's default: all
cores, unless TOKENIZERS_PARALLELISM=false is set in the environment).
"""

from __future__ import annotations

import os
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from tokenizers import Tokenizer as HFTokenizer

from corpusprep.tokens import TokenizerConfig, build_tokenizer

PYTHON_DOCS = Path("/usr/share/doc/python3.11-doc/html/_sources")
BATCH = 256
SETTINGS: dict[str, dict[str, Any]] = {
    "bytes": {},
    "characters": {"vocab_size": 512},
    "words": {"vocab_size": 32000},
    "bpe": {"vocab_size": 8192},
}


def _best(function: Callable[[], object], repeats: int) -> tuple[float, object]:
    best, result = float("inf"), None
    for _ in range(repeats):
        start = time.perf_counter()
        result = function()
        best = min(best, time.perf_counter() - start)
    return best, result


def measure(texts: list[str], config: TokenizerConfig, *, repeats: int = 3) -> dict[str, float | str]:
    """MB/s of our encode_batch and of HF encode_batch on the saved tokenizer.json, and their ratio."""
    train = texts[::2]
    start = time.perf_counter()
    tokenizer = build_tokenizer(config, lambda: iter(train))
    build_seconds = time.perf_counter() - start
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "tokenizer.json"
        tokenizer.save(path)
        hf = HFTokenizer.from_file(str(path))
    batches = [texts[i : i + BATCH] for i in range(0, len(texts), BATCH)]
    megabytes = sum(len(text.encode("utf-8")) for text in texts) / 1e6

    def ours_only() -> int:
        return sum(len(ids) for batch in batches for ids in tokenizer.encode_batch(batch))

    def theirs() -> int:
        return sum(
            len(encoding.ids)
            for batch in batches
            for encoding in hf.encode_batch(batch, add_special_tokens=False)
        )

    ours_seconds, our_tokens = _best(ours_only, repeats)
    hf_seconds, hf_tokens = _best(theirs, repeats)
    sample = texts[:BATCH]
    equal = [ids.tolist() for ids in tokenizer.encode_batch(sample)] == [
        encoding.ids for encoding in hf.encode_batch(sample, add_special_tokens=False)
    ]
    return {
        "kind": config.kind,
        "documents": float(len(texts)),
        "megabytes": megabytes,
        "vocab_size": float(tokenizer.vocab_size),
        "build_seconds": build_seconds,
        "ours_mb_per_s": megabytes / ours_seconds,
        "hf_mb_per_s": megabytes / hf_seconds,
        "ratio": hf_seconds / ours_seconds,
        "tokens_equal": float(our_tokens == hf_tokens),
        "ids_equal": float(equal),
    }


def main(kinds: list[str]) -> int:
    paths = sorted(PYTHON_DOCS.rglob("*.rst.txt"))
    if not paths:
        print(f"{PYTHON_DOCS}: not found; install the Debian package python3.11-doc", file=sys.stderr)
        return 1
    texts = [path.read_text(encoding="utf-8", errors="replace") for path in paths]
    print(
        f"{len(texts)} documents, cores {os.cpu_count()}, TOKENIZERS_PARALLELISM="
        f"{os.environ.get('TOKENIZERS_PARALLELISM', '(unset)')}"
    )
    for kind in kinds:
        result = measure(texts, TokenizerConfig(kind=kind, **SETTINGS[kind]))
        print(
            f"{kind:10} vocab {int(result['vocab_size']):6}  build {result['build_seconds']:6.2f} s  "
            f"ours {result['ours_mb_per_s']:7.2f} MB/s  hf {result['hf_mb_per_s']:7.2f} MB/s  "
            f"ratio {result['ratio']:5.2f}  same ids {bool(result['ids_equal'] and result['tokens_equal'])}"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:] or list(SETTINGS)))
