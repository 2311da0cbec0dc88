"""corpusprep: raw text folder in, leak-free next-token training windows out.

The library's main entry points:

* :func:`load_definition` / :func:`run_pipeline` — run a pipeline definition;
* :func:`open_split` — read a finished output's ``(x, y)`` windows for training;
* the stage settings (``ReadConfig``, ``CleanConfig``, ...) and stage functions,
  for use outside the pipeline.

Importing the package is cheap: each public name loads its module on first use.
"""

from __future__ import annotations

__version__ = "0.1.0"

import importlib
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from corpusprep.clean import CleanConfig, clean_batch, clean_text
    from corpusprep.definition import Definition, load_definition, parse_definition
    from corpusprep.errors import (
        CorpusprepError,
        DefinitionError,
        InputError,
        IntegrityError,
        OutputExistsError,
        TooManyRejectedError,
    )
    from corpusprep.exact import ExactConfig
    from corpusprep.near import NearConfig, find_clusters, signature_batch
    from corpusprep.pack import PackConfig, PackResult, document_order, pack_split, smallest_dtype
    from corpusprep.pipeline import RunResult, run_pipeline
    from corpusprep.read import InputFile, ReadConfig, read_folder
    from corpusprep.shards import ShardInfo, read_shard, write_shard
    from corpusprep.split import SplitConfig, split_of
    from corpusprep.tokens import ByteTokenizer, Tokenizer, TokenizerConfig, build_tokenizer
    from corpusprep.windows import SplitWindows, open_split

# Public names are imported on first use (PEP 562), so `corpusprep --help` stays instant.
_LAZY = {
    "ByteTokenizer": "corpusprep.tokens",
    "CleanConfig": "corpusprep.clean",
    "CorpusprepError": "corpusprep.errors",
    "Definition": "corpusprep.definition",
    "DefinitionError": "corpusprep.errors",
    "ExactConfig": "corpusprep.exact",
    "InputError": "corpusprep.errors",
    "InputFile": "corpusprep.read",
    "IntegrityError": "corpusprep.errors",
    "NearConfig": "corpusprep.near",
    "OutputExistsError": "corpusprep.errors",
    "PackConfig": "corpusprep.pack",
    "PackResult": "corpusprep.pack",
    "ReadConfig": "corpusprep.read",
    "RunResult": "corpusprep.pipeline",
    "ShardInfo": "corpusprep.shards",
    "SplitConfig": "corpusprep.split",
    "SplitWindows": "corpusprep.windows",
    "Tokenizer": "corpusprep.tokens",
    "TokenizerConfig": "corpusprep.tokens",
    "TooManyRejectedError": "corpusprep.errors",
    "build_tokenizer": "corpusprep.tokens",
    "clean_batch": "corpusprep.clean",
    "clean_text": "corpusprep.clean",
    "document_order": "corpusprep.pack",
    "find_clusters": "corpusprep.near",
    "load_definition": "corpusprep.definition",
    "open_split": "corpusprep.windows",
    "pack_split": "corpusprep.pack",
    "parse_definition": "corpusprep.definition",
    "read_folder": "corpusprep.read",
    "read_shard": "corpusprep.shards",
    "run_pipeline": "corpusprep.pipeline",
    "signature_batch": "corpusprep.near",
    "smallest_dtype": "corpusprep.pack",
    "split_of": "corpusprep.split",
    "write_shard": "corpusprep.shards",
}


def __getattr__(name: str) -> Any:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'corpusprep' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


__all__ = [
    "ByteTokenizer",
    "CleanConfig",
    "CorpusprepError",
    "Definition",
    "DefinitionError",
    "ExactConfig",
    "InputError",
    "InputFile",
    "IntegrityError",
    "NearConfig",
    "OutputExistsError",
    "PackConfig",
    "PackResult",
    "ReadConfig",
    "RunResult",
    "ShardInfo",
    "SplitConfig",
    "SplitWindows",
    "Tokenizer",
    "TokenizerConfig",
    "TooManyRejectedError",
    "__version__",
    "build_tokenizer",
    "clean_batch",
    "clean_text",
    "document_order",
    "find_clusters",
    "load_definition",
    "open_split",
    "pack_split",
    "parse_definition",
    "read_folder",
    "read_shard",
    "run_pipeline",
    "signature_batch",
    "smallest_dtype",
    "split_of",
    "write_shard",
]
