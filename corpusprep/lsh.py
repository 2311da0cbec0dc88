"""LSH banding: which signature pairs become candidates (the index; no sketch, no storage).

A signature of ``bands * rows`` positions is cut into ``bands`` bands of
``rows`` consecutive positions. Two documents are a *candidate pair* when
they agree on every position of at least one band. For Jaccard similarity s
that happens with probability 1 - (1 - s^rows)^bands (MMDS §3.4.2).

``bands`` is the number of bands and ``rows`` the number of signature
positions in each band, always in that order and always by full name: some
papers swap the two letters (Lee et al. 2022 write b for rows per band).

Band keys
---------
Each band of each document is reduced to one ``uint64`` key by a NumPy
multiply-xorshift mix of its ``rows`` values, started from the band index.
Equal bands always give equal keys; different bands may, rarely, give equal
keys too, which only adds a candidate that verification then rejects. So the
mix needs no cryptographic or universal property, only speed and spread.

Candidate pairs
---------------
For each band the documents are sorted by key (a stable sort, so equal keys
keep index order) and every run of equal keys yields pairs:

* a run of m <= ``bucket_limit`` members yields all m(m-1)/2 pairs;
* a longer run yields the m - 1 pairs (first, member): each member is linked to
  the run's first (smallest) index. Without verification this gives the same
  connected components as all pairs. With verification it may not: if the
  first member fails verification against two members that would have passed
  against each other, the edge between them is not seen in this band (it may
  still come from another band). Runs that long are large families of
  templated copies, which are mostly similar to their first member as well.

Pairs are ``(i, j)`` with ``i < j``, deduplicated across bands, sorted. Rows
that are empty signatures take part in no band.
"""

from __future__ import annotations

import numpy as np

from corpusprep.minhash import EMPTY_VALUE

__all__ = [
    "band_codes",
    "band_keys",
    "candidate_pairs",
    "candidate_probability",
    "check_banding",
    "choose_bands",
    "codes_to_pairs",
    "nonempty_rows",
    "weighted_error",
]

_GRID = 1000  # Simpson intervals on each side of the threshold
_MIX = np.uint64(0x9E3779B97F4A7C15)  # 2^64 / golden ratio, odd (common practice in hash mixing)
_MIX2 = np.uint64(0xBF58476D1CE4E5B9)  # the first multiplier of splitmix64's finaliser (from memory)


def candidate_probability(similarity: float | np.ndarray, bands: int, rows: int) -> float | np.ndarray:
    """P(candidate) = 1 - (1 - s^rows)^bands for Jaccard similarity s.

    >>> round(float(candidate_probability(0.8, 20, 5)), 4)
    0.9996
    """
    if bands < 1 or rows < 1:
        raise ValueError(f"bands = {bands}, rows = {rows}: both must be at least 1")
    s = np.asarray(similarity, dtype=np.float64)
    # 1 - (1 - x)^b computed as -expm1(b * log1p(-x)) keeps precision when s^rows is tiny.
    with np.errstate(divide="ignore"):
        result: np.ndarray = -np.expm1(bands * np.log1p(-(s**rows)))
    if np.ndim(result) == 0:
        return float(result)
    return result


def _simpson_weights(width: float) -> np.ndarray:
    """Composite Simpson weights for ``_GRID`` (even) equal intervals of ``width``."""
    weights = np.full(_GRID + 1, 2.0)
    weights[1::2] = 4.0
    weights[0] = weights[-1] = 1.0
    scaled: np.ndarray = weights * (width / 3.0)
    return scaled


def _errors_for_rows(
    threshold: float, rows: int, bands: np.ndarray, false_positive_weight: float, false_negative_weight: float
) -> np.ndarray:
    """:func:`weighted_error` for one ``rows`` and many ``bands`` at once."""
    below = np.linspace(0.0, threshold, _GRID + 1)
    above = np.linspace(threshold, 1.0, _GRID + 1)
    with np.errstate(divide="ignore"):
        log_below = np.log1p(-(below**rows))
        log_above = np.log1p(-(above**rows))
    counts = bands.astype(np.float64)[:, None]
    probability_below = -np.expm1(counts * log_below[None, :])
    miss_above = np.exp(counts * log_above[None, :])  # 1 - P(s) = (1 - s^rows)^bands
    false_positive = probability_below @ _simpson_weights(threshold / _GRID)
    false_negative = miss_above @ _simpson_weights((1.0 - threshold) / _GRID)
    errors: np.ndarray = false_positive_weight * false_positive + false_negative_weight * false_negative
    return errors


def weighted_error(
    threshold: float, bands: int, rows: int, false_positive_weight: float, false_negative_weight: float
) -> float:
    """w_fp * integral_0^t P(s) ds + w_fn * integral_t^1 (1 - P(s)) ds (Simpson, 1000 intervals each)."""
    if bands < 1 or rows < 1:
        raise ValueError(f"bands = {bands}, rows = {rows}: both must be at least 1")
    errors = _errors_for_rows(
        threshold, rows, np.array([bands]), false_positive_weight, false_negative_weight
    )
    return float(errors[0])


def choose_bands(
    threshold: float,
    permutations: int,
    false_positive_weight: float = 0.5,
    false_negative_weight: float = 0.5,
) -> tuple[int, int]:
    """The (bands, rows) with bands * rows <= permutations that minimise :func:`weighted_error`.

    Ties go to the fewest bands, then the fewest rows. A pure function.

    >>> choose_bands(0.5, 100, 0.5, 0.5)
    (20, 5)
    """
    if not 0.0 < threshold < 1.0:
        raise ValueError(f"threshold = {threshold}: must be between 0 and 1 (exclusive)")
    if permutations < 1:
        raise ValueError(f"permutations = {permutations}: must be at least 1")
    if false_positive_weight < 0 or false_negative_weight < 0:
        raise ValueError("false_positive_weight and false_negative_weight must not be negative")
    all_errors, all_bands, all_rows = [], [], []
    for rows in range(1, permutations + 1):
        bands = np.arange(1, permutations // rows + 1)
        all_errors.append(
            _errors_for_rows(threshold, rows, bands, false_positive_weight, false_negative_weight)
        )
        all_bands.append(bands)
        all_rows.append(np.full(bands.size, rows))
    errors = np.concatenate(all_errors)
    band_counts = np.concatenate(all_bands)
    row_counts = np.concatenate(all_rows)
    best = int(np.lexsort((row_counts, band_counts, errors))[0])
    return int(band_counts[best]), int(row_counts[best])


def band_keys(block: np.ndarray, band: int) -> np.ndarray:
    """One ``uint64`` key per row of ``block`` (shape (n, rows), ``uint32``) for band number ``band``."""
    values = np.asarray(block, dtype=np.uint64)
    keys = np.full(values.shape[0], (band + 1) * int(_MIX) % (1 << 64), dtype=np.uint64)
    for column in range(values.shape[1]):
        keys ^= values[:, column]
        keys *= _MIX2
        keys ^= keys >> np.uint64(31)
        keys *= _MIX
        keys ^= keys >> np.uint64(29)
    return keys


def _run_pairs(order: np.ndarray, sorted_keys: np.ndarray, bucket_limit: int) -> np.ndarray:
    """Pair codes ``i << 32 | j`` for the runs of equal keys of one band."""
    n = sorted_keys.size
    if n < 2:
        return np.empty(0, dtype=np.uint64)
    boundary = np.flatnonzero(sorted_keys[1:] != sorted_keys[:-1]) + 1
    run_starts = np.concatenate(([0], boundary))
    run_lengths = np.diff(np.concatenate((run_starts, [n])))
    codes: list[np.ndarray] = []
    small = (run_lengths >= 2) & (run_lengths <= bucket_limit)
    if small.any():
        starts = run_starts[small]
        lengths = run_lengths[small]
        positions = np.repeat(starts, lengths) + (
            np.arange(lengths.sum()) - np.repeat(np.cumsum(lengths) - lengths, lengths)
        )
        remaining = np.repeat(starts + lengths, lengths) - positions  # members after and including self
        for offset in range(1, int(lengths.max())):
            keep = remaining > offset
            positions, remaining = positions[keep], remaining[keep]
            left = order[positions].astype(np.uint64)
            right = order[positions + offset].astype(np.uint64)
            codes.append((left << np.uint64(32)) | right)
    big = run_lengths > bucket_limit
    if big.any():
        starts = run_starts[big]
        lengths = run_lengths[big]
        firsts = np.repeat(starts, lengths - 1)
        members = np.repeat(starts + 1, lengths - 1) + (
            np.arange((lengths - 1).sum()) - np.repeat(np.cumsum(lengths - 1) - (lengths - 1), lengths - 1)
        )
        codes.append((order[firsts].astype(np.uint64) << np.uint64(32)) | order[members].astype(np.uint64))
    if not codes:
        return np.empty(0, dtype=np.uint64)
    return np.unique(np.concatenate(codes))


def nonempty_rows(signatures: np.ndarray, *, chunk_rows: int = 65536) -> np.ndarray:
    """Row numbers of the signatures that are not empty (all :data:`EMPTY_VALUE`), ascending."""
    parts = []
    for begin in range(0, signatures.shape[0], chunk_rows):
        block = np.asarray(signatures[begin : begin + chunk_rows])
        parts.append(np.flatnonzero(~np.all(block == EMPTY_VALUE, axis=1)) + begin)
    return np.concatenate(parts) if parts else np.empty(0, dtype=np.int64)


def band_codes(
    signatures: np.ndarray,
    band: int,
    rows: int,
    nonempty: np.ndarray,
    *,
    bucket_limit: int = 64,
    chunk_rows: int = 65536,
) -> np.ndarray:
    """Sorted distinct pair codes ``i << 32 | j`` of one band (rows ``nonempty`` only)."""
    count = signatures.shape[0]
    keys = np.empty(count, dtype=np.uint64)
    for begin in range(0, count, chunk_rows):
        block = np.asarray(signatures[begin : begin + chunk_rows, band * rows : (band + 1) * rows])
        keys[begin : begin + block.shape[0]] = band_keys(block, band)
    keys = keys[nonempty]
    order = np.argsort(keys, kind="stable")
    return _run_pairs(nonempty[order], keys[order], bucket_limit)


def check_banding(shape: tuple[int, ...], bands: int, rows: int, bucket_limit: int) -> None:
    """Refuse a banding that does not fit a signature store of ``shape``."""
    count, width = shape
    if bands * rows > width:
        raise ValueError(
            f"bands * rows = {bands} * {rows} = {bands * rows} exceeds the signature length {width}"
        )
    if bucket_limit < 2:
        raise ValueError(f"bucket_limit = {bucket_limit}: must be at least 2")
    if count >= 1 << 32:
        raise ValueError(f"{count} documents: at most 2^32 - 1 are supported")


def codes_to_pairs(codes: np.ndarray) -> np.ndarray:
    """Pair codes ``i << 32 | j`` as an ``(m, 2)`` ``int64`` array of ``(i, j)``."""
    pairs = np.empty((codes.size, 2), dtype=np.int64)
    pairs[:, 0] = (codes >> np.uint64(32)).astype(np.int64)
    pairs[:, 1] = (codes & np.uint64(0xFFFFFFFF)).astype(np.int64)
    return pairs


def candidate_pairs(
    signatures: np.ndarray, bands: int, rows: int, *, bucket_limit: int = 64, chunk_rows: int = 65536
) -> np.ndarray:
    """Candidate pairs of a signature store, shape (m, 2), ``int64``, ``i < j``, sorted, distinct.

    ``signatures`` may be a ``np.memmap``; it is read one band and ``chunk_rows``
    rows at a time, so besides the store only about 24 bytes per document (one
    band's keys, the sort order and the non-empty index) live at once, plus
    the pairs found. The bands are independent: :func:`band_codes` of any
    subset of them, merged with ``np.unique``, give the same pairs (that is how
    :mod:`corpusprep.barriers` spreads them over workers).
    """
    check_banding(signatures.shape, bands, rows, bucket_limit)
    nonempty = nonempty_rows(signatures, chunk_rows=chunk_rows)
    found = np.empty(0, dtype=np.uint64)
    for band in range(bands):
        codes = band_codes(signatures, band, rows, nonempty, bucket_limit=bucket_limit, chunk_rows=chunk_rows)
        found = np.union1d(found, codes)
    return codes_to_pairs(found)
