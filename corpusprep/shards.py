"""Shard files: 2-D arrays of token windows in the NumPy ``.npy`` format, version 1.0.

A shard holds ``n`` windows of ``length + 1`` token ids as one C-order array
of shape ``(n, length + 1)`` with an explicit little-endian unsigned dtype
(``|u1``, ``<u2`` or ``<u4``; one-byte types have no byte order, which
``.npy`` writes as ``|``). Any NumPy can open it with
``np.load(path, mmap_mode="r", allow_pickle=False)``.

The header is written here from the format description (``numpy.lib.format``
module docs): magic ``\\x93NUMPY``, version 1.0, a little-endian ``uint16``
header length, then the header dict padded with spaces and ended by ``\\n`` so
that the data starts at a multiple of 64 bytes. It is written by this module
rather than by ``numpy.lib.format.write_array_header_1_0`` because recent
NumPy pads the header with extra room for growing shapes, and that room has
changed between NumPy versions; writing the minimal padding ourselves keeps
the file bytes, and so the manifest hashes, the same whatever NumPy is
installed.

Every file is written to ``.NAME.partial`` in the same folder and renamed
when complete, and its XXH3-128 is computed from the bytes as they are
written.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import numpy.lib.format as npy_format

from corpusprep.errors import DefinitionError, IntegrityError
from corpusprep.hashing import hash_file, new_hasher

__all__ = [
    "SHARD_DTYPES",
    "ShardInfo",
    "npy_header",
    "read_shard",
    "shard_dtype",
    "shard_name",
    "write_shard",
]

#: The dtypes a shard may have, as ``.npy`` descr strings.
SHARD_DTYPES = ("|u1", "<u2", "<u4")

_MAGIC = b"\x93NUMPY"
_ALIGN = 64
_PREAMBLE = len(_MAGIC) + 2 + 2  # magic, version (2 bytes), HEADER_LEN (uint16)
_ROWS_PER_WRITE = 1024
_SPLIT_NAME = re.compile(r"[a-z0-9][a-z0-9_]*")


@dataclass(frozen=True, slots=True, kw_only=True)
class ShardInfo:
    """One written shard, as the manifest records it."""

    file: str  # file name inside the shard folder
    split: str
    shape: tuple[int, int]  # (windows, length + 1)
    dtype: str  # .npy descr, e.g. "<u2"
    xxh3_128: str  # of the whole file, header included
    bytes: int  # file size

    def to_dict(self) -> dict[str, object]:
        """JSON-ready form (shape as a list)."""
        return {
            "file": self.file,
            "split": self.split,
            "shape": list(self.shape),
            "dtype": self.dtype,
            "xxh3_128": self.xxh3_128,
            "bytes": self.bytes,
        }


def shard_dtype(dtype: np.dtype | type | str) -> np.dtype:
    """The little-endian form of an unsigned dtype of 1, 2 or 4 bytes; anything else is refused.

    >>> shard_dtype(np.uint16).str, shard_dtype(">u4").str, shard_dtype("u1").str
    ('<u2', '<u4', '|u1')
    """
    resolved = np.dtype(dtype)
    if resolved.kind != "u" or resolved.itemsize not in (1, 2, 4):
        raise IntegrityError(f"shard dtype must be uint8, uint16 or uint32, got {resolved}")
    return resolved.newbyteorder("<")


def shard_name(split: str, index: int) -> str:
    """File name of the ``index``-th shard (0-based) of ``split``.

    >>> shard_name("train", 0), shard_name("validation", 12)
    ('train-00000.npy', 'validation-00012.npy')
    """
    if not _SPLIT_NAME.fullmatch(split):
        raise DefinitionError(f"split name {split!r}: use lowercase letters, digits and '_'")
    if index < 0:
        raise IntegrityError(f"shard index must not be negative, got {index}")
    return f"{split}-{index:05d}.npy"


def npy_header(dtype: np.dtype, shape: tuple[int, ...]) -> bytes:
    """The complete ``.npy`` version 1.0 preamble and header for a C-order array.

    >>> header = npy_header(np.dtype("<u2"), (3, 257))
    >>> len(header), header[:8], int.from_bytes(header[8:10], "little")
    (128, b'\\x93NUMPY\\x01\\x00', 118)
    >>> header[10:71], header[-1:]
    (b"{'descr': '<u2', 'fortran_order': False, 'shape': (3, 257), }", b'\\n')
    """
    text = f"{{'descr': {dtype.str!r}, 'fortran_order': False, 'shape': {tuple(shape)!r}, }}"
    padding = -(_PREAMBLE + len(text) + 1) % _ALIGN
    header = (text + " " * padding + "\n").encode("latin-1")
    if len(header) > 0xFFFF:
        raise IntegrityError(f"a .npy 1.0 header holds at most 65535 bytes, this one needs {len(header)}")
    return _MAGIC + bytes([1, 0]) + len(header).to_bytes(2, "little") + header


def write_shard(folder: Path, *, split: str, index: int, windows: np.ndarray) -> ShardInfo:
    """Write the 2-D array ``windows`` as shard ``index`` of ``split`` into ``folder``.

    ``windows`` may be any 2-D view (for example strided over a token
    stream); it is copied to the file in blocks of rows, so no second copy
    of the whole shard is made. Its dtype must already be a shard dtype.
    """
    dtype = shard_dtype(windows.dtype)
    if windows.dtype != dtype:
        raise IntegrityError(f"windows must have dtype {dtype.str}, got {windows.dtype.str}")
    if windows.ndim != 2 or windows.shape[0] == 0:
        raise IntegrityError(f"a shard needs a 2-D array with at least one row, got shape {windows.shape}")
    name = shard_name(split, index)
    shape = (int(windows.shape[0]), int(windows.shape[1]))
    path = folder / name
    partial = folder / f".{name}.partial"
    hasher = new_hasher()
    size = 0
    with open(partial, "wb") as handle:
        header = npy_header(dtype, shape)
        handle.write(header)
        hasher.update(header)
        size += len(header)
        for start in range(0, shape[0], _ROWS_PER_WRITE):
            block = np.ascontiguousarray(windows[start : start + _ROWS_PER_WRITE]).data.cast("B")
            handle.write(block)
            hasher.update(block)
            size += len(block)
    os.replace(partial, path)
    return ShardInfo(
        file=name, split=split, shape=shape, dtype=dtype.str, xxh3_128=hasher.hexdigest(), bytes=size
    )


def _read_header(path: Path) -> tuple[tuple[int, ...], np.dtype, int]:
    """Shape, dtype and data offset of a shard, after checking every rule of the module docstring."""
    with open(path, "rb") as handle:
        start = handle.read(len(_MAGIC) + 2)
        if start[: len(_MAGIC)] != _MAGIC:
            raise IntegrityError(f"{path}: not a .npy file (the magic string \\x93NUMPY is missing)")
        if tuple(start[len(_MAGIC) :]) != (1, 0):
            raise IntegrityError(f"{path}: .npy version {tuple(start[len(_MAGIC) :])}, expected (1, 0)")
        try:
            # NumPy's reader also refuses headers whose keys are not exactly descr, fortran_order, shape.
            shape, fortran_order, dtype = npy_format.read_array_header_1_0(handle)
        except ValueError as error:
            raise IntegrityError(f"{path}: unreadable .npy header: {error}") from None
        offset = handle.tell()
    if offset % _ALIGN:
        raise IntegrityError(f"{path}: data starts at byte {offset}, not a multiple of {_ALIGN}")
    if fortran_order:
        raise IntegrityError(f"{path}: array is in Fortran order, shards are C order")
    if dtype.str not in SHARD_DTYPES:
        raise IntegrityError(f"{path}: dtype {dtype.str}, expected one of {', '.join(SHARD_DTYPES)}")
    if len(shape) != 2:
        raise IntegrityError(f"{path}: shape {shape}, expected (windows, length + 1)")
    expected_size = offset + int(np.prod(shape)) * dtype.itemsize
    actual_size = path.stat().st_size
    if actual_size != expected_size:
        raise IntegrityError(
            f"{path}: file has {actual_size} bytes, its header promises {expected_size}; "
            "the file is truncated or has extra bytes"
        )
    return tuple(int(extent) for extent in shape), dtype, offset


def read_shard(path: Path, *, expected: ShardInfo | None = None, check_hash: bool = True) -> np.ndarray:
    """Open a shard read-only as a memory map, after checking its header and size.

    With ``expected`` (the manifest's record) the name, shape, dtype and size
    must match, and unless ``check_hash`` is false the whole file is hashed
    and compared. Raises :class:`IntegrityError` on any difference.
    """
    shape, dtype, _offset = _read_header(path)
    if expected is not None:
        found = {"file": path.name, "shape": shape, "dtype": dtype.str, "bytes": path.stat().st_size}
        wanted = {
            "file": expected.file,
            "shape": expected.shape,
            "dtype": expected.dtype,
            "bytes": expected.bytes,
        }
        for key, value in wanted.items():
            if found[key] != value:
                raise IntegrityError(f"{path}: {key} is {found[key]!r}, the manifest says {value!r}")
        if check_hash:
            _size, digest = hash_file(path)
            if digest != expected.xxh3_128:
                raise IntegrityError(f"{path}: xxh3_128 is {digest}, the manifest says {expected.xxh3_128}")
    array: np.ndarray = np.load(path, mmap_mode="r", allow_pickle=False)
    return array
