"""Shard files against the NumPy .npy format specification.

Source for every layout rule checked here: the ``numpy.lib.format`` module
documentation (format version 1.0; NEP 1), summarised in REFERENCES section 7.
NumPy's own reader (``numpy.lib.format`` and ``np.load``) is the reference
implementation that must accept the files.
"""

from __future__ import annotations

import ast
import dataclasses
import io
from pathlib import Path

import numpy as np
import numpy.lib.format as npy_format
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from corpusprep.errors import DefinitionError, IntegrityError
from corpusprep.hashing import hash_file
from corpusprep.shards import ShardInfo, npy_header, read_shard, shard_name, write_shard


def parse_npy(data: bytes) -> tuple[tuple[int, int], dict[str, object], int]:
    """Parse a .npy file by the letter of the spec, independently of corpusprep and of NumPy."""
    assert data[:6] == b"\x93NUMPY"  # spec: the magic string is exactly \x93NUMPY
    version = (data[6], data[7])  # spec: one byte major, one byte minor
    header_len = int.from_bytes(data[8:10], "little")  # spec 1.0: HEADER_LEN is a little-endian uint16
    header = data[10 : 10 + header_len].decode("latin-1")  # spec 1.0: ASCII (latin-1 decodes it)
    assert header.endswith("\n")  # spec: terminated by a newline, padded with spaces before it
    assert header.count("\n") == 1
    fields = ast.literal_eval(header)  # spec: a Python literal dict, safe to literal_eval
    return version, fields, 10 + header_len


@settings(max_examples=60, deadline=None)
@given(
    rows=st.integers(min_value=1, max_value=40),
    width=st.integers(min_value=2, max_value=300),
    descr=st.sampled_from(["|u1", "<u2", "<u4"]),
    index=st.integers(min_value=0, max_value=123456),
)
def test_files_follow_the_npy_spec(rows: int, width: int, descr: str, index: int) -> None:
    import tempfile

    dtype = np.dtype(descr)
    rng = np.random.default_rng(rows * 1000 + width)
    array = rng.integers(0, np.iinfo(dtype).max, size=(rows, width), endpoint=True).astype(dtype)
    with tempfile.TemporaryDirectory() as folder:
        info = write_shard(Path(folder), split="train", index=index, windows=array)
        path = Path(folder) / info.file
        data = path.read_bytes()
        version, fields, offset = parse_npy(data)
        assert version == (1, 0)
        assert set(fields) == {"descr", "fortran_order", "shape"}  # spec: exactly these keys
        assert fields["descr"] == descr  # explicit byte order ('|' for one-byte types, as NumPy writes it)
        assert fields["fortran_order"] is False
        assert fields["shape"] == (rows, width)
        assert offset % 64 == 0  # spec: magic + version + len + header divisible by 64 (ARRAY_ALIGN)
        assert len(data) == offset + rows * width * dtype.itemsize
        # Data bytes: C order, little-endian, exactly what NumPy writes after its own header.
        reference = io.BytesIO()
        np.save(reference, array, allow_pickle=False)
        reference_bytes = reference.getvalue()
        _, _, reference_offset = parse_npy(reference_bytes)
        assert data[offset:] == reference_bytes[reference_offset:]
        # NumPy's reader agrees with our reading of the header.
        with open(path, "rb") as handle:
            assert npy_format.read_magic(handle) == (1, 0)
            shape, fortran_order, read_dtype = npy_format.read_array_header_1_0(handle)
            assert (shape, fortran_order, read_dtype) == ((rows, width), False, dtype)
            assert handle.tell() == offset
        loaded = np.load(path, mmap_mode="r", allow_pickle=False)
        assert isinstance(loaded, np.memmap)
        assert loaded.offset == offset
        np.testing.assert_array_equal(loaded, array)
        del loaded
        # The info matches the file.
        assert info == ShardInfo(
            file=shard_name("train", index),
            split="train",
            shape=(rows, width),
            dtype=descr,
            xxh3_128=hash_file(path)[1],
            bytes=len(data),
        )
        assert list(Path(folder).iterdir()) == [path]  # no temporary file left behind


def test_header_padding_is_minimal_and_fixed() -> None:
    # Spec: padding only as far as the next multiple of 64; nothing depends on the NumPy version.
    for shape in [(1, 2), (3, 257), (10**9, 257), (2**40, 2**20 + 1)]:
        header = npy_header(np.dtype("<u2"), shape)
        assert len(header) % 64 == 0
        text = header[10:].decode("latin-1")
        assert len(text.rstrip(" \n")) + 1 + 10 > len(header) - 64
        assert ast.literal_eval(text)["shape"] == shape


def test_written_from_a_strided_view(tmp_path: Path) -> None:
    stream = np.arange(50, dtype="<u2")
    view = np.lib.stride_tricks.sliding_window_view(stream, 5)[::4]
    assert not view.flags.c_contiguous
    info = write_shard(tmp_path, split="test", index=0, windows=view)
    np.testing.assert_array_equal(
        np.load(tmp_path / info.file, allow_pickle=False), np.ascontiguousarray(view)
    )


def test_read_shard_checks_the_manifest_record(tmp_path: Path) -> None:
    array = np.arange(3 * 9, dtype="<u2").reshape(3, 9)
    info = write_shard(tmp_path, split="validation", index=2, windows=array)
    path = tmp_path / info.file
    np.testing.assert_array_equal(read_shard(path, expected=info), array)
    # One flipped data byte: same size and header, different hash.
    data = bytearray(path.read_bytes())
    data[-1] ^= 0xFF
    path.write_bytes(bytes(data))
    with pytest.raises(IntegrityError, match="xxh3_128"):
        read_shard(path, expected=info)
    read_shard(path, expected=info, check_hash=False)  # header and size still agree
    with pytest.raises(IntegrityError, match="shape"):
        read_shard(path, expected=dataclasses.replace(info, shape=(4, 9)))


def test_read_shard_refuses_broken_files(tmp_path: Path) -> None:
    array = np.arange(4 * 5, dtype="<u2").reshape(4, 5)
    info = write_shard(tmp_path, split="train", index=0, windows=array)
    path = tmp_path / info.file
    good = path.read_bytes()

    truncated = tmp_path / "truncated.npy"
    truncated.write_bytes(good[:-1])
    with pytest.raises(IntegrityError, match="truncated"):
        read_shard(truncated)

    not_npy = tmp_path / "not.npy"
    not_npy.write_bytes(b"PK\x03\x04" + good[4:])
    with pytest.raises(IntegrityError, match="magic"):
        read_shard(not_npy)

    cases = {
        "fortran.npy": (np.asfortranarray(array.T), "Fortran"),
        "float.npy": (array.astype("<f4"), "dtype"),
        "signed.npy": (array.astype("<i4"), "dtype"),
        "big.npy": (array.astype(">u2"), "dtype"),
        "flat.npy": (array.ravel(), "shape"),
    }
    for name, (other, message) in cases.items():
        np.save(tmp_path / name, other, allow_pickle=False)
        with pytest.raises(IntegrityError, match=message):
            read_shard(tmp_path / name)

    objects = tmp_path / "objects.npy"
    np.save(objects, np.array([[1, "a"]], dtype=object), allow_pickle=True)
    with pytest.raises(IntegrityError, match="dtype"):
        read_shard(objects)

    version_2 = tmp_path / "v2.npy"
    with open(version_2, "wb") as handle:
        npy_format.write_array(handle, array, version=(2, 0))
    with pytest.raises(IntegrityError, match="version"):
        read_shard(version_2)


def test_names_and_refusals(tmp_path: Path) -> None:
    assert shard_name("train", 7) == "train-00007.npy"
    assert shard_name("train", 123456) == "train-123456.npy"
    with pytest.raises(DefinitionError):
        shard_name("../train", 0)
    with pytest.raises(IntegrityError):
        write_shard(tmp_path, split="train", index=0, windows=np.zeros((0, 5), dtype="<u2"))
    with pytest.raises(IntegrityError):
        write_shard(tmp_path, split="train", index=0, windows=np.zeros((2, 5), dtype="<i2"))
    assert list(tmp_path.iterdir()) == []
