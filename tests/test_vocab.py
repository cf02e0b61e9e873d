"""Vocabulary order, limits, reserved tokens, unknown mapping and storage."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest

from seqpipe.errors import RecipeError, ShardCorruptError, TokenizerError
from seqpipe.vocab import VocabSpec, Vocabulary, build_vocabulary


def counts(pairs: dict[bytes, int]) -> pa.Table:
    return pa.table({"key": pa.array(list(pairs), pa.binary()), "count": pa.array(list(pairs.values()), pa.int64())})


def test_order_by_count_then_code_point() -> None:
    """Reserved tokens first in recipe order (padding is id 0 by default); then by count, ties by code point."""
    v = build_vocabulary(counts({"é".encode(): 3, b"b": 3, b"a": 3, b"z": 9, "日".encode(): 3}), VocabSpec())
    toks = [t.decode() for t in v.tokens.to_pylist()]
    # UTF-8 byte order equals code-point order (RFC 3629, section 1), so b"a" < b"b" < "é" < "日"
    assert toks == ["<pad>", "<unk>", "<bos>", "<eos>", "z", "a", "b", "é", "日"]
    assert v.roles == {"padding": 0, "unknown": 1, "begin": 2, "end": 3}
    assert v.counts.tolist() == [0, 0, 0, 0, 9, 3, 3, 3, 3]


def test_min_count_and_cap() -> None:
    """min_count drops rare tokens; cap caps the whole vocabulary, reserved tokens included."""
    c = counts({b"a": 5, b"b": 4, b"c": 1, b"d": 2})
    assert len(build_vocabulary(c, VocabSpec(min_count=2))) == 4 + 3
    v = build_vocabulary(c, VocabSpec(cap=6))
    assert [t for t in v.tokens.to_pylist()[4:]] == [b"a", b"b"]


def test_lookup_maps_misses_to_unknown() -> None:
    """Tokens outside the vocabulary get the unknown id; without one, a clear error."""
    v = build_vocabulary(counts({b"a": 2, b"b": 1}), VocabSpec())
    ids = v.lookup(pa.array([b"b", b"zz", b"a"], pa.binary()))
    assert ids.tolist() == [5, 1, 4]
    no_unk = build_vocabulary(
        counts({b"a": 2}), VocabSpec(reserved=("<pad>",), unknown="", padding="<pad>", begin="", end="")
    )
    with pytest.raises(TokenizerError, match="no unknown token"):
        no_unk.lookup(pa.array([b"q"], pa.binary()))


def test_reserved_name_in_text_is_an_ordinary_token() -> None:
    """Text that spells a reserved name is counted as ordinary text, not as the reserved token."""
    v = build_vocabulary(counts({b"<unk>": 4}), VocabSpec())
    assert v.tokens.to_pylist() == [b"<pad>", b"<unk>", b"<bos>", b"<eos>", b"<unk>"]
    assert v.lookup(pa.array([b"<unk>"], pa.binary())).tolist() == [4]


def test_save_load_roundtrip(tmp_path: Path) -> None:
    """A stored vocabulary loads back identical; a foreign Arrow file is refused."""
    v = build_vocabulary(counts({b"x": 2, "ü".encode(): 7}), VocabSpec())
    v.save(tmp_path / "vocab.arrow")
    w = Vocabulary.load(tmp_path / "vocab.arrow")
    assert w.tokens.to_pylist() == v.tokens.to_pylist()
    np.testing.assert_array_equal(w.counts, v.counts)
    assert w.roles == v.roles and w.n_reserved == v.n_reserved
    from seqpipe.shards import write_table

    write_table(tmp_path / "other.arrow", pa.table({"a": [1]}))
    with pytest.raises(ShardCorruptError, match="not a seqpipe vocabulary"):
        Vocabulary.load(tmp_path / "other.arrow")


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"reserved": ("<a>", "<a>")}, "distinct"),
        ({"unknown": "<nope>"}, "not listed in reserved"),
        ({"min_count": 0}, "min_count: expected a positive integer, got 0"),
        ({"cap": -3}, "cap"),
        ({"cap": 3}, "more than the 4 reserved tokens"),
    ],
)
def test_bad_specs_name_the_field(kwargs: dict[str, object], match: str) -> None:
    """Invalid [vocabulary] values raise RecipeError naming the field and value."""
    with pytest.raises(RecipeError, match=match):
        VocabSpec(**kwargs)  # type: ignore[arg-type]


def test_decode_refuses_out_of_range_ids() -> None:
    """Ids outside the vocabulary raise a TokenizerError naming the id."""
    v = build_vocabulary(counts({b"a": 1}), VocabSpec())
    with pytest.raises(TokenizerError, match="id 99"):
        v.tokens_for([99])
