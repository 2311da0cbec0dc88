"""MinHash signatures of shingle-key sets (the sketch; no index, no storage).

A signature holds, for each of ``permutations`` hash functions h_i, the
minimum of h_i over the document's shingle keys. For a random permutation,
P[min h(A) = min h(B)] = J(A, B) (Broder 1997; MMDS §3.3.3), so the fraction
of equal positions of two signatures estimates the Jaccard similarity, with
standard error sqrt(J(1 - J) / permutations) (the mean of Bernoulli(J) draws).

Hash functions
--------------
:class:`MultiplyShift` is the strongly universal *multiply-add-shift* family
of Dietzfelbinger (1996), as presented by Thorup, "High Speed Hashing for
Integers and Strings" (2015) §3.3 (cited from memory): for a 32-bit key x and
a, b drawn uniformly from [0, 2^64),

    h_{a,b}(x) = ((a * x + b) mod 2^64) >> 32

is strongly universal (2-independent) onto 32 bits, because 64 >= 32 + 32 - 1.
That is the same independence as the textbook (a*x + b) mod p, but the
arithmetic is exact in NumPy's wrapping ``uint64`` (no overflow to guard, no
modular reduction), so a permutation costs one multiply, one add and one min
per key. The 32-bit key is the XOR of the halves of the shingle's XXH3-64 key;
two different shingles share it with probability 2^-32, which adds a shared
shingle to a pair of documents of sizes m and n with probability about
m*n/2^32 (e.g. 2e-4 for 1000-shingle documents): negligible beside the
estimator's error. The inputs are XXH3 outputs, never raw structured integers.

Because ``>> 32`` is monotone, the minimum is taken over the full 64-bit
values and shifted once at the end (``min(v >> s) == (min v) >> s``).

Parameters a_i and b_i are XXH3-64 digests of ``b"minhash-multiplier:<i>"`` and
``b"minhash-increment:<i>"`` under the signature seed: explicit, independent of
NumPy's random streams, and stable across versions.

Signature values
----------------
Signatures are ``uint32``, one row per document: ``permutations * 4`` bytes
per document (1 KiB at the default 256). The value ``EMPTY_VALUE = 2^32 - 1``
is reserved: a row made entirely of it is the signature of an empty shingle
set. A non-empty set's minima are capped at ``2^32 - 2``, so it can never look
empty; the cap merges two hash values that a minimum reaches with probability
below 2^-31 per permutation.

Any object with ``permutations``, ``shift`` and ``fill(keys, out)`` writing the
(permutations, n) ``uint64`` values of n keys may replace the family (see
:class:`HashFunctions`), which is how the tests inject the hash functions of
MMDS Example 3.8.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable, Sequence
from typing import Protocol

import numpy as np
import xxhash

__all__ = [
    "EMPTY_VALUE",
    "HashFunctions",
    "MultiplyShift",
    "empty_rows",
    "fold_key",
    "pair_similarity",
    "signature_matrix",
    "signature_scalar",
    "signature_similarity",
]

EMPTY_VALUE = 0xFFFFFFFF
_CAP = EMPTY_VALUE - 1
_MASK64 = (1 << 64) - 1
_MASK32 = 0xFFFFFFFF
# Cells of the (permutations, keys) work array: 2 MiB of uint64.
_CHUNK_CELLS = 1 << 18


class HashFunctions(Protocol):
    """What :func:`signature_matrix` needs from a family of hash functions."""

    @property
    def permutations(self) -> int:
        """Number of hash functions (signature length)."""
        ...

    @property
    def shift(self) -> int:
        """Right shift applied to each minimum to give the signature value."""
        ...

    def fill(self, keys: np.ndarray, out: np.ndarray) -> None:
        """Write function i's value on key j into ``out[i, j]`` (shape (permutations, len(keys)), uint64)."""
        ...


def fold_key(keys: np.ndarray) -> np.ndarray:
    """The 32-bit key (XOR of the two halves) of 64-bit shingle keys, as ``uint64``.

    >>> fold_key(np.array([0x0000000100000002], dtype=np.uint64)).tolist()
    [3]
    """
    keys = np.asarray(keys, dtype=np.uint64)
    folded: np.ndarray = (keys ^ (keys >> np.uint64(32))) & np.uint64(_MASK32)
    return folded


def _parameter(label: bytes, index: int, seed: int) -> int:
    return xxhash.xxh3_64_intdigest(label + b":" + str(index).encode("ascii"), seed=seed)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class MultiplyShift:
    """``permutations`` multiply-add-shift hash functions drawn from ``seed``."""

    permutations: int
    seed: int
    multipliers: np.ndarray = dataclasses.field(init=False, repr=False, compare=False)
    increments: np.ndarray = dataclasses.field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        if self.permutations < 1:
            raise ValueError(f"permutations = {self.permutations}: must be at least 1")
        if not 0 <= self.seed < 1 << 64:
            raise ValueError(f"seed = {self.seed}: must be between 0 and 2^64 - 1")
        count = self.permutations
        multipliers = np.array(
            [_parameter(b"minhash-multiplier", i, self.seed) for i in range(count)], np.uint64
        )
        increments = np.array(
            [_parameter(b"minhash-increment", i, self.seed) for i in range(count)], np.uint64
        )
        multipliers.flags.writeable = False
        increments.flags.writeable = False
        object.__setattr__(self, "multipliers", multipliers)
        object.__setattr__(self, "increments", increments)

    @property
    def shift(self) -> int:
        """Signature values are the top 32 bits of the 64-bit minimum."""
        return 32

    def fill(self, keys: np.ndarray, out: np.ndarray) -> None:
        """``(a_i * fold(x) + b_i) mod 2^64`` for every key x and function i (before the shift)."""
        np.multiply(self.multipliers[:, None], fold_key(keys)[None, :], out=out)
        np.add(out, self.increments[:, None], out=out)


def signature_matrix(key_sets: Sequence[np.ndarray], functions: HashFunctions) -> np.ndarray:
    """Signatures of many key sets at once: shape (len(key_sets), permutations), ``uint32``.

    The keys of all sets are concatenated and processed in blocks; values are laid
    out (permutations, keys) so that ``np.minimum.reduceat`` runs along contiguous
    memory (several times faster than along the other axis); the minimum of each
    set's piece of a block is merged into the set's row, so the work array stays
    about 2 MiB however large the documents are. An empty set gets a row of :data:`EMPTY_VALUE`.
    """
    permutations = functions.permutations
    count = len(key_sets)
    minima = np.full((count, permutations), np.iinfo(np.uint64).max, dtype=np.uint64)
    sizes = np.array([np.asarray(keys).size for keys in key_sets], dtype=np.int64)
    if count and sizes.sum() > 0:
        keys_all = np.concatenate([np.asarray(keys, dtype=np.uint64).ravel() for keys in key_sets])
        owner_starts = np.concatenate(([0], np.cumsum(sizes)[:-1]))
        owners = np.repeat(np.arange(count, dtype=np.int64), sizes)
        block = max(1, _CHUNK_CELLS // permutations)
        work = np.empty((permutations, min(block, keys_all.size)), dtype=np.uint64)
        for begin in range(0, keys_all.size, block):
            end = min(begin + block, keys_all.size)
            values = work[:, : end - begin]
            functions.fill(keys_all[begin:end], values)
            block_owners = owners[begin:end]
            first_owner, last_owner = int(block_owners[0]), int(block_owners[-1])
            members = np.arange(first_owner, last_owner + 1)
            members = members[sizes[members] > 0]
            piece_starts = np.maximum(owner_starts[members], begin) - begin
            pieces = np.minimum.reduceat(values, piece_starts, axis=1)
            minima[members] = np.minimum(minima[members], pieces.T)
    signatures: np.ndarray = np.minimum(minima >> np.uint64(functions.shift), np.uint64(_CAP)).astype(
        np.uint32
    )
    signatures[sizes == 0] = EMPTY_VALUE
    return signatures


def signature_scalar(keys: Iterable[int], functions: MultiplyShift) -> list[int]:
    """Pure-Python reference for one set and :class:`MultiplyShift` (exact integer arithmetic)."""
    folded = [((key ^ (key >> 32)) & _MASK32) for key in (int(k) for k in keys)]
    if not folded:
        return [EMPTY_VALUE] * functions.permutations
    signature = []
    for multiplier, increment in zip(
        functions.multipliers.tolist(), functions.increments.tolist(), strict=True
    ):
        lowest = min(((multiplier * x + increment) & _MASK64) for x in folded)
        signature.append(min(lowest >> 32, _CAP))
    return signature


def empty_rows(signatures: np.ndarray) -> np.ndarray:
    """Boolean mask of the rows that are signatures of empty sets."""
    mask: np.ndarray = np.all(np.asarray(signatures) == EMPTY_VALUE, axis=1)
    return mask


def signature_similarity(first: np.ndarray, second: np.ndarray) -> float:
    """Fraction of equal positions of two signatures (the MinHash estimate of Jaccard).

    An empty signature is similar to nothing: the result is 0.0 if either is empty.

    >>> signature_similarity(np.array([1, 3, 0, 1], np.uint32), np.array([1, 2, 0, 5], np.uint32))
    0.5
    """
    left = np.asarray(first)
    right = np.asarray(second)
    if left.shape != right.shape:
        raise ValueError(f"signatures of lengths {left.shape} and {right.shape} cannot be compared")
    if np.all(left == EMPTY_VALUE) or np.all(right == EMPTY_VALUE):
        return 0.0
    return float(np.count_nonzero(left == right)) / left.size


def pair_similarity(
    signatures: np.ndarray, left: np.ndarray, right: np.ndarray, *, chunk: int = 8192
) -> np.ndarray:
    """Signature estimates for the pairs ``(left[i], right[i])`` of rows, as ``float64``.

    Works on a ``np.memmap`` too: rows are gathered ``chunk`` pairs at a time.
    Pairs with an empty signature get 0.0.
    """
    left = np.asarray(left, dtype=np.int64)
    right = np.asarray(right, dtype=np.int64)
    out = np.empty(left.size, dtype=np.float64)
    width = signatures.shape[1]
    for begin in range(0, left.size, chunk):
        rows_left = np.asarray(signatures[left[begin : begin + chunk]])
        rows_right = np.asarray(signatures[right[begin : begin + chunk]])
        equal = np.count_nonzero(rows_left == rows_right, axis=1)
        empty = np.all(rows_left == EMPTY_VALUE, axis=1) | np.all(rows_right == EMPTY_VALUE, axis=1)
        out[begin : begin + chunk] = np.where(empty, 0.0, equal / width)
    return out
