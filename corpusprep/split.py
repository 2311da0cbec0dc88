"""Assigning documents to train / validation / test.

A document's split is a pure function of its *split key* and the seed: the
key is hashed with XXH3-64 and the hash, read as a fraction of 2**64, is
compared with the cumulative ratios. So a document's split never depends on
the other documents, and adding documents moves nobody.

The split key of a document is, in order of preference: its group (the
definition's group field), else the XXH3-128 of its cleaned text. Documents
joined by a group or by a near-duplicate cluster form a *component*; the
component's key is the smallest member key, and every member takes the
component's split. Limits: a component's key can change when a new member
joins it with a smaller key, which can move the whole component; and
changing the cleaning settings changes text hashes, hence splits.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from corpusprep.config import setting
from corpusprep.errors import DefinitionError
from corpusprep.hashing import keyed_hash64

__all__ = ["SPLITS", "SplitConfig", "assign_splits", "components", "split_of"]

SPLITS = ("train", "validation", "test")
_TWO_64 = float(2**64)


@dataclass(frozen=True, slots=True, kw_only=True)
class SplitConfig:
    """Settings of the split stage (definition table ``[split]``)."""

    train: float = setting(0.9, "Target fraction of components assigned to train.", minimum=0.0, maximum=1.0)
    validation: float = setting(0.05, "Target fraction assigned to validation.", minimum=0.0, maximum=1.0)
    test: float = setting(0.05, "Target fraction assigned to test.", minimum=0.0, maximum=1.0)
    seed: int = setting(0, "Seed of the split hash; a different seed gives a different partition.", minimum=0)

    def __post_init__(self) -> None:
        total = self.train + self.validation + self.test
        if abs(total - 1.0) > 1e-9:
            raise DefinitionError(
                f"split.train + split.validation + split.test = {total:g}: "
                "the three fractions must add up to 1"
            )


def split_of(key: str, config: SplitConfig) -> str:
    """The split of one split key.

    >>> split_of("g:thread-7", SplitConfig(train=1.0, validation=0.0, test=0.0))
    'train'
    >>> split_of("g:thread-7", SplitConfig(train=0.0, validation=0.0, test=1.0))
    'test'
    """
    fraction = keyed_hash64(key, config.seed) / _TWO_64
    if fraction < config.train:
        return SPLITS[0]
    if fraction < config.train + config.validation:
        return SPLITS[1]
    return SPLITS[2]


def components(count: int, edges: Sequence[tuple[np.ndarray, np.ndarray]]) -> np.ndarray:
    """Connected components of ``count`` nodes joined by edge arrays.

    Each item of ``edges`` is a pair of equal-length int arrays ``(a, b)``.
    Returns, per node, the smallest node index of its component.

    >>> components(5, [(np.array([1, 4]), np.array([3, 1]))]).tolist()
    [0, 1, 2, 1, 1]
    """
    parent = np.arange(count, dtype=np.int64)

    def find(node: int) -> int:
        root = node
        while parent[root] != root:
            root = int(parent[root])
        while parent[node] != root:
            parent[node], node = root, int(parent[node])
        return root

    for left, right in edges:
        for a, b in zip(left.tolist(), right.tolist(), strict=True):
            ra, rb = find(a), find(b)
            if ra != rb:
                parent[max(ra, rb)] = min(ra, rb)
    return np.array([find(node) for node in range(count)], dtype=np.int64)


def assign_splits(keys: Sequence[str], component_of: np.ndarray, config: SplitConfig) -> list[str]:
    """Splits for documents with member ``keys`` grouped by ``component_of``.

    The component's key is the smallest member key; all members share its split.
    """
    smallest: dict[int, str] = {}
    for key, comp in zip(keys, component_of.tolist(), strict=True):
        current = smallest.get(comp)
        if current is None or key < current:
            smallest[comp] = key
    split_by_component = {comp: split_of(key, config) for comp, key in smallest.items()}
    return [split_by_component[comp] for comp in component_of.tolist()]
