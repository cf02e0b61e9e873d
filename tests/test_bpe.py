"""Byte-pair encoding tokenizer: training rule, encoding, exact decoding, storage."""

from __future__ import annotations

import dataclasses
import functools
import itertools
import os
import subprocess
import sys
from pathlib import Path
from typing import Any, ClassVar

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st
from test_tokenizers import TokenizerContract  # the shared suite (tests/ is on sys.path under pytest)

from seqpipe import _patterns
from seqpipe._parse import section, to_plain
from seqpipe.errors import PatternTimeoutError, RecipeError, ShardCorruptError, TokenizerError
from seqpipe.shards import write_table
from seqpipe.tokenizers import _bpe_train, parse_tokenizer
from seqpipe.tokenizers import bpe as bpe_module
from seqpipe.tokenizers._chunking import _WORD, PRESETS, _trailing, chunker, needs_time_limit
from seqpipe.tokenizers.bpe import FAST_CHUNKINGS, BpeEncoder, BpeTokenizer
from seqpipe.vocab import VocabSpec

SPEC = VocabSpec()
N_RESERVED = len(SPEC.reserved)


def capped(cap: int, spec: VocabSpec = SPEC) -> VocabSpec:
    """``spec`` with ``[vocabulary] cap``, the size byte-pair training grows the vocabulary to."""
    return dataclasses.replace(spec, cap=cap)


# Invented scenario for training text: the harbour log of a ferry on the (made-up) Tessel Reach.
LOG = (
    "The ferry Marrow left Quill Point at dawn with 14 crates of saltfern and 3 passengers.\n"
    "Wind from the north-east, 12 knots; the harbourmaster's lamp was still lit.\n"
    "At Tessel Reach the pilot, Odra Venn, took the wheel — she'd sailed it 40 years.\n"
    "Cargo: saltfern, saltfern, lamp oil (2 casks), one crate of café beans, "
    "and a parcel marked 'naïve glassware' 😀.\n"
    "The Marrow returned at dusk; the lamp at Quill Point was lit again.\n"
) * 3


def counts_table(items: list[tuple[bytes, int]]) -> pa.Table:
    """A distinct-chunk count table in the given (corpus) order, as the build supplies it."""
    return pa.table(
        {"key": pa.array([k for k, _ in items], pa.binary()), "count": pa.array([c for _, c in items], pa.int64())}
    )


def counts_from_texts(tok: BpeTokenizer, texts: list[str]) -> pa.Table:
    """Chunk counts of texts in first-occurrence order (what the build computes)."""
    seg = tok.segment(texts)
    freq = np.bincount(seg.codes, minlength=len(seg.keys))
    return pa.table({"key": seg.keys.cast(pa.binary()), "count": pa.array(freq, pa.int64())})


def merge_strings(enc: BpeEncoder) -> list[str]:
    """The merges as 'left right' strings of token text."""
    v = enc.vocabulary
    return [f"{v.token(a).decode()} {v.token(b).decode()}" for a, b, _ in enc.merges]


def tokens_of(enc: BpeEncoder, text: str) -> list[bytes]:
    """Token bytes of the encoding of ``text``."""
    return [enc.vocabulary.token(int(i)) for i in enc.encode(text)]


# -- a deliberately naive reference trainer ------------------------------------------------------
def naive_merges(
    words: list[list[bytes]], freqs: list[int], start_size: int, limit: int, min_count: int
) -> tuple[list[tuple[bytes, bytes]], list[list[bytes]]]:
    """Sennrich et al. (2016) Algorithm 1: recount every pair after every merge.

    Symbols are byte strings, as in the paper (so it would also catch a merge that spells an
    existing token a second way, which the id-based trainer would keep as a distinct token).
    Ties: the pair seen first when scanning chunks in order, positions left to right (a dict
    keeps first-insertion order and ``max`` returns the first maximal key).
    """
    symbols = [list(w) for w in words]
    known = {s for w in symbols for s in w}
    size = start_size
    merges: list[tuple[bytes, bytes]] = []
    while size < limit:
        counts: dict[tuple[bytes, bytes], int] = {}
        for sym, f in zip(symbols, freqs, strict=True):
            for pair in itertools.pairwise(sym):
                counts[pair] = counts.get(pair, 0) + f
        if not counts:
            break
        best = max(counts, key=counts.__getitem__)
        if counts[best] < min_count:
            break
        merged = best[0] + best[1]
        merges.append(best)
        if merged not in known:
            known.add(merged)
            size += 1
        new_symbols = []
        for sym in symbols:
            out, i = [], 0
            while i < len(sym):
                if i + 1 < len(sym) and (sym[i], sym[i + 1]) == best:
                    out.append(merged)
                    i += 2
                else:
                    out.append(sym[i])
                    i += 1
            new_symbols.append(out)
        symbols = new_symbols
    return merges, symbols


# -- the contract every tokenizer kind passes (tests/test_tokenizers.py) ---------------------------
class TestBpeBytesContract(TokenizerContract):
    table: ClassVar[dict[str, Any]] = {"kind": "bpe"}
    cap = 320
    covers_everything = True  # the 256 byte values are the base alphabet


class TestBpeCharsContract(TokenizerContract):
    table: ClassVar[dict[str, Any]] = {"kind": "bpe", "base": "chars"}
    cap = 2000


# -- outside checks: the paper's worked examples ---------------------------------------------------
def test_paper_toy_dictionary_merges() -> None:
    """The 10 merges on the toy dictionary follow count order with earliest-first-occurrence ties."""
    # Sennrich, Haddow & Birch (2016), section 3.2, Algorithm 1: vocab {'l o w </w>': 5,
    # 'l o w e r </w>': 2, 'n e w e s t </w>': 6, 'w i d e s t </w>': 3}, num_merges = 10.
    # The paper breaks ties by dict order; under our rule (earliest first occurrence) the list
    # below was derived by hand: counts 9,9,9 (e s / es t / est </w>, all first seen in
    # 'newest'), then 7,7 (l o / lo w), then 6,6,6 (n e / ne w / new est</w>), 5, then 3 (w i).
    tok = BpeTokenizer(base="chars", end_of_word="</w>")
    enc = tok.fit(
        counts_table([(b"low", 5), (b"lower", 2), (b"newest", 6), (b"widest", 3)]), capped(N_RESERVED + 11 + 10)
    )
    assert merge_strings(enc) == [
        "e s",
        "es t",
        "est </w>",
        "l o",
        "lo w",
        "n e",
        "ne w",
        "new est</w>",
        "low </w>",
        "w i",
    ]
    assert len(enc.vocabulary) == N_RESERVED + 11 + 10


def test_paper_figure1_unseen_word() -> None:
    """Merges learned from {low, lowest, newer, wider} segment the unseen 'lower' as low + er</w>."""
    # Sennrich, Haddow & Birch (2016), Figure 1: from the dictionary {low, lowest, newer, wider}
    # the merges r+</w>, l+o, lo+w, e+r</w> are learned and 'lower' becomes 'low er</w>'.
    # Setting: each word counted once, min_pair_count 2 (the paper's four merges are exactly the
    # pairs occurring twice); our tie rule orders them l o, lo w, e r, er </w>, same segmentation.
    tok = BpeTokenizer(base="chars", end_of_word="</w>", min_pair_count=2)
    enc = tok.fit(counts_table([(b"low", 1), (b"lowest", 1), (b"newer", 1), (b"wider", 1)]), capped(1000))
    assert merge_strings(enc) == ["l o", "lo w", "e r", "er </w>"]
    assert tokens_of(enc, "lower") == [b"low", b"er</w>"]
    assert enc.decode(enc.encode("lower")) == "lower"


# -- invariants against the naive reference ----------------------------------------------------------
corpora = st.lists(
    st.tuples(st.text(alphabet="abcdé ", min_size=1, max_size=9), st.integers(1, 6)),
    min_size=1,
    max_size=14,
    unique_by=lambda t: t[0],
)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    corpus=corpora,
    base=st.sampled_from(["bytes", "chars", "chars+marker"]),
    extra=st.integers(0, 40),
    min_count=st.integers(1, 3),
    few=st.sampled_from([0, 10**9]),
)
# Found by a random search: a tie between two pairs of one chunk after symbols before them merged
# (ranking such ties by symbol index instead of byte offset picked the wrong pair).
@example(corpus=[("cccbcc", 3), ("bcbcc", 3)], base="bytes", extra=12, min_count=1, few=0)
@example(corpus=[("ddbdcdb", 3), ("dcdbc", 3)], base="chars", extra=12, min_count=1, few=0)
@example(corpus=[("cccbcc", 3), ("bcbcc", 3)], base="bytes", extra=12, min_count=1, few=10**9)
@example(corpus=[("ddbdcdb", 3), ("dcdbc", 3)], base="chars", extra=12, min_count=1, few=10**9)
def test_trainer_matches_naive_reference(
    corpus: list[tuple[str, int]], base: str, extra: int, min_count: int, few: int
) -> None:
    """Incremental training gives the naive trainer's merges, and encoding a training chunk
    gives the naive trainer's final segmentation of it (merges done with numpy and in plain Python)."""
    check_against_naive(corpus, base, extra, min_count, few)


# letters, vowel signs and marks of many scripts (a few each, so pairs repeat and ties occur)
MANY_SCRIPTS = (
    "ab\u00e9\u0301 \u0430\u0431 \u03b1\u03b2 \u0627\u0628 \u0915\u093f\u094d \u4e2d\u6587"
    " \ud55c\uae00 \u0e01\u0e48 \u1200 \u05e9 \u10d0 \u0561 7\u0967"
)
many_script_corpora = st.lists(
    st.tuples(st.text(alphabet=MANY_SCRIPTS, min_size=1, max_size=16), st.integers(1, 9)),
    min_size=1,
    max_size=24,
    unique_by=lambda t: t[0],
)


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    corpus=many_script_corpora,
    base=st.sampled_from(["bytes", "chars", "chars+marker"]),
    extra=st.integers(0, 60),
    min_count=st.integers(1, 3),
    few=st.sampled_from([0, 3, 10**9]),  # 3: small and large merges mixed in one training
)
def test_trainer_matches_naive_reference_on_many_scripts(
    corpus: list[tuple[str, int]], base: str, extra: int, min_count: int, few: int
) -> None:
    """On chunks mixing many scripts (multi-byte characters, combining marks, runs of one symbol),
    the fast trainer's merges and final segmentations equal the naive trainer's, either way of merging
    and both mixed."""
    check_against_naive(corpus, base, extra, min_count, few)


def check_against_naive(corpus: list[tuple[str, int]], base: str, extra: int, min_count: int, few: int) -> None:
    """Train the fast trainer (merging in plain Python up to ``few`` slots, else with numpy) and the
    naive one on ``corpus``; assert equal merges and final segmentations."""
    saved = _bpe_train.FEW
    setattr(_bpe_train, "FEW", few)  # noqa: B010 (a Final constant, changed only for this check)
    try:
        _check_against_naive(corpus, base, extra, min_count)
    finally:
        setattr(_bpe_train, "FEW", saved)  # noqa: B010


def _check_against_naive(corpus: list[tuple[str, int]], base: str, extra: int, min_count: int) -> None:
    marker = "</w>" if base == "chars+marker" else ""
    keys = [w.encode() for w, _ in corpus]
    freqs = [c for _, c in corpus]
    if base == "bytes":
        alphabet_size = 256
        words = [[bytes([b]) for b in k] for k in keys]
    else:
        alphabet_size = len({ch for w, _ in corpus for ch in w}) + bool(marker)
        words = [[ch.encode() for ch in w] + ([marker.encode()] if marker else []) for w, _ in corpus]
    start = N_RESERVED + alphabet_size
    tok = BpeTokenizer(base="chars" if marker else base, end_of_word=marker, min_pair_count=min_count)
    enc = tok.fit(counts_table(list(zip(keys, freqs, strict=True))), capped(start + extra))
    want, final = naive_merges(words, freqs, start, start + extra, min_count)
    v = enc.vocabulary
    assert [(v.token(a), v.token(b)) for a, b, _ in enc.merges] == want
    key_array = pa.array(keys, pa.binary())
    from_training = enc.piece_ids(key_array)  # the training chunks' ids, as training left them
    enc.forget()
    values, offsets = enc.piece_ids(key_array)  # merges applied afresh
    assert np.array_equal(values, from_training[0])
    for j, symbols in enumerate(final):
        assert [v.token(int(i)) for i in values[offsets[j] : offsets[j + 1]]] == symbols


# -- segmenting ----------------------------------------------------------------------------------
def doc_chunks(tok: BpeTokenizer, texts: list[str]) -> list[list[bytes]]:
    """Each document's chunks, rebuilt from the dictionary-form segments."""
    seg = tok.segment(texts)
    keys = seg.keys.to_pylist()
    out, pos = [], 0
    for n in seg.doc_lengths.tolist():
        out.append([keys[c] for c in seg.codes[pos : pos + n].tolist()])
        pos += n
    return out


CHUNKINGS: list[dict[str, str]] = [
    *({"chunking": name} for name in PRESETS),
    {"chunking": "custom", "chunk_regex": r"\p{L}*"},  # can match empty text
    {"chunking": "custom", "chunk_regex": r"[aeiou]+|\d"},  # skips most characters
]


@settings(max_examples=150, deadline=None)
@given(texts=st.lists(st.text(), max_size=5), chunking=st.sampled_from(CHUNKINGS))
def test_chunks_cover_each_document(texts: list[str], chunking: dict[str, str]) -> None:
    """A document's chunks are non-empty and concatenate to the document, whatever the chunking."""
    tok = BpeTokenizer(**chunking)  # type: ignore[arg-type]
    for text, chunks in zip(texts, doc_chunks(tok, texts), strict=True):
        assert all(chunks)
        assert b"".join(chunks) == text.encode("utf-8")


# Hand-made texts and the chunks each preset's rule (seqpipe/tokenizers/_chunking.py) gives them.
_LAMP = "Odra's lamp,  lit at 12:40!\n"
_FARE = "Fare 12345 tokens... (2 casks)\r\n\n  indented"
_MARKS = "cafe\u0301 she\u2019d 1000000 lads' \u2028x"
_SIGNS = 'A1-B22 40% $5 "quoted," -- e.g.'
PRESET_CHUNKS: dict[str, list[tuple[str, list[str]]]] = {
    "trailing-space": [
        (_LAMP, ["Odra's ", "lamp,  ", "lit ", "at ", "12:", "40!", "\n"]),
        (_FARE, ["Fare ", "12", "345 ", "tokens... ", "(", "2 ", "casks)", "\r\n\n", "  ", "indented"]),
        (_MARKS, ["cafe\u0301 ", "she\u2019d ", "1", "000", "000 ", "lads' ", "\u2028", "x"]),
        (_SIGNS, ["A", "1", "-", "B", "22 ", "40% ", "$", "5 ", '"', 'quoted," ', "-- ", "e.", "g."]),
    ],
    "trailing-space-digitwise": [
        (_LAMP, ["Odra's ", "lamp,  ", "lit ", "at ", "1", "2:", "4", "0!", "\n"]),
        (_FARE, ["Fare ", *"1234", "5 ", "tokens... ", "(", "2 ", "casks)", "\r\n\n", "  ", "indented"]),
        (_MARKS, ["cafe\u0301 ", "she\u2019d ", *"100000", "0 ", "lads' ", "\u2028", "x"]),
        (_SIGNS, ["A", "1", "-", "B", "2", "2 ", "4", "0% ", "$", "5 ", '"', 'quoted," ', "-- ", "e.", "g."]),
    ],
    "space-separated": [
        (_LAMP, ["Odra's ", "lamp,  ", "lit ", "at ", "12:40!", "\n"]),
        (_FARE, ["Fare ", "12345 ", "tokens... ", "(2 ", "casks)", "\r\n\n", "  ", "indented"]),
        (_MARKS, ["cafe\u0301 ", "she\u2019d ", "1000000 ", "lads' ", "\u2028", "x"]),
        (_SIGNS, ["A1-B22 ", "40% ", "$5 ", '"quoted," ', "-- ", "e.g."]),
    ],
}


@pytest.mark.parametrize("name", sorted(PRESETS))
def test_preset_chunks(name: str) -> None:
    """Each chunking preset cuts hand-made texts into the chunks its rule describes."""
    tok = BpeTokenizer(chunking=name)
    texts, expected = zip(*PRESET_CHUNKS[name], strict=True)
    assert doc_chunks(tok, list(texts)) == [[c.encode() for c in chunks] for chunks in expected]
    assert doc_chunks(tok, ["", "x"]) == [[], [b"x"]]


@settings(max_examples=100, deadline=None)
@given(number=st.integers(0, 10**40))
def test_digits_grouped_in_threes_from_the_right(number: int) -> None:
    """The default preset cuts a digit run into threes from the right, the first group 1-3 digits."""
    digits = str(number)
    (chunks,) = doc_chunks(BpeTokenizer(), [digits])
    first = len(digits) % 3 or 3
    assert [len(c) for c in chunks] == [first] + [3] * ((len(digits) - first) // 3)
    assert b"".join(chunks) == digits.encode()


@settings(max_examples=300)
@given(text=st.text(alphabet="0123456789\u00b2\u00bd\u216b\u0663a .,'\n\u0301-("))
def test_digit_rule_equals_the_lookahead_at_every_group(text: str) -> None:
    """The default preset's digit rule (threes inside a run) cuts like the lookahead applied at every group."""
    every_group = chunker(_trailing(_WORD, r"\p{N}{1,3}(?=(?:\p{N}{3})*(?!\p{N}))"))
    assert chunker(PRESETS["trailing-space"]).findall(text) == every_group.findall(text)


def test_presets_skip_the_time_limit_unless_a_digit_run_is_long(monkeypatch: pytest.MonkeyPatch) -> None:
    """Presets chunk prose without the pattern time limit; custom patterns and long digit runs keep it."""
    monkeypatch.setattr(_patterns, "SECONDS_PER_DOCUMENT", 1e-9)  # any limit at all runs out at once
    prose = "harbour calm, 1200 tonnes. " * 2000
    assert not needs_time_limit("trailing-space", prose)
    assert b"".join(doc_chunks(BpeTokenizer(), [prose])[0]) == prose.encode()
    assert needs_time_limit("trailing-space", prose + "7" * 1000) and not needs_time_limit("x", "7" * 999)
    with pytest.raises(PatternTimeoutError, match="document 0"):  # literal names: the per-document regex path
        BpeTokenizer(literal_reserved=True).segment([prose + "7" * 1000])
    # the batch path (_fast_chunking) needs no limit: it reads each character a bounded number of times
    long_run = prose + "7" * 1000
    assert b"".join(doc_chunks(BpeTokenizer(), [long_run])[0]) == long_run.encode()
    with pytest.raises(PatternTimeoutError, match="document 1"):
        BpeTokenizer(chunking="custom", chunk_regex=r"\w+|\W").segment(["", prose])


# letters, marks, apostrophes, digits of several kinds, tail and other punctuation, symbols,
# spaces and line breaks of every sort: the classes the trailing-space rule tells apart
_RULE_ALPHABET = (
    "ab\u00e9\u0301\u0308'\u2019\u0430\u0915\u093f\u4e2d"
    "0123\u0663\u00b2\u00bd\u216b"
    '.,;:!?")]\u00bb\u201d%([\u00ab$-_+\u2014\u00a9'
    " \t\u00a0\u3000\n\r\x0b\x0c\x85\u2028\u2029"
)


@settings(max_examples=400, deadline=None)
@given(
    texts=st.lists(st.text(alphabet=_RULE_ALPHABET, max_size=30) | st.text(max_size=12), max_size=6),
    chunking=st.sampled_from(list(FAST_CHUNKINGS)),
    skip=st.integers(0, 2),
)
def test_batch_chunking_equals_the_preset_regex(texts: list[str], chunking: str, skip: int) -> None:
    """Chunking a whole batch with array operations gives, per document, exactly the chunks the
    preset's regular expression finds in it (batches that start inside an Arrow buffer included)."""
    array = pa.array(["skipped"] * skip + texts, pa.large_string()).slice(skip)
    got = BpeTokenizer(chunking=chunking).segment(array)
    keys = got.keys.to_pylist()
    cut = chunker(PRESETS[chunking])
    want = [[c.encode() for c in cut.findall(t)] for t in texts]
    starts = np.concatenate([[0], np.cumsum(got.doc_lengths)])
    assert [[keys[c] for c in got.codes[a:b].tolist()] for a, b in itertools.pairwise(starts.tolist())] == want


def test_default_chunking_is_a_named_preset() -> None:
    """The default tokenizer names its chunking preset; its plain (manifest) form holds no regex."""
    tok = BpeTokenizer()
    plain = to_plain(tok)
    assert plain["chunking"] == "trailing-space" == tok.chunking
    assert plain["chunk_regex"] == ""
    assert tok.pattern == PRESETS["trailing-space"]


@pytest.mark.parametrize("name", sorted(PRESETS))
def test_literal_reserved_cut_out_before_any_preset(name: str) -> None:
    """With literal_reserved a reserved name is one chunk whatever the preset cuts around it."""
    tok = BpeTokenizer(chunking=name, literal_reserved=True)
    (chunks,) = doc_chunks(tok, ["lamp<eos> lit<bos>12 "])
    assert b"<eos>" in chunks and b"<bos>" in chunks
    assert b"".join(chunks) == b"lamp<eos> lit<bos>12 "


def test_lone_surrogate_raises() -> None:
    """Text with a lone surrogate has no UTF-8 form: TokenizerError naming the place."""
    with pytest.raises(TokenizerError, match=r"document 1, character 2: '\\ud800' is a lone surrogate"):
        BpeTokenizer().segment(["fine", "ab\ud800c"])
    enc = bytes_encoder()
    with pytest.raises(TokenizerError, match="surrogate"):
        enc.encode("\udfff")


# -- encoding and decoding -------------------------------------------------------------------------
_ENCODERS: dict[str, BpeEncoder] = {}


def bytes_encoder(chunking: str = "trailing-space") -> BpeEncoder:
    """A byte-base encoder with the given chunking preset, trained once on the harbour log."""
    if chunking not in _ENCODERS:
        tok = BpeTokenizer(chunking=chunking)
        _ENCODERS[chunking] = tok.fit(counts_from_texts(tok, [LOG]), capped(N_RESERVED + 256 + 120))
    return _ENCODERS[chunking]


def test_training_reaches_the_cap() -> None:
    """Training stops at the cap; the layout is reserved tokens, 256 bytes, then merges in order."""
    enc = bytes_encoder()
    v = enc.vocabulary
    assert len(v) == N_RESERVED + 256 + 120
    assert [v.token(i) for i in range(N_RESERVED)] == [s.encode() for s in SPEC.reserved]
    assert [v.token(N_RESERVED + b) for b in range(256)] == [bytes([b]) for b in range(256)]
    # every merge joins earlier ids, and new ids appear in merge order
    assert all(N_RESERVED <= a < z and N_RESERVED <= b < z for a, b, z in enc.merges)
    fresh = [z for _, _, z in enc.merges if z >= N_RESERVED + 256]
    assert fresh == list(range(N_RESERVED + 256, len(v)))
    assert len(set(v.tokens.to_pylist())) == len(v)  # no token spelled twice
    # the byte counts are the symbol counts of the text (common practice: the unigram counts)
    assert int(v.counts[N_RESERVED + ord("a")]) == LOG.encode().count(b"a")


@settings(max_examples=200, deadline=None)
@given(
    text=st.text(alphabet=st.characters(exclude_categories=["Cs"]))
    | st.sampled_from(["\x00", "a\x00b", "😀👍🏽", "e\u0301\u0302", "\u200d\ufeff", "  \n\t ", "Quill\u00a0Point"])
)
def test_bytes_round_trip(text: str) -> None:
    """Byte base: decode(encode(s)) == s for any Unicode text (NUL, emoji, combining marks)."""
    enc = bytes_encoder()
    ids = enc.encode(text)
    assert ids.dtype == np.int64
    assert (ids >= N_RESERVED).all()
    assert enc.decode(ids) == text


@settings(max_examples=100, deadline=None)
@given(text=st.text(alphabet=st.characters(exclude_categories=["Cs"])), chunking=st.sampled_from(sorted(PRESETS)))
@example(text="Fare 12345\r\n\n  ca\u0301fe\u0301 she\u2019d\u2028", chunking="trailing-space")
def test_bytes_round_trip_every_preset(text: str, chunking: str) -> None:
    """Byte base with any chunking preset: decode(encode(s)) == s."""
    enc = bytes_encoder(chunking)
    assert enc.decode(enc.encode(text)) == text


def test_encode_batch_matches_single() -> None:
    """Encoding documents together gives each document's own encoding, in order."""
    enc = bytes_encoder()
    docs = ["The ferry Marrow", "", "lamp oil 😀", "The ferry Marrow"]
    ids, lengths = enc.encode_batch(docs)
    assert lengths.tolist() == [len(enc.encode(d)) for d in docs]
    assert np.array_equal(ids, np.concatenate([enc.encode(d) for d in docs]))


def test_frequent_words_become_single_tokens() -> None:
    """A chunk repeated throughout the training text encodes as one token."""
    enc = bytes_encoder()
    assert tokens_of(enc, "saltfern ") == [b"saltfern "]
    assert tokens_of(enc, "saltfern saltfern")[0] == b"saltfern "


def test_cache_is_bounded(monkeypatch: pytest.MonkeyPatch) -> None:
    """The chunk cache never outgrows its limit and a reset does not change encodings."""
    tok = BpeTokenizer()
    enc = tok.fit(counts_from_texts(tok, [LOG]), capped(N_RESERVED + 256 + 60))
    want = enc.encode(LOG)
    monkeypatch.setattr(bpe_module, "CACHE_LIMIT", 5)
    enc.forget()
    assert np.array_equal(enc.encode(LOG), want)
    assert len(enc._cache) <= 5


def test_decode_policy() -> None:
    """Specials print only on request; ids outside the vocabulary raise TokenizerError."""
    enc = bytes_encoder()
    ids = [SPEC.reserved.index("<bos>"), *enc.encode("lamp").tolist(), SPEC.reserved.index("<eos>")]
    assert enc.decode(ids) == "lamp"
    assert enc.decode(ids, show_reserved=True) == "<bos>lamp<eos>"
    assert enc.decode(np.zeros(0, np.int64)) == ""
    with pytest.raises(TokenizerError, match="outside the vocabulary"):
        enc.decode([len(enc.vocabulary)])
    with pytest.raises(TokenizerError, match="outside the vocabulary"):
        enc.decode([-1])
    # a lone continuation byte is not UTF-8: replaced, not raised (common practice: U+FFFD)
    assert enc.decode([N_RESERVED + 0x80]) == "\ufffd"


# -- chars base ----------------------------------------------------------------------------------
@pytest.mark.parametrize("marker", ["", "</w>"])
def test_chars_round_trip_and_unknown(marker: str) -> None:
    """Chars base: seen text round-trips (the marker prints as nothing); unseen characters map
    to the unknown id and are dropped by decode."""
    tok = BpeTokenizer(base="chars", end_of_word=marker)
    enc = tok.fit(counts_from_texts(tok, [LOG]), capped(400))
    v = enc.vocabulary
    alphabet = [v.token(i) for i in range(N_RESERVED, N_RESERVED + enc.alphabet_size)]
    chars = sorted(set(LOG))
    assert alphabet == [c.encode() for c in chars] + ([marker.encode()] if marker else [])
    sample = "Odra Venn left the lamp at Quill Point; café 😀.\n"
    assert enc.decode(enc.encode(sample)) == sample
    ids = enc.encode("lamp Ω")
    assert int(ids[-2 if marker else -1]) == SPEC.reserved.index("<unk>")
    assert enc.decode(ids) == "lamp "
    if marker:  # the marker closes every chunk
        assert tokens_of(enc, " lamp")[-1].endswith(b"</w>")


def test_chars_unknown_needs_unknown_role() -> None:
    """Without an unknown token, an unseen character is a TokenizerError."""
    spec = VocabSpec(reserved=("<pad>",), unknown="", begin="", end="")
    tok = BpeTokenizer(base="chars")
    enc = tok.fit(counts_from_texts(tok, ["abc abc"]), capped(200, spec))
    with pytest.raises(TokenizerError, match="not seen in training"):
        enc.encode("abz")


def test_chars_marker_seen_in_text_rejected() -> None:
    """A one-character marker that also occurs in the text is refused (it would be ambiguous)."""
    tok = BpeTokenizer(base="chars", end_of_word="_")
    with pytest.raises(TokenizerError, match="end_of_word '_'"):
        tok.fit(counts_from_texts(tok, ["a_b a_b"]), capped(200))


# -- reserved tokens ----------------------------------------------------------------------------------
def test_literal_reserved_only_when_enabled() -> None:
    """Reserved names in text become their reserved ids only with literal_reserved."""
    text = "lamp lit <eos> the ferry<bos>left"
    plain = BpeTokenizer()
    enc = plain.fit(counts_from_texts(plain, [LOG, text]), capped(N_RESERVED + 256 + 50))
    ids = enc.encode(text)
    assert (ids >= N_RESERVED).all()
    assert enc.decode(ids) == text

    lit = BpeTokenizer(literal_reserved=True)
    enc = lit.fit(counts_from_texts(lit, [LOG, text * 20]), capped(N_RESERVED + 256 + 50))
    ids = enc.encode(text).tolist()
    assert [i for i in ids if i < N_RESERVED] == [SPEC.reserved.index("<eos>"), SPEC.reserved.index("<bos>")]
    assert enc.decode(ids, show_reserved=True) == text
    # the names never take part in a merge
    assert not any(b"<eos>" in enc.vocabulary.token(z) or b"<bos>" in enc.vocabulary.token(z) for _, _, z in enc.merges)


def test_literal_reserved_must_match_vocabulary_reserved() -> None:
    """literal_reserved with names other than vocab.reserved is a RecipeError naming the field."""
    spec = VocabSpec(reserved=("<unk>", "<sep>"), unknown="<unk>", padding="", begin="", end="")
    tok = BpeTokenizer(literal_reserved=True)
    with pytest.raises(RecipeError, match="reserved_names"):
        tok.fit(counts_from_texts(tok, ["a b"]), capped(400, spec))
    tok = BpeTokenizer(literal_reserved=True, reserved_names=("<unk>", "<sep>"))
    enc = tok.fit(counts_from_texts(tok, ["x<sep>y"]), capped(400, spec))
    assert enc.encode("x<sep>y").tolist()[1] == 1


def test_reserved_never_merged() -> None:
    """Reserved tokens keep ids 0..k-1 and no merge uses or produces them."""
    enc = bytes_encoder()
    assert all(min(m) >= N_RESERVED for m in enc.merges)
    assert enc.vocabulary.n_reserved == N_RESERVED
    assert enc.vocabulary.roles == {"padding": 0, "unknown": 1, "begin": 2, "end": 3}


# -- storage -----------------------------------------------------------------------------------------
def saved(enc: BpeEncoder, directory: Path) -> Path:
    """Store an encoder the way a build does: vocab.arrow beside tokenizer.arrow."""
    enc.vocabulary.save(directory / "vocab.arrow")
    assert enc.save(directory) == ["tokenizer.arrow"]
    return directory


@pytest.mark.parametrize(
    "kwargs",
    [
        {"cap": N_RESERVED + 256 + 80},
        {"base": "chars", "end_of_word": "</w>", "cap": 300, "literal_reserved": True},
    ],
)
def test_save_load_round_trip(tmp_path: Path, kwargs: dict[str, object]) -> None:
    """A stored and reloaded encoder has the same merges and encodes identically."""
    cap = int(kwargs.pop("cap"))  # type: ignore[call-overload]
    tok = BpeTokenizer(**kwargs)  # type: ignore[arg-type]
    enc = tok.fit(counts_from_texts(tok, [LOG]), capped(cap))
    again = tok.load(saved(enc, tmp_path))
    assert again.merges == enc.merges
    assert again.vocabulary.tokens.equals(enc.vocabulary.tokens)
    for text in [LOG, "<eos>lamp <unk> oil", "Ωmega 12"]:
        assert np.array_equal(again.encode(text), enc.encode(text))
        assert again.decode(again.encode(text)) == enc.decode(enc.encode(text))


def test_an_encoder_loaded_where_it_was_saved_reuses_the_training_chunks(tmp_path: Path) -> None:
    """Loaded back from where it was just saved, an encoder looks up the training chunks and gives
    the ids that merging them afresh gives."""
    tok = BpeTokenizer(base="chars", min_pair_count=1)
    counts = counts_from_texts(tok, [LOG])
    enc = tok.fit(counts, capped(N_RESERVED + len(set(LOG)) + 90))
    again = tok.load(saved(enc, tmp_path))
    assert again._known is not None
    keys = counts.column("key").combine_chunks()
    looked_up = again.piece_ids(keys)
    again.forget()
    afresh = again.piece_ids(keys)
    assert np.array_equal(looked_up[0], afresh[0]) and np.array_equal(looked_up[1], afresh[1])


def test_files_replaced_after_saving_are_not_matched_with_the_saved_training_chunks(tmp_path: Path) -> None:
    """An encoder whose files were replaced after it was saved merges every chunk from its own merges."""
    tok = BpeTokenizer(min_pair_count=1)
    counts = counts_from_texts(tok, [LOG])
    other = tok.fit(counts, capped(N_RESERVED + 256 + 20))
    saved(other, tmp_path / "other")
    enc = tok.fit(counts, capped(N_RESERVED + 256 + 80))
    saved(enc, tmp_path / "here")
    for name in ("vocab.arrow", "tokenizer.arrow"):
        (tmp_path / "here" / name).write_bytes((tmp_path / "other" / name).read_bytes())
    loaded = tok.load(tmp_path / "here")
    assert loaded._known is None
    assert np.array_equal(loaded.encode(LOG), other.encode(LOG))
    assert not np.array_equal(loaded.encode(LOG), enc.encode(LOG))


def test_load_rejects_malformed(tmp_path: Path) -> None:
    """A garbled, foreign, tampered or mismatched tokenizer.arrow raises ShardCorruptError."""
    tok = BpeTokenizer()
    enc = tok.fit(counts_from_texts(tok, [LOG]), capped(N_RESERVED + 256 + 30))
    saved(enc, tmp_path)
    path = tmp_path / "tokenizer.arrow"
    table = pa.ipc.open_file(pa.memory_map(str(path))).read_all()
    meta = table.schema.metadata

    with pytest.raises(ShardCorruptError, match="recipe says"):
        BpeTokenizer(min_pair_count=3).load(tmp_path)

    tampered = table.set_column(4, "token", pa.array([b"zz"] * table.num_rows, pa.binary()))
    write_table(path, tampered.replace_schema_metadata(meta))
    with pytest.raises(ShardCorruptError, match="does not match the vocabulary"):
        tok.load(tmp_path)

    write_table(path, table.slice(0, 5).replace_schema_metadata(meta))
    with pytest.raises(ShardCorruptError, match="do not make the vocabulary"):
        tok.load(tmp_path)

    write_table(path, table.drop_columns(["rank"]).replace_schema_metadata(meta))
    with pytest.raises(ShardCorruptError, match="expected schema"):
        tok.load(tmp_path)

    write_table(path, table.replace_schema_metadata({b"seqpipe.table": b"shard"}))
    with pytest.raises(ShardCorruptError, match="not a seqpipe byte-pair merge table"):
        tok.load(tmp_path)

    path.write_bytes(b"ARROW1 but not really")
    with pytest.raises(ShardCorruptError):
        tok.load(tmp_path)


# -- recipe ------------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("table", "key"),
    [
        ({"base": "words"}, "base"),
        ({"end_of_word": "</w>"}, "end_of_word"),
        ({"vocab_size": 300}, "vocab_size"),
        ({"min_pair_count": 0}, "min_pair_count"),
        ({"chunking": "wordpiece"}, "chunking"),
        ({"chunking": "custom"}, "chunk_regex"),
        ({"chunking": "custom", "chunk_regex": "("}, "chunk_regex"),
        ({"chunking": "custom", "chunk_regex": "(a)|b"}, "chunk_regex"),
        ({"chunk_regex": "a+"}, "chunk_regex"),
        ({"chunk_pattern": "a+"}, "chunk_pattern"),
        ({"literal_reserved": "yes"}, "literal_reserved"),
        ({"reserved_names": ["<a>", "<a>"]}, "reserved_names"),
        ({"merges": 3}, "merges"),
    ],
)
def test_recipe_errors_name_the_key(table: dict[str, object], key: str) -> None:
    """Bad recipe values raise RecipeError whose key path names the field."""
    with pytest.raises(RecipeError) as info:
        parse_tokenizer({"kind": "bpe", **table})
    assert info.value.key == f"tokenizer.{key}"


def test_recipe_round_trip() -> None:
    """parse_tokenizer builds a BpeTokenizer whose plain form rebuilds the same tokenizer."""
    tok = parse_tokenizer({"kind": "bpe", "base": "chars", "end_of_word": "</w>", "min_pair_count": 3})
    assert isinstance(tok, BpeTokenizer)
    plain = to_plain(tok)
    assert plain["kind"] == "bpe"
    assert section(BpeTokenizer, plain, "tokenizer", skip=("kind",)) == tok


def test_cap_too_small_or_missing_and_empty_corpus() -> None:
    """A cap below reserved + alphabet, or no cap at all, is a RecipeError; no text gives the bare alphabet."""
    tok = BpeTokenizer()
    with pytest.raises(RecipeError, match="needs at least 260") as info:
        tok.fit(counts_from_texts(tok, ["abc"]), capped(100))
    assert info.value.key == "vocabulary.cap"
    with pytest.raises(RecipeError, match=r"grows the vocabulary up to \[vocabulary\] cap") as info:
        tok.fit(counts_from_texts(tok, ["abc"]), SPEC)
    assert info.value.key == "vocabulary.cap"
    enc = BpeTokenizer().fit(counts_from_texts(tok, [""]), capped(1000))
    assert (len(enc.vocabulary), enc.merges) == (N_RESERVED + 256, [])
    assert enc.decode(enc.encode("new text")) == "new text"
    enc = BpeTokenizer(base="chars").fit(counts_from_texts(tok, [""]), capped(1000))
    assert len(enc.vocabulary) == N_RESERVED
    assert enc.encode("ab").tolist() == [SPEC.reserved.index("<unk>")] * 2


@pytest.mark.parametrize("learned", [0, 7, 40])
def test_cap_is_the_vocabulary_size_training_reaches(learned: int) -> None:
    """[vocabulary] cap is the number of entries byte-pair training grows the vocabulary to."""
    tok = BpeTokenizer()
    enc = tok.fit(counts_from_texts(tok, [LOG]), capped(N_RESERVED + 256 + learned))
    assert len(enc.vocabulary) == N_RESERVED + 256 + learned and len(enc.merges) == learned


_HASH_SEED_SCRIPT = """
import pyarrow as pa
from seqpipe.tokenizers.bpe import BpeTokenizer
from seqpipe.vocab import VocabSpec
words = [w.encode() for w in "ab ba abab aab bba baab abba".split()] + [b"ab", b"ba"]
keys = list(dict.fromkeys(words))
table = pa.table({"key": pa.array(keys, pa.binary()), "count": pa.array([3, 3, 2, 2, 1, 2, 2], pa.int64())})
enc = BpeTokenizer(min_pair_count=1).fit(table, VocabSpec(cap=300))
print(enc.merges)
"""


def test_independent_of_hash_seed() -> None:
    """Training gives the same merges under different PYTHONHASHSEED values."""
    runs = []
    for seed in ("1", "2", "12345"):
        env = {**os.environ, "PYTHONHASHSEED": seed}
        done = subprocess.run(
            [sys.executable, "-c", _HASH_SEED_SCRIPT],
            env=env,
            capture_output=True,
            text=True,
            check=True,
            cwd=Path(__file__).resolve().parents[1],
        )
        runs.append(done.stdout)
    assert runs[0] == runs[1] == runs[2]
    assert runs[0].startswith("[(")


@pytest.mark.parametrize("show", [True, False])
def test_training_progress_bar_counts_merges(
    show: bool, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """With ``show`` a bar on stderr counts merges up to the number the cap leaves; without, nothing is written."""
    every_update = functools.partial(_bpe_train.bar, mininterval=0, miniters=1)  # redraw on each merge
    monkeypatch.setattr(_bpe_train, "bar", every_update)
    tok = BpeTokenizer()
    tok.fit(counts_from_texts(tok, [LOG]), capped(N_RESERVED + 256 + 30), show=show)
    err = capsys.readouterr().err
    if show:
        assert "byte-pair merges" in err and "30/30" in err
    else:
        assert err == ""


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    texts=st.lists(st.text(alphabet=MANY_SCRIPTS, min_size=1, max_size=30), min_size=70, max_size=110, unique=True),
    base=st.sampled_from(["bytes", "chars", "chars+marker"]),
    extra=st.integers(0, 120),
)
def test_merging_many_chunks_together_equals_one_by_one(texts: list[str], base: str, extra: int) -> None:
    """Ids of many uncached chunks merged together (array rounds) equal those merged one chunk at a time,
    unseen characters included."""
    marker = "</w>" if base == "chars+marker" else ""
    tok = BpeTokenizer(base="chars" if marker else base, end_of_word=marker, min_pair_count=1)
    trained = texts[: len(texts) // 2]  # the other half holds chunks (and characters) training never saw
    alphabet = 256 if base == "bytes" else len(set("".join(trained))) + bool(marker)
    enc = tok.fit(counts_table([(t.encode(), 1) for t in trained]), capped(N_RESERVED + alphabet + extra))
    keys = pa.array([t.encode() for t in texts], pa.binary())
    enc.forget()
    together = enc.piece_ids(keys)
    saved = bpe_module.BATCH_MISSES
    setattr(bpe_module, "BATCH_MISSES", 10**9)  # noqa: B010 (a Final constant, changed only for this check)
    try:
        enc.forget()
        one_by_one = enc.piece_ids(keys)
    finally:
        setattr(bpe_module, "BATCH_MISSES", saved)  # noqa: B010
    assert np.array_equal(together[0], one_by_one[0]) and np.array_equal(together[1], one_by_one[1])


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.text(min_size=0, max_size=6), min_size=1, max_size=12), st.integers(0, 3), st.booleans())
def test_start_symbols_read_from_arrow_keys_match_decoding_each_key(words: list[str], skip: int, large: bool) -> None:
    """Chars and bytes start symbols read from the keys' Arrow buffers (sliced, chunked, large or
    not) equal those found by decoding each key in Python."""
    words = [w.encode("utf-8", "surrogatepass").decode("utf-8", "replace") for w in words]
    raw = [w.encode("utf-8") for w in ["lead", *words]]
    kind = pa.large_binary() if large else pa.binary()
    whole = pa.array(raw, kind)  # one chunk read at an offset, or two chunks joined
    column = pa.chunked_array([whole] if skip % 2 else [whole.slice(0, 1), whole.slice(1)])
    counts = pa.table({"key": column.slice(skip), "count": pa.array(range(1, len(raw) + 1), pa.int64())[skip:]})
    keys, freqs = _bpe_train.read_counts(counts)
    want = raw[skip:]
    assert keys.to_pylist() == want and freqs.tolist() == list(range(1 + skip, len(raw) + 1))
    alphabet, alpha_counts, flat, lengths = _bpe_train.char_symbols(keys, freqs, 3, "")
    chars = sorted({c for k in want for c in k.decode("utf-8")})
    assert alphabet == [c.encode("utf-8") for c in chars]
    assert lengths.tolist() == [len(k.decode("utf-8")) for k in want]
    assert flat.tolist() == [3 + chars.index(c) for k in want for c in k.decode("utf-8")]
    assert alpha_counts.tolist() == [
        sum(f * k.decode("utf-8").count(c) for k, f in zip(want, freqs, strict=True)) for c in chars
    ]
    _, _, byte_flat, byte_lengths = _bpe_train.byte_symbols(keys, freqs, 3)
    assert byte_flat.tolist() == [3 + b for k in want for b in k] and byte_lengths.tolist() == list(map(len, want))


def test_chars_base_refuses_keys_that_are_not_utf8() -> None:
    """A chunk key that is not UTF-8 under base 'chars' is a TokenizerError saying so."""
    keys, freqs = _bpe_train.read_counts(pa.table({"key": pa.array([b"ok", b"\xff\xfe"]), "count": [1, 2]}))
    with pytest.raises(TokenizerError, match="not UTF-8"):
        _bpe_train.char_symbols(keys, freqs, 0, "")


def test_pairs_grouped_by_one_sort_match_a_stable_argsort() -> None:
    """Grouping pairs through one sort of combined keys, and the fallback for codes too large to
    combine, both order as a stable argsort of the codes does (slots ascending within a pair)."""
    rng = np.random.default_rng(7)
    slots = np.sort(rng.choice(10_000, size=3_000, replace=False)).astype(np.int64)
    for top in (50, 2**61):
        codes = rng.integers(0, 40, size=len(slots)).astype(np.int64) * (top // 40)
        order = np.argsort(codes, kind="stable")
        got_codes, got_slots = _bpe_train._by_pair(codes, slots, 10_000)
        assert got_codes.tolist() == codes[order].tolist() and got_slots.tolist() == slots[order].tolist()


@settings(max_examples=40, deadline=None)
@given(st.lists(st.lists(st.integers(0, 5), min_size=0, max_size=6), min_size=1, max_size=8), st.integers(1, 3))
def test_heap_entries_order_as_count_then_first_slot_then_pair(words: list[list[int]], weight: int) -> None:
    """The integer heap entries decode to each kept pair's (count, first slot, code) found by
    brute force, and sort as the tuples (-count, first slot, code) do."""
    flat = np.array([s for w in words for s in w], np.int64)
    lengths = np.array([len(w) for w in words], np.int64)
    freqs = np.arange(weight, weight + len(words), dtype=np.int64)
    chain = _bpe_train._Chain.index(flat, lengths, freqs, 6, 2)
    want: dict[int, list[int]] = {}
    at = 0
    for w, f in zip(words, freqs.tolist(), strict=True):
        for i in range(len(w) - 1):
            seen = want.setdefault(w[i] * 6 + w[i + 1], [0, at + i])
            seen[0] += f
        at += len(w)
    tuples = sorted((-c, first, code) for code, (c, first) in want.items() if c >= 2)
    shift, bits = chain.count_shift, chain.code_bits
    keys = sorted(chain.heap())
    assert [(k >> shift, (k >> bits) & ((1 << (shift - bits)) - 1), k & ((1 << bits) - 1)) for k in keys] == tuples
