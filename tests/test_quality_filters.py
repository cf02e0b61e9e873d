"""Quality filters: each measure equals a plain-Python reference, thresholds keep/drop, counts by cause."""

from __future__ import annotations

import itertools
import json
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pytest
import regex
from hypothesis import given, settings
from hypothesis import strategies as st

from seqpipe.clean import parse_step
from seqpipe.clean.function_words import FUNCTION_WORDS, FunctionWords
from seqpipe.clean.letter_share import LetterShare
from seqpipe.clean.longest_line import LongestLine
from seqpipe.clean.repeated_lines import RepeatedLines
from seqpipe.clean.repeated_ngrams import RepeatedNgrams
from seqpipe.clean.word_length import WordLength
from seqpipe.errors import RecipeError
from seqpipe.filter_preview import preview_filters

# small alphabets so that repeats, empty lines and whitespace runs are frequent
_TEXT = st.text(alphabet=st.sampled_from(list("ab c\n\t.7é")), max_size=60)
_DOCS = st.lists(_TEXT, max_size=6)


def arr(docs: list[str]) -> pa.Array:
    return pa.array(docs, pa.large_string())


def ref_letter_share(doc: str) -> float:
    visible = [c for c in doc if not regex.match(r"\s", c)]
    return sum(bool(regex.match(r"\p{L}", c)) for c in visible) / len(visible) if visible else 0.0


def ref_repeated_lines(doc: str) -> float:
    lines = [line for line in doc.split("\n") if line]
    return (len(lines) - len(set(lines))) / len(lines) if lines else 0.0


def ref_mean_word_length(doc: str) -> float:
    words = doc.split()
    return sum(map(len, words)) / len(words) if words else 0.0


def ref_longest_line(doc: str) -> int:
    return max((len(line) for line in doc.split("\n")), default=0)


def ref_repeated_ngrams(doc: str, n: int) -> float:
    words = doc.split()
    grams = [tuple(words[i : i + n]) for i in range(len(words) - n + 1)]
    covered = [False] * len(words)
    for i, g in enumerate(grams):
        if grams.count(g) > 1:
            for k in range(i, i + n):
                covered[k] = True
    total = sum(map(len, words))
    return sum(len(w) for w, c in zip(words, covered, strict=True) if c) / total if total else 0.0


@settings(max_examples=200, deadline=None)
@given(docs=_DOCS)
def test_measures_equal_plain_python(docs: list[str]) -> None:
    """Every vectorized measure equals a one-document-at-a-time Python reference."""
    a = arr(docs)
    assert np.allclose(LetterShare().measure(a), [ref_letter_share(d) for d in docs])
    assert np.allclose(RepeatedLines().measure(a), [ref_repeated_lines(d) for d in docs])
    assert np.allclose(WordLength().measure(a), [ref_mean_word_length(d) for d in docs])
    assert LongestLine().measure(a).tolist() == [ref_longest_line(d) for d in docs]
    for n in (1, 2, 3):
        assert np.allclose(RepeatedNgrams(n=n).measure(a), [ref_repeated_ngrams(d, n) for d in docs])


def test_function_words_count_whole_words_any_case() -> None:
    """Function words count as whole words, case-insensitively, punctuation stripped; substrings do not."""
    docs = ["The ferry and the tide.", "Theatre bother tooth", "AND, with; (of)", ""]
    assert FunctionWords().measure(arr(docs)).tolist() == [3, 0, 3, 0]
    assert FunctionWords().keep(arr(docs)).tolist() == [True, False, True, False]
    assert "the" in FUNCTION_WORDS["en"] and len(FUNCTION_WORDS["en"]) == 8  # Rae et al. 2021, appendix A


PROSE = "The ferry left the quay at dawn and the tide was with us all the way to the mill."
LOG = "\n".join(["Menu | Home | Tickets"] * 4 + ["The boat sails at noon."])


@pytest.mark.parametrize(
    ("step", "kept", "dropped"),
    [
        (LetterShare(), PROSE, "12 34 56 78 90 -- ## %% 42"),
        (RepeatedLines(), PROSE, LOG),
        (RepeatedNgrams(), PROSE, " ".join(["row the boat to the mill"] * 4)),
        (WordLength(), PROSE, "a b c d e f g h i j k l"),
        (WordLength(), PROSE, "Supercalifragilisticexpialidociously-long-hyphenated-compounds everywhere"),
        (LongestLine(characters=40), "short line\nanother short line", "x" * 41),
        (FunctionWords(), PROSE, "Ferry timetable: Reedgate 06:10, Mill Quay 06:40, Gullhaven 07:15"),
    ],
)
def test_default_thresholds_keep_prose_and_drop_the_junk(step: Any, kept: str, dropped: str) -> None:
    """With its documented defaults each filter keeps ordinary prose and drops the kind of text it targets."""
    assert step.keep(arr([kept, dropped])).tolist() == [True, False]
    assert step.apply(arr([kept, dropped])).to_pylist() == [kept]


@pytest.mark.parametrize(
    "table",
    [
        {"kind": "letter_share", "minimum": 0.7},
        {"kind": "repeated_lines", "maximum": 0.2},
        {"kind": "repeated_ngrams", "n": 6, "maximum": 0.14},
        {"kind": "word_length", "minimum": 2.0, "maximum": 12.0},
        {"kind": "longest_line", "characters": 500},
        {"kind": "function_words", "language": "en", "minimum": 3},
    ],
    ids=lambda t: t["kind"],
)
def test_filters_round_trip_and_handle_empty_batches(table: dict[str, Any]) -> None:
    """Each filter rebuilds from its table and keeps nothing of an empty batch without error."""
    step = parse_step(table, "recipe.clean[0]")
    assert step.to_dict() == table and parse_step(step.to_dict(), "c") == step
    assert step.apply(arr([])).to_pylist() == []


@pytest.mark.parametrize(
    ("table", "key"),
    [
        ({"kind": "letter_share", "minimum": 1.5}, "recipe.clean[3].minimum"),
        ({"kind": "word_length", "minimum": 5, "maximum": 4}, "recipe.clean[3].maximum"),
        ({"kind": "function_words", "language": "xx"}, "recipe.clean[3].language"),
        ({"kind": "repeated_ngrams", "n": 0}, "recipe.clean[3].n"),
        ({"kind": "longest_line", "characters": 0}, "recipe.clean[3].characters"),
    ],
)
def test_bad_thresholds_name_the_key(table: dict[str, Any], key: str) -> None:
    """Out-of-range thresholds are refused with the key path."""
    with pytest.raises(RecipeError) as info:
        parse_step(table, "recipe.clean[3]")
    assert info.value.key == key


def test_build_counts_each_filter_by_cause(tmp_path: Path) -> None:
    """A build reports, per filter step, how many documents it removed, in summary.dropped."""
    from seqpipe import build
    from seqpipe.recipe import parse_recipe

    docs = [PROSE, "12 34 56 78 90 -- ## %% 42", LOG, PROSE.replace("dawn", "dusk"), "x" * 3000]
    (tmp_path / "in.txt").write_text("\n\n".join(docs) + "\n", encoding="utf-8")
    recipe = parse_recipe(
        '[[sources]]\nkind = "text"\npaths = "in.txt"\ndocument = "paragraph"\n\n'
        '[[clean]]\nkind = "letter_share"\n\n[[clean]]\nkind = "repeated_lines"\n\n'
        '[[clean]]\nkind = "longest_line"\n\n[splits]\ntrain = 1.0\nvalidation = 0.0\ntest = 0.0\n',
        tmp_path,
    )
    result = build(recipe, tmp_path / "out", workers=1, progress=False)
    assert result.manifest["summary"]["dropped"] == {"0:letter_share": 1, "1:repeated_lines": 1, "2:longest_line": 1}
    assert result.manifest["splits"]["train"]["documents"] == 2
    preview = preview_filters(recipe)
    assert preview.dropped == result.manifest["summary"]["dropped"]
    assert (preview.documents, preview.kept) == (5, 2)


def test_dry_run_filters_builds_nothing(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """``build --dry-run-filters`` prints per-step removals (text or JSON), exits 0 and writes no output."""
    from seqpipe.cli import main

    (tmp_path / "in.txt").write_text(f"{PROSE}\n\n{LOG}\n\n{PROSE} Again.\n", encoding="utf-8")
    (tmp_path / "r.toml").write_text(
        '[dataset]\nname = "never"\n[[sources]]\nkind = "text"\npaths = "in.txt"\ndocument = "paragraph"\n'
        '[[clean]]\nkind = "repeated_lines"\n[[clean]]\nkind = "function_words"\n',
        encoding="utf-8",
    )
    assert main(["build", str(tmp_path / "r.toml"), "--dry-run-filters", "--json"]) == 0
    got = json.loads(capsys.readouterr().out)
    assert got == {"documents": 3, "dropped": {"0:repeated_lines": 1, "1:function_words": 0}, "redacted": {}, "kept": 2}
    assert main(["build", str(tmp_path / "r.toml"), "--dry-run-filters"]) == 0
    assert "clean 0:repeated_lines" in capsys.readouterr().out
    assert not (tmp_path / "never").exists() and not Path("never").exists()


def test_word_measures_are_the_same_on_every_call() -> None:
    """The same documents give the same mean word length on every call: pyarrow 26's
    utf8_split_whitespace once kept the last value's trailing tab in its last word on about a
    third of the calls (found by test_measures_equal_plain_python; seqpipe pads the array)."""
    docs = ["7é béa\n", "\t7 é .\tbca.cb ", " a\t", " a\t", ".\t 7  bé7.7\n.é\t", ".\t 7  bé7.7\n.é\t"]
    want = [ref_mean_word_length(d) for d in docs]
    for _ in range(300):
        assert np.allclose(WordLength().measure(arr(docs)), want)


def test_repeated_ngrams_is_exact_under_hash_collisions(monkeypatch: pytest.MonkeyPatch) -> None:
    """With a key that collides for every n-gram, the measure still
    equals the Python reference: candidates are compared word by word."""
    import seqpipe.clean.repeated_ngrams as module

    monkeypatch.setattr(module, "_MULTIPLIER", np.uint64(0))  # every n-gram gets the key 0
    docs = ["a b c a b c d", "x y z x y", "one two three four", "a b c a b c d"]
    for n in (1, 2, 3):
        assert np.allclose(RepeatedNgrams(n=n).measure(arr(docs)), [ref_repeated_ngrams(d, n) for d in docs])


@settings(max_examples=200, deadline=None)
@given(
    docs=st.lists(
        st.lists(st.sampled_from([f"w{i}" for i in range(12)] + [f"pier{i}x" for i in range(12)]), max_size=40).map(
            " ".join
        ),
        max_size=5,
    ),
    n=st.integers(1, 5),
)
def test_repeated_ngrams_word_prefilter_keeps_every_window_of_repeated_words(docs: list[str], n: int) -> None:
    """The n-grams left after ruling out words that occur once in their document include every
    n-gram whose words all occur twice or more there (what any repeated n-gram needs), and the
    measure equals the Python reference with words that repeat and words that do not."""
    from seqpipe.clean._word_table import word_table
    from seqpipe.clean.repeated_ngrams import _windows_of_repeated_words

    table = word_table(arr(docs))
    got = set(_windows_of_repeated_words(table.doc, table.keys, n).tolist())
    at = 0
    for d in docs:
        words = d.split()
        for i in range(len(words) - n + 1):
            if all(words.count(w) > 1 for w in words[i : i + n]):
                assert at + i in got
        at += len(words)
    assert np.allclose(RepeatedNgrams(n=n).measure(arr(docs)), [ref_repeated_ngrams(d, n) for d in docs])


@settings(max_examples=200, deadline=None)
@given(
    docs=st.lists(
        st.lists(
            st.sampled_from(["", "quay", "tide\r", "f\u00e9rry", "ferry", "\u8336\u8336", "\U0001f600x", "  "]),
            max_size=8,
        ).map("\n".join),
        max_size=6,
    )
)
def test_repeated_lines_equal_plain_python_with_lines_of_equal_length(docs: list[str]) -> None:
    """Repeated lines (only documents holding two lines of one byte length compared as strings)
    and the longest line equal a per-document Python reference: lines of the same length and
    different text, multi-byte code points, a trailing carriage return, empty lines and empty
    documents."""
    a = arr(docs)
    assert np.allclose(RepeatedLines().measure(a), [ref_repeated_lines(d) for d in docs])
    assert LongestLine().measure(a).tolist() == [ref_longest_line(d) for d in docs]


@settings(max_examples=100, deadline=None)
@given(keys=st.lists(st.integers(0, 2**64 - 1) | st.integers(0, 40) | st.integers(2**64 - 40, 2**64 - 1), max_size=300))
def test_shared_keys_are_exactly_the_keys_seen_twice(keys: list[int]) -> None:
    """The bucket-then-hash search for repeated n-gram keys returns exactly the indices of keys
    that occur more than once (keys with equal top bits included)."""
    from seqpipe.clean.repeated_ngrams import _shared_keys

    got = _shared_keys(np.array(keys, dtype=np.uint64)).tolist()
    assert got == [i for i, k in enumerate(keys) if keys.count(k) > 1]


def test_letter_share_counts_non_ascii_code_points_as_re2_does() -> None:
    """Letters beyond ASCII (Greek, CJK, an astral letter) count; combining marks, symbols, emoji and
    no-break spaces are visible non-letters; RE2's whitespace (tab, LF, FF, CR, space) is not visible."""
    docs = ["\u03a9\u8336\U00010400\u0301\u2192\U0001f600\u00a0\x0bab", "\t\n\x0c\r a", ""]
    m = LetterShare().measure(arr(docs))
    assert m.tolist() == [5 / 10, 1.0, 0.0]


# words of eight bytes and more whose first and last eight bytes and length agree: equal keys
# (the word table hashes only those), different words
_LONG_TWINS = [
    "ferrymenXferrymen",
    "ferrymenYferrymen",
    "ferrymen",
    "quayside-\u00e9-quayside",
    "quayside-\u00ea-quayside",
]


@settings(max_examples=200, deadline=None)
@given(
    docs=st.lists(
        st.lists(st.sampled_from([*_LONG_TWINS, "a", "tide"]), max_size=14).map(" ".join),
        max_size=5,
    )
)
def test_repeated_ngrams_and_codes_are_exact_for_long_words_sharing_a_key(docs: list[str]) -> None:
    """Longer words with equal keys (same length, first and last eight bytes) are told apart:
    the repeated n-gram measure equals the Python reference and the exact codes differ."""
    from seqpipe.clean._word_table import word_table

    twins = word_table(arr(_LONG_TWINS)).keys.tolist()
    assert twins[0] == twins[1] and twins[3] == twins[4]  # the keys do collide
    for n in (1, 2, 3):
        assert np.allclose(RepeatedNgrams(n=n).measure(arr(docs)), [ref_repeated_ngrams(d, n) for d in docs])
    table = word_table(arr(docs))
    want = [w for d in docs for w in d.split()]
    codes = table.codes.tolist()
    assert all((codes[i] == codes[j]) == (want[i] == want[j]) for i in range(len(want)) for j in range(len(want)))


@settings(max_examples=200, deadline=None)
@given(
    docs=st.lists(
        st.text(
            alphabet=st.sampled_from(
                list("aZ7 \t\n\x0b\x0c\r\x1c.\u00e9\u00a0\u03a9\u0301\u2192\u8336\u3000\U00010400\U0001f600")
            ),
            max_size=30,
        ),
        max_size=6,
    )
)
def test_letter_share_equals_re2_per_character(docs: list[str]) -> None:
    """Letters / visible characters counted over the bytes (ASCII by compares, continuation bytes
    by the code points beyond ASCII) equal RE2 asked per character, \\p{L} and \\s, in
    pyarrow compute (one- to four-byte code points, RE2 and Unicode whitespace mixed)."""
    import pyarrow.compute as pc

    def re2(chars: list[str], pattern: str) -> list[bool]:
        got = pc.match_substring_regex(pa.array(chars, pa.large_string()), pattern)
        return [bool(x) for x in got.to_pylist()]

    want = []
    for d in docs:
        visible = [c for c, space in zip(d, re2(list(d), r"^\s$"), strict=True) if not space]
        letters = sum(re2(visible, r"^\p{L}$"))
        want.append(letters / len(visible) if visible else 0.0)
    assert LetterShare().measure(arr(docs)).tolist() == want


@settings(max_examples=200, deadline=None)
@given(
    docs=st.lists(
        st.text(alphabet=st.sampled_from(list("ab \n\x0b\x1c\x85\xa0\u2003\u3000\u200b\u0301é茶😀")), max_size=40),
        max_size=6,
    )
)
def test_mean_word_length_uses_the_unicode_whitespace_of_words(docs: list[str]) -> None:
    """Words cut over the bytes split at the same Unicode whitespace as str.split() (which also
    treats U+001C-U+001F, U+0085, U+00A0, U+2000-U+200A, U+3000 as space) and as pyarrow's
    utf8_split_whitespace, one document at a time."""
    import pyarrow.compute as pc

    from seqpipe.clean._quality import _split_words

    a = arr(docs)
    assert np.allclose(WordLength().measure(a), [ref_mean_word_length(d) for d in docs])
    pieces = _split_words(a)
    got = pieces.text.to_pylist()
    assert got == [w for d in docs for w in d.split()]
    assert got == [w for d in docs for w in pc.utf8_split_whitespace(arr([d, "x"]))[0].as_py() if w]
    assert pieces.doc.tolist() == [i for i, d in enumerate(docs) for _ in d.split()]
    assert pieces.lengths().tolist() == [len(w) for d in docs for w in d.split()]


@settings(max_examples=100, deadline=None)
@given(docs=_DOCS, keep=st.lists(st.booleans(), min_size=6, max_size=6))
def test_words_reused_after_a_filter_equal_a_fresh_cut(docs: list[str], keep: list[bool]) -> None:
    """Words kept from the previous batch (same documents, or some dropped) equal cutting the text
    afresh, codes included, also for batches holding copies of a document."""
    from seqpipe.clean._quality import _split_words, words

    a = arr(docs)
    first = words(a)
    first.encoded()
    mask = np.array(keep[: len(docs)], dtype=bool)
    twice = arr(docs + docs)
    for batch in (a, a.filter(pa.array(mask)), twice, twice.filter(pa.array(np.concatenate([mask, ~mask]))), a):
        got, fresh = words(batch), _split_words(batch)
        assert got.text.to_pylist() == fresh.text.to_pylist()
        assert got.doc.tolist() == fresh.doc.tolist() and got.documents == fresh.documents
        distinct, codes = got.encoded()
        assert [distinct[int(c)].as_py() for c in codes] == fresh.text.to_pylist()


@settings(max_examples=200, deadline=None)
@given(
    docs=st.lists(
        st.text(alphabet=st.sampled_from(list("ab \n\x0b\x1c\x85\xa0\u2003\u3000\x00é茶😀")), max_size=40),
        max_size=6,
    )
)
def test_word_table_codes_are_equal_exactly_for_equal_words(docs: list[str]) -> None:
    """The word table cuts the words str.split() cuts (code points counted per word) and gives two
    words the same code exactly when they are the same string, long words and NUL bytes included."""
    from seqpipe.clean._word_table import word_table

    table = word_table(arr(docs))
    want = [w for d in docs for w in d.split()]
    got = [bytes(table.data[a:b]).decode("utf-8") for a, b in zip(table.starts, table.ends, strict=True)]
    assert got == want
    assert table.doc.tolist() == [i for i, d in enumerate(docs) for _ in d.split()]
    assert table.chars.tolist() == [len(w) for w in want]
    codes = table.codes.tolist()
    assert all((codes[i] == codes[j]) == (want[i] == want[j]) for i in range(len(want)) for j in range(len(want)))
    distinct, index = table.distinct()
    assert [distinct[int(i)].as_py() for i in index] == want


@settings(max_examples=300, deadline=None)
@given(
    docs=st.lists(
        st.text(alphabet=st.sampled_from(list("theTHEaofAndw \n\"'(.,-\u201c\u201dé")), max_size=50), max_size=6
    )
)
def test_function_words_equal_a_per_word_reference(docs: list[str]) -> None:
    """Function words counted over packed codes (short ASCII words), after stripping punctuation at
    both ends, and per distinct word (longer or non-ASCII words) equal a per-word Python count."""
    strip = "\"'()[]{}.,;:!?-\u2018\u2019\u201c\u201d"
    want = [sum(w.lower().strip(strip) in FUNCTION_WORDS["en"] for w in d.split()) for d in docs]
    assert FunctionWords().measure(arr(docs)).tolist() == want


@settings(max_examples=300, deadline=None)
@given(
    docs=st.lists(
        st.lists(
            st.builds(
                "".join,
                st.tuples(
                    st.sampled_from(["", "(", '"', "\u201c", "'", "--"]),
                    st.sampled_from(
                        ["the", "The", "THE", "and", "AND", "of", "wITh", "be", "to", "that", "have", "th\u00e9"]
                    ),
                    st.sampled_from(["", ",", ".", ")", "!\u201d", "\u2019", "s"]),
                ),
            )
            | st.text(
                alphabet=st.sampled_from(list("theTHEaofAndw\"'(.,-\u201c\u201d\u00e9\u00df\u03a9\u8336\u0130")),
                max_size=12,
            ),
            max_size=8,
        ).map(" ".join),
        max_size=8,
    ),
    minimum=st.integers(1, 4),
    spaces=st.sampled_from([" ", "\n", "\u00a0", "\u3000 "]),
)
def test_function_words_keep_equals_the_full_count(docs: list[str], minimum: int, spaces: str) -> None:
    """keep() (a count of plain short function words first, the full count only for documents
    it leaves short of ``minimum``) keeps exactly the documents whose full count reaches
    ``minimum``; on text whose characters lower-case alike in Python and pyarrow (no U+0130) it
    also equals a per-word Python count (str.split, str.lower, str.strip)."""
    docs = [d.replace(" ", spaces) for d in docs]
    step = FunctionWords(minimum=minimum)
    got = step.keep(arr(docs)).tolist()
    assert got == (step.measure(arr(docs)) >= minimum).tolist()
    strip = "\"'()[]{}.,;:!?-\u2018\u2019\u201c\u201d"
    for d, kept in zip(docs, got, strict=True):
        if "\u0130" not in d:
            assert kept == (sum(w.lower().strip(strip) in FUNCTION_WORDS["en"] for w in d.split()) >= minimum)


@settings(max_examples=100, deadline=None)
@given(points=st.lists(st.integers(0x80, 0x2FFF), max_size=40))
def test_kept_code_point_answers_equal_asking_again(points: list[int]) -> None:
    """Answers about code points beyond ASCII kept from earlier batches equal pyarrow's answer asked afresh."""
    import pyarrow.compute as pc

    from seqpipe.clean._quality import _asked

    distinct = np.unique(np.array(points, dtype=np.int64))
    fresh = pc.utf8_is_space(pa.array([chr(c) for c in distinct.tolist()], pa.large_string()))
    want = np.asarray(fresh.to_numpy(zero_copy_only=False), dtype=bool).tolist()
    assert _asked(distinct, pc.utf8_is_space).tolist() == want
    assert _asked(distinct, pc.utf8_is_space).tolist() == want


def test_per_document_sum_in_32_and_64_bits_equals_a_sum_per_range(monkeypatch: pytest.MonkeyPatch) -> None:
    """per_document_sum gives each document's sum of byte values, empty documents 0, with the
    32-bit and the 64-bit adder."""
    from seqpipe.clean import _quality

    rng = np.random.default_rng(3)
    flags = rng.integers(0, 256, 5000).astype(np.uint8)
    offsets = np.concatenate([[0], np.sort(rng.integers(0, 5000, 40)), [5000, 5000]]).astype(np.int64)
    expected = [int(flags[a:b].sum(dtype=np.int64)) for a, b in itertools.pairwise(offsets.tolist())]
    assert _quality.per_document_sum(flags, offsets).tolist() == expected
    monkeypatch.setattr(_quality, "_SUM32_BYTES", 0)
    assert _quality.per_document_sum(flags, offsets).tolist() == expected


@settings(max_examples=200, deadline=None)
@given(
    docs=st.lists(st.text(alphabet=st.sampled_from(list("abcdefgh \n")), max_size=30), max_size=5),
    offset=st.integers(0, 3),
)
def test_short_word_keys_are_their_bytes_up_to_the_batch_end(docs: list[str], offset: int) -> None:
    """A word of one to seven ASCII bytes has as key its bytes with its length above them (the
    packing the module docstring states), the batch's last word and a sliced array included;
    a longer word's key has the top byte 0xFF."""
    from seqpipe.clean._word_table import pack_ascii, word_table

    table = word_table(pa.array(["pad words"] * offset + docs, pa.large_string()).slice(offset))
    want = [w for d in docs for w in d.split()]
    keys = table.keys.tolist()
    assert len(keys) == len(want)
    for word, key in zip(want, keys, strict=True):
        assert key == (int(pack_ascii([word])[0]) if len(word) <= 7 else key | (0xFF << 56)), word


def test_scratch_arrays_are_kept_per_slot_and_per_thread() -> None:
    """scratch gives the same memory for one slot on every call (grown when asked for more),
    separate memory for two slots and for two threads, and a new array past its size bound."""
    import threading

    from seqpipe.clean import _quality

    a = _quality.scratch("test.a", 1000, np.int64)
    b = _quality.scratch("test.b", 1000, np.int64)
    assert a.dtype == np.int64 and len(a) == 1000 and not np.shares_memory(a, b)
    assert np.shares_memory(a, _quality.scratch("test.a", 8000, np.uint8))  # the same bytes
    grown = _quality.scratch("test.a", 100_000, np.int64)
    assert len(grown) == 100_000 and np.shares_memory(grown, _quality.scratch("test.a", 10, np.int64))
    other: list[np.ndarray] = []
    thread = threading.Thread(target=lambda: other.append(_quality.scratch("test.a", 1000, np.int64)))
    thread.start()
    thread.join()
    assert not np.shares_memory(other[0], grown)
    big = _quality._SCRATCH_MAX // 8 + 1
    assert not np.shares_memory(
        _quality.scratch("test.big", big, np.int64), _quality.scratch("test.big", big, np.int64)
    )


def _poison_scratch(seed: int) -> None:
    """Fill every scratch buffer of this thread with random bytes (a measure must not read what
    the last batch left there)."""
    from seqpipe.clean import _quality

    rng = np.random.default_rng(seed)
    for buffer in _quality._SCRATCH.buffers.values():
        buffer[:] = rng.integers(0, 256, len(buffer), dtype=np.uint8)


@settings(max_examples=200, deadline=None)
@given(docs=_DOCS, before=_DOCS, seed=st.integers(0, 2**32 - 1))
def test_measures_do_not_depend_on_what_scratch_arrays_held(docs: list[str], before: list[str], seed: int) -> None:
    """Measured after a larger batch (its values left in the scratch buffers) and with every
    scratch buffer filled with random bytes, the measures still equal the plain-Python
    references, and the word table of the batch before is left as it was (no result lives in a
    scratch buffer)."""
    from seqpipe.clean._word_table import word_table

    bigger = [d * 3 for d in before]  # larger buffers than this batch needs, filled with junk below
    for n in (1, 2, 3):
        RepeatedNgrams(n=n).keep(arr(bigger))
    LetterShare().keep(arr(bigger))
    FunctionWords().keep(arr(bigger))
    table = word_table(arr(bigger))
    kept = {name: np.copy(getattr(table, name)) for name in ("starts", "ends", "doc", "first", "keys", "chars")}
    _poison_scratch(seed)
    a = arr(docs)
    assert np.allclose(LetterShare().measure(a), [ref_letter_share(d) for d in docs])
    _poison_scratch(seed + 1)
    assert np.allclose(WordLength().measure(arr(docs)), [ref_mean_word_length(d) for d in docs])
    for n in (1, 2, 3):
        _poison_scratch(seed + 1 + n)
        assert np.allclose(RepeatedNgrams(n=n).measure(arr(docs)), [ref_repeated_ngrams(d, n) for d in docs])
    strip = "\"'()[]{}.,;:!?-\u2018\u2019\u201c\u201d"
    fw = [sum(w.lower().strip(strip) in FUNCTION_WORDS["en"] for w in d.split()) for d in docs]
    FunctionWords().keep(arr(bigger))  # the scratch buffers hold the larger batch's values (stale, not random)
    assert FunctionWords(minimum=1).keep(arr(docs)).tolist() == [c >= 1 for c in fw]
    _poison_scratch(seed + 5)
    assert FunctionWords().measure(arr(docs)).tolist() == fw
    _poison_scratch(seed + 6)
    assert FunctionWords(minimum=1).keep(arr(docs)).tolist() == [c >= 1 for c in fw]
    for name, values in kept.items():
        assert getattr(table, name).tolist() == values.tolist(), name


@settings(max_examples=200, deadline=None)
@given(sizes=st.lists(st.integers(0, 5), max_size=12), pick=st.lists(st.booleans(), min_size=12, max_size=12))
def test_words_of_some_documents_equal_the_mask_over_every_word(sizes: list[int], pick: list[bool]) -> None:
    """_words_of gives the same word indices as selecting, word by word, those whose document is
    picked (np.flatnonzero(picked[doc]))."""
    from seqpipe.clean.function_words import _words_of

    first = np.zeros(len(sizes) + 1, dtype=np.int64)
    np.cumsum(sizes, out=first[1:])
    doc = np.repeat(np.arange(len(sizes)), sizes)
    picked = np.array(pick[: len(sizes)], dtype=bool)
    assert _words_of(first, np.flatnonzero(picked)).tolist() == np.flatnonzero(picked[doc]).tolist()


def test_function_words_after_a_batch_of_function_words_count_only_their_own() -> None:
    """A batch measured right after one full of function words (whose codes its scratch arrays
    still hold, word for word at the same places) counts only its own function words."""
    full = arr(["the and of that " * 20, "with have to be " * 20] * 30)
    none = arr(["tea ant off thaw " * 20, "wit hive tone bee " * 20] * 30)
    step = FunctionWords(minimum=1)
    assert step.keep(full).all()
    assert not step.keep(none).any()
    assert step.measure(none).tolist() == [0] * 60
