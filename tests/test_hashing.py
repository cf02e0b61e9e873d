"""Hashes: xxHash published vectors and the canonical-JSON fingerprint rules."""

from __future__ import annotations

import mmap

import numpy as np
import pytest
import xxhash

from seqpipe._hashing import canonical_json, hash_array, hash_bytes, hash_file, hash_json


def test_xxhash_published_vectors() -> None:
    """The xxhash binding reproduces the published sanity vectors we rely on."""
    # Source: xxHash repository, cli/xsum_sanity_check.c and doc/xxhash_spec.md (empty input, seed 0;
    # single byte 0x00).
    assert xxhash.xxh64_hexdigest(b"") == "ef46db3751d8e999"
    assert xxhash.xxh3_64_hexdigest(b"") == "2d06800538d394c2"
    assert xxhash.xxh3_128_hexdigest(b"") == "99aa06d3014798d86001c324468d497f"
    assert xxhash.xxh3_64_hexdigest(b"\x00") == "c44bdff4074eecdb"
    assert hash_bytes(b"") == "99aa06d3014798d86001c324468d497f"


def test_array_hash_is_little_endian_and_layout_free() -> None:
    """An id array hashes by its little-endian bytes whatever its byte order or strides."""
    a = np.arange(1000, dtype="<u2")
    assert hash_array(a) == hash_array(a.astype(">u2"))
    assert hash_array(a[::2]) == hash_array(np.ascontiguousarray(a[::2]))
    assert hash_array(a) == hash_bytes(a.tobytes())


def test_canonical_json_ignores_key_order() -> None:
    """Fingerprints come from sorted-key compact JSON, so dict order never matters."""
    assert canonical_json({"b": 1, "a": [1, 2]}) == '{"a":[1,2],"b":1}'
    assert hash_json({"b": 1, "a": 2}) == hash_json({"a": 2, "b": 1})


def test_file_hash_equals_bytes_hash(tmp_path) -> None:  # type: ignore[no-untyped-def]
    """Hashing a file from its memory map gives the hash of its whole content."""
    data = np.random.default_rng(0).integers(0, 256, 3 * (1 << 20) + 17, dtype=np.uint8).tobytes()
    p = tmp_path / "f.bin"
    p.write_bytes(data)
    assert hash_file(p) == hash_bytes(data)


@pytest.mark.parametrize("size", [0, 1, 1000, 4096, 3 * 4096 + 17])
def test_block_path_hashes_only_the_bytes_read(tmp_path, monkeypatch, size: int) -> None:  # type: ignore[no-untyped-def]
    """Where a file cannot be mapped, hashing it in blocks gives the whole-content hash (a short
    last block counts only the bytes read, not the rest of the buffer)."""

    def refuse(*args: object, **kwargs: object) -> None:
        raise OSError("mapping refused (test)")

    monkeypatch.setattr(mmap, "mmap", refuse)
    data = np.random.default_rng(size).integers(0, 256, size, dtype=np.uint8).tobytes()
    p = tmp_path / "f.bin"
    p.write_bytes(data)
    assert hash_file(p, block=4096) == hash_bytes(data)


@pytest.mark.parametrize("extra", [-1, 0, 1, 4097])
def test_file_hashed_through_bounded_maps(tmp_path, monkeypatch, extra: int) -> None:  # type: ignore[no-untyped-def]
    """A file longer than the block is hashed through several maps of at most one (granularity-
    rounded) block each, and the streamed digest equals xxhash's one-shot digest of all the bytes
    (the streaming and one-shot XXH3 forms give one result: the xxHash specification)."""
    window = mmap.ALLOCATIONGRANULARITY
    data = np.random.default_rng(extra + 2).integers(0, 256, 3 * window + extra, dtype=np.uint8).tobytes()
    p = tmp_path / "f.bin"
    p.write_bytes(data)
    lengths: list[int] = []
    real = mmap.mmap

    def recording(fileno: int, length: int, *args: object, **kwargs: object) -> mmap.mmap:
        lengths.append(length)
        return real(fileno, length, *args, **kwargs)  # type: ignore[arg-type]

    monkeypatch.setattr(mmap, "mmap", recording)
    assert hash_file(p, block=window) == xxhash.xxh3_128_hexdigest(data)
    assert lengths and max(lengths) <= window
    assert sum(lengths) == len(data)
