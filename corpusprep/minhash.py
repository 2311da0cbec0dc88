"""MinHash signatures of shingle-key sets (the sketch; no index, no storage).

A signature holds, for each of ``permutations`` hash functions h_i, the
minimum of h_i over the document's shingle keys. For a random permutation,
P[min h(A) = min h(B)] = J(A, B) (Broder 1997; MMDS §3.3.3), so the fraction
of equal positions of two signatures estimates the Jaccard similarity, with
standard error sqrt(J(1 - J) / permutations) (the mean of Bernoulli(J) draws).

Hash functions
--------------
:class:`MultiplyShift` draws ``permutations`` functions on 32-bit keys

    h_i(x) = (a_i * x + b_i) mod 2^32,   a_i odd,

computed in NumPy's wrapping ``uint32`` arithmetic. The 32-bit key x is the
XOR of the halves of the shingle's 64-bit key (:func:`fold_key`). Each h_i is
a bijection of the 32-bit words, so when the keys are uniformly random (they
are SplitMix64/XXH3 outputs, never raw structured integers) each h_i(x) is
uniform too and P[min h_i(A) = min h_i(B)] = J(A, B) holds for every i; the
functions differ by a random affine map, and the tests check that the
estimates behave as independent draws (mean and binomial standard error over
many seeds, agreement with datasketch). This replaces the earlier 64-bit
multiply-add-shift, ((a x + b) mod 2^64) >> 32 (Dietzfelbinger 1996): the
32-bit form needs no 64-bit multiply, which NumPy has no SIMD for on AVX2
machines, and halves the memory traffic; signatures are about twice as fast.
The price is that the guarantee now rests on the keys being random (the
multiply-add-shift form is 2-independent on any keys). Two different shingles
share a 32-bit key with probability 2^-32, which adds a shared shingle to a
pair of documents of sizes m and n with probability about m*n/2^32 (e.g. 2e-4
for 1000-shingle documents): negligible beside the estimator's error.

Parameters a_i and b_i are the low 32 bits of the XXH3-64 digests of
``b"minhash-multiplier:<i>"`` (with the lowest bit set) and
``b"minhash-increment:<i>"`` under the signature seed: explicit, independent
of NumPy's random streams, and stable across versions.

Signature values
----------------
Signatures are ``uint32``, one row per document: ``permutations * 4`` bytes
per document (1 KiB at the default 256). The value ``EMPTY_VALUE = 2^32 - 1``
is reserved: a row made entirely of it is the signature of an empty shingle
set. A non-empty set's minima are capped at ``2^32 - 2``, so it can never look
empty; the cap merges two hash values that a minimum reaches with probability
below 2^-31 per permutation.

Any object with ``permutations``, ``shift``, ``value_dtype`` and
``fill(keys, out)`` writing the (permutations, n) values of n keys may replace
the family (see :class:`HashFunctions`), which is how the tests inject the
hash functions of MMDS Example 3.8.
"""

from __future__ import annotations

import dataclasses
import types
from collections.abc import Iterable, Sequence
from typing import Protocol

import numpy as np
import xxhash

from corpusprep.shingles import compiled_kernels

__all__ = [
    "EMPTY_VALUE",
    "HashFunctions",
    "MultiplyShift",
    "empty_rows",
    "fold_key",
    "pair_similarity",
    "signature_matrix",
    "signature_matrix_numpy",
    "signature_scalar",
    "signature_similarity",
]

EMPTY_VALUE = 0xFFFFFFFF
_CAP = EMPTY_VALUE - 1
_MASK32 = 0xFFFFFFFF
# Cells of the (permutations, keys) work array: 1 MiB of uint32, which stays in a 1 MiB L2 cache.
_CHUNK_CELLS = 1 << 18
# Mean keys per set in a block below which one reduceat beats one reduction per set.
_REDUCEAT_BELOW = 256


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

    @property
    def value_dtype(self) -> np.dtype[np.unsignedinteger]:
        """Unsigned dtype of the values ``fill`` writes (``uint32`` or ``uint64``)."""
        ...

    def fill(self, keys: np.ndarray, out: np.ndarray) -> None:
        """Write function i's value on key j into ``out[i, j]`` (shape (permutations, len(keys)))."""
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
            [_parameter(b"minhash-multiplier", i, self.seed) & _MASK32 | 1 for i in range(count)], np.uint32
        )
        increments = np.array(
            [_parameter(b"minhash-increment", i, self.seed) & _MASK32 for i in range(count)], np.uint32
        )
        multipliers.flags.writeable = False
        increments.flags.writeable = False
        object.__setattr__(self, "multipliers", multipliers)
        object.__setattr__(self, "increments", increments)

    @property
    def shift(self) -> int:
        """The values are the signature values: no shift."""
        return 0

    @property
    def value_dtype(self) -> np.dtype[np.unsignedinteger]:
        """``uint32``: all arithmetic wraps modulo 2^32."""
        return np.dtype(np.uint32)

    def fill(self, keys: np.ndarray, out: np.ndarray) -> None:
        """``(a_i * fold(x) + b_i) mod 2^32`` for every key x and function i, into a ``uint32`` array."""
        np.multiply(self.multipliers[:, None], fold_key(keys).astype(np.uint32)[None, :], out=out)
        np.add(out, self.increments[:, None], out=out)


def _block_minima(values: np.ndarray, piece_starts: np.ndarray) -> np.ndarray:
    """Column-piece minima of a (permutations, m) block: shape (permutations, pieces)."""
    pieces = piece_starts.size
    if values.shape[1] < _REDUCEAT_BELOW * pieces:
        minima: np.ndarray = np.minimum.reduceat(values, piece_starts, axis=1)
        return minima
    # Few long pieces: one contiguous reduction each (reduceat does not use the SIMD reduction).
    minima = np.empty((values.shape[0], pieces), dtype=values.dtype)
    bounds = [*piece_starts.tolist(), values.shape[1]]
    for number in range(pieces):
        np.min(values[:, bounds[number] : bounds[number + 1]], axis=1, out=minima[:, number])
    return minima


def signature_matrix(key_sets: Sequence[np.ndarray], functions: HashFunctions) -> np.ndarray:
    """Signatures of many key sets at once: shape (len(key_sets), permutations), ``uint32``.

    Keys may repeat (a multiset has the minima of its set). An empty set gets a row
    of :data:`EMPTY_VALUE`. For :class:`MultiplyShift`, once the process has done
    enough work to load them (:func:`corpusprep.shingles.compiled_kernels`), the
    compiled kernel computes the rows in one fused pass per key; otherwise, and for
    any other family, :func:`signature_matrix_numpy`. Both give the same values.
    """
    if type(functions) is MultiplyShift:
        total = sum(np.asarray(keys).size for keys in key_sets)
        # About 8 bytes of text per key, the unit compiled_kernels counts in.
        kernels = compiled_kernels(8 * total)
        if kernels is not None:
            return _signatures_compiled(kernels, key_sets, functions)
    return signature_matrix_numpy(key_sets, functions)


def signature_matrix_numpy(key_sets: Sequence[np.ndarray], functions: HashFunctions) -> np.ndarray:
    """:func:`signature_matrix` by NumPy alone, for any family (the reference of the compiled path).

    The keys of all sets are concatenated and processed in blocks of about 2^18
    cells; values are laid out (permutations, keys) so that minima run along
    contiguous memory: one ``np.minimum.reduceat`` over a block of many short
    sets, one SIMD reduction per set for a block of few long ones. The minimum of
    each set's piece of a block is merged into the set's row, so the work array
    stays small however large the documents are.
    """
    permutations = functions.permutations
    count = len(key_sets)
    dtype = np.dtype(functions.value_dtype)
    minima = np.full((count, permutations), np.iinfo(dtype).max, dtype=dtype)
    sizes = np.array([np.asarray(keys).size for keys in key_sets], dtype=np.int64)
    if count and sizes.sum() > 0:
        keys_all = np.concatenate([np.asarray(keys, dtype=np.uint64).ravel() for keys in key_sets])
        owner_starts = np.concatenate(([0], np.cumsum(sizes)[:-1]))
        owners = np.repeat(np.arange(count, dtype=np.int64), sizes)
        block = max(1, _CHUNK_CELLS // permutations)
        work = np.empty((permutations, min(block, keys_all.size)), dtype=dtype)
        for begin in range(0, keys_all.size, block):
            end = min(begin + block, keys_all.size)
            values = work[:, : end - begin]
            functions.fill(keys_all[begin:end], values)
            first_owner, last_owner = int(owners[begin]), int(owners[end - 1])
            members = np.arange(first_owner, last_owner + 1)
            members = members[sizes[members] > 0]
            piece_starts = np.maximum(owner_starts[members], begin) - begin
            pieces = _block_minima(values, piece_starts)
            minima[members] = np.minimum(minima[members], pieces.T)
    shifted = minima >> np.array(functions.shift, dtype=dtype)
    signatures: np.ndarray = np.minimum(shifted, np.array(_CAP, dtype=dtype)).astype(np.uint32)
    signatures[sizes == 0] = EMPTY_VALUE
    return signatures


def _signatures_compiled(
    kernels: types.ModuleType, key_sets: Sequence[np.ndarray], functions: MultiplyShift
) -> np.ndarray:
    """:func:`signature_matrix_numpy` for :class:`MultiplyShift` by one fused compiled loop."""
    sizes = np.array([np.asarray(keys).size for keys in key_sets], dtype=np.int64)
    offsets = np.zeros(len(key_sets) + 1, dtype=np.int64)
    np.cumsum(sizes, out=offsets[1:])
    if offsets[-1] > 0:
        keys_all = np.concatenate([np.asarray(keys, dtype=np.uint64).ravel() for keys in key_sets])
    else:
        keys_all = np.empty(0, dtype=np.uint64)
    signatures: np.ndarray = kernels.signatures(
        keys_all, offsets, functions.multipliers, functions.increments
    )
    np.minimum(signatures, np.uint32(_CAP), out=signatures)
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
        lowest = min(((multiplier * x + increment) & _MASK32) for x in folded)
        signature.append(min(lowest, _CAP))
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
