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
