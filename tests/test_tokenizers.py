"""Every tokenizer kind passes one contract suite; kind-specific checks follow it."""

from __future__ import annotations

import dataclasses
from typing import Any, ClassVar

import numpy as np
import pyarrow as pa
import pytest
import regex
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from seqpipe.errors import RecipeError, TokenizerError
from seqpipe.tokenizers import parse_tokenizer
from seqpipe.tokenizers.base import Encoder, Segments, Tokenizer, expand
from seqpipe.tokenizers.words import DEFAULT_PATTERN, WordTokenizer
from seqpipe.vocab import VocabSpec

# text without lone surrogates (they have no UTF-8 form, so they never come out of a source)
# the contract's property tests run once per subclass, which hypothesis would flag as differing executors
CONTRACT = settings(deadline=None, suppress_health_check=[HealthCheck.differing_executors])
TEXT = st.text(alphabet=st.characters(exclude_categories=("Cs",)), max_size=60)
DOCS = st.lists(TEXT, min_size=1, max_size=6)


def fit_on(tok: Tokenizer, docs: list[str], spec: VocabSpec | None = None, cap: int = 0) -> Encoder:
    seg = tok.segment(docs)
    counts = np.bincount(seg.codes, minlength=len(seg.keys)).astype(np.int64)
    table = pa.table({"key": seg.keys, "count": pa.array(counts, pa.int64())})
    return tok.fit(table, dataclasses.replace(spec or VocabSpec(), cap=cap))


class TokenizerContract:
    """Properties every tokenizer kind must have. Subclasses set ``table`` (and ``cap`` for kinds
    that grow the vocabulary up to ``[vocabulary] cap``)."""

    table: ClassVar[dict[str, Any]]
    cap: ClassVar[int] = 0
    lossless: ClassVar[bool] = True
    covers_everything: ClassVar[bool] = False  # every text encodes without the unknown id

    @property
    def tok(self) -> Tokenizer:
        return parse_tokenizer(dict(self.table))

    @settings(CONTRACT, max_examples=60)
    @given(docs=DOCS)
    def test_segments_are_consistent(self, docs: list[str]) -> None:
        """Keys are distinct, codes index them, and per-document counts add up."""
        seg = self.tok.segment(docs)
        assert isinstance(seg, Segments)
        keys = seg.keys.to_pylist()
        assert len(keys) == len(set(keys))
        assert len(seg.doc_lengths) == len(docs)
        if len(seg.codes):
            assert seg.codes.min() >= 0 and seg.codes.max() < len(keys)

    @settings(CONTRACT, max_examples=60)
    @given(docs=DOCS)
    def test_roundtrip_when_lossless(self, docs: list[str]) -> None:
        """decode(encode(x)) == x for lossless kinds; for lossy kinds decoding is a fixed point of
        encoding (encode(decode(ids)) == ids), on the text the vocabulary was fitted on."""
        enc = fit_on(self.tok, docs, cap=self.cap)
        for d in docs:
            ids = enc.encode(d)
            if self.lossless:
                assert enc.decode(ids) == d
            else:
                np.testing.assert_array_equal(enc.encode(enc.decode(ids)), ids)

    @settings(CONTRACT, max_examples=40)
    @given(docs=DOCS)
    def test_batch_equals_one_by_one(self, docs: list[str]) -> None:
        """Encoding a batch gives the same ids as encoding each document alone."""
        enc = fit_on(self.tok, docs, cap=self.cap)
        ids, lengths = enc.encode_batch(docs)
        pos = 0
        for d, n in zip(docs, lengths, strict=True):
            np.testing.assert_array_equal(ids[pos : pos + n], enc.encode(d))
            pos += n
        assert pos == len(ids)

    def test_save_load_gives_same_encoder(self, tmp_path: Any) -> None:
        """An encoder stored by a build loads back and encodes identically."""
        docs = ["The ferry left at dawn.", "Crates of salt, 12 of them; café au lait ☕."]
        enc = fit_on(self.tok, docs, cap=self.cap)
        enc.vocabulary.save(tmp_path / "vocab.arrow")
        enc.save(tmp_path)
        again = self.tok.load(tmp_path)
        for d in docs:
            np.testing.assert_array_equal(again.encode(d), enc.encode(d))

    def test_unknown_maps_to_unknown_id(self) -> None:
        """A token never seen in training maps to the unknown id; a kind whose vocabulary covers
        every input (bytes) never produces it."""
        enc = fit_on(self.tok, ["aaa bbb"], cap=self.cap)
        ids = enc.encode("zzz")
        unk = enc.vocabulary.unknown_id
        assert len(ids) > 0
        assert not (ids == unk).any() if self.covers_everything else (ids == unk).all()

    def test_reserved_take_first_ids(self) -> None:
        """Reserved tokens take ids 0..k-1 in recipe order and never appear in encoded text."""
        spec = VocabSpec(reserved=("<pad>", "<unk>", "<x>"), unknown="<unk>", padding="<pad>", begin="", end="")
        enc = fit_on(self.tok, ["<pad> <x> plain text"], spec, cap=self.cap)
        assert enc.vocabulary.tokens.to_pylist()[:3] == [b"<pad>", b"<unk>", b"<x>"]
        assert enc.vocabulary.roles == {"padding": 0, "unknown": 1}
        ids = enc.encode("<pad> <x> plain text")
        assert not np.isin(ids, [0, 2]).any()


class TestWordsContract(TokenizerContract):
    table: ClassVar[dict[str, Any]] = {"kind": "words"}
    lossless = False


class TestWordsCustomPatternContract(TokenizerContract):
    table: ClassVar[dict[str, Any]] = {"kind": "words", "pattern": r"\S+"}
    lossless = False


class TestCodepointContract(TokenizerContract):
    table: ClassVar[dict[str, Any]] = {"kind": "chars"}


class TestGraphemeContract(TokenizerContract):
    table: ClassVar[dict[str, Any]] = {"kind": "chars", "unit": "grapheme"}


class TestBytesContract(TokenizerContract):
    table: ClassVar[dict[str, Any]] = {"kind": "bytes"}
    covers_everything = True


# -- kind-specific checks ---------------------------------------------------------------------------


@settings(max_examples=300, deadline=None)
@given(docs=st.lists(st.text(alphabet=st.characters(exclude_categories=("Cs",)), max_size=40), min_size=1, max_size=5))
def test_word_fast_path_equals_regex(docs: list[str]) -> None:
    """The numpy segmentation of the default pattern gives exactly regex.findall's tokens."""
    fast = WordTokenizer().segment(docs)
    keys = fast.keys.to_pylist()
    flat = [keys[c].decode() for c in fast.codes]
    pat = regex.compile(DEFAULT_PATTERN)
    expected = [pat.findall(d) for d in docs]
    assert [len(e) for e in expected] == fast.doc_lengths.tolist()
    assert flat == [t for e in expected for t in e]


def test_default_words_split_numbers_and_punctuation() -> None:
    """Words, numbers and single punctuation marks come out as separate tokens (common practice)."""
    enc = fit_on(WordTokenizer(), ["Dock 7: 12.5 tonnes, café!"])
    toks = [enc.vocabulary.token(i).decode() for i in enc.encode("Dock 7: 12.5 tonnes, café!")]
    assert toks == ["Dock", "7", ":", "12", ".", "5", "tonnes", ",", "café", "!"]
    assert enc.decode(enc.encode("Dock   tonnes")) == "Dock tonnes"


@pytest.mark.parametrize(
    ("text", "clusters"),
    [
        # Source: Unicode UAX #29, Table 1a "Sample Grapheme Clusters" and section 3.1 rules
        ("g\u0308", ["g\u0308"]),  # g + combining diaeresis: one cluster
        ("\r\n", ["\r\n"]),  # CRLF is one cluster (GB3)
        ("\U0001f1fa\U0001f1f8", ["\U0001f1fa\U0001f1f8"]),  # a regional-indicator pair is one flag (GB12/13)
        ("\U0001f468\u200d\U0001f469\u200d\U0001f467", ["\U0001f468\u200d\U0001f469\u200d\U0001f467"]),  # ZWJ family
        ("ab", ["a", "b"]),
    ],
)
def test_grapheme_clusters_follow_uax29(text: str, clusters: list[str]) -> None:
    """Grapheme mode keeps each extended grapheme cluster whole."""
    seg = parse_tokenizer({"kind": "chars", "unit": "grapheme"}).segment([text])
    keys = seg.keys.to_pylist()
    assert [keys[c].decode() for c in seg.codes] == clusters


def test_codepoints_split_combining_marks() -> None:
    """Code-point mode counts g + U+0308 as two tokens (unlike grapheme mode)."""
    seg = parse_tokenizer({"kind": "chars"}).segment(["g\u0308"])
    assert seg.doc_lengths.tolist() == [2]


def test_lone_surrogate_is_refused() -> None:
    """Text with a lone surrogate has no UTF-8 form: a clear TokenizerError."""
    with pytest.raises(TokenizerError, match="surrogate"):
        parse_tokenizer({"kind": "chars"}).segment(["a\ud800b"])


def test_bytes_vocabulary_covers_all_bytes() -> None:
    """The byte tokenizer keeps all 256 byte values, so nothing is ever unknown."""
    enc = fit_on(parse_tokenizer({"kind": "bytes"}), ["abc"])
    assert len(enc.vocabulary) == 4 + 256
    ids = enc.encode("日本 ☕")
    assert enc.vocabulary.unknown_id not in ids
    assert enc.decode(ids) == "日本 ☕"


def test_bad_tokenizer_tables_name_the_key() -> None:
    """Unknown kinds, keys and bad patterns give a RecipeError naming the key path."""
    with pytest.raises(RecipeError, match=r"tokenizer.kind.*did you mean 'words'"):
        parse_tokenizer({"kind": "word"})
    with pytest.raises(RecipeError, match=r"tokenizer.sepparator.*did you mean 'separator'"):
        parse_tokenizer({"kind": "words", "sepparator": " "})
    with pytest.raises(RecipeError, match=r"tokenizer.pattern: not a valid regular expression"):
        parse_tokenizer({"kind": "words", "pattern": "(["})
    with pytest.raises(RecipeError, match=r"tokenizer.unit"):
        parse_tokenizer({"kind": "chars", "unit": "glyph"})


def test_expand_multi_id_pieces() -> None:
    """expand() turns codes into id runs and counts ids per document."""
    values = np.array([7, 8, 9, 5])
    offsets = np.array([0, 2, 3, 4])  # key0 -> [7, 8], key1 -> [9], key2 -> [5]
    ids, per_doc = expand(values, offsets, np.array([0, 2, 1, 0]), np.array([3, 1]))
    assert ids.tolist() == [7, 8, 5, 9, 7, 8]
    assert per_doc.tolist() == [4, 2]


@settings(max_examples=300, deadline=None)
@given(docs=st.lists(st.text(alphabet=st.characters(exclude_categories=("Cs",)), max_size=40), min_size=1, max_size=5))
def test_count_words_equals_str_split(docs: list[str]) -> None:
    """The numpy word count per document equals len(str.split()) (Python's Unicode whitespace)."""
    from seqpipe.tokenizers.words import count_words

    assert count_words(pa.array(docs, pa.large_string())).tolist() == [len(d.split()) for d in docs]
