"""Cleaning steps: known answers from the Unicode standards, and agreement with reference code.

References: UAX #15 / the Unicode Standard (known-answer cases in
fixtures/unicode/normalization.json, each with its source), Unicode's
SpecialCasing.txt and CaseFolding.txt (case mapping cases below), and Python's
own ``unicodedata`` / ``str`` methods as reference implementations for the
hypothesis checks.
"""

from __future__ import annotations

import importlib.metadata
import json
import re
import sys
import unicodedata
from pathlib import Path
from typing import Any

import pyarrow as pa
import pytest
import regex
from hypothesis import given, settings
from hypothesis import strategies as st

from seqpipe.clean import (
    STEP_KINDS,
    CollapseWhitespace,
    Dedupe,
    Lowercase,
    MinLength,
    Normalize,
    Replace,
    StripControl,
    apply_steps,
    parse_step,
)
from seqpipe.errors import RecipeError
from seqpipe.sources import ReadStats, TextSource

ROOT = Path(__file__).resolve().parent.parent
CASES = json.loads((ROOT / "fixtures" / "unicode" / "normalization.json").read_text(encoding="utf-8"))

_text = st.text(st.characters(blacklist_categories=("Cs",)), max_size=24)
# Text rich in what the steps act on: marks, ligatures, cased letters, controls, whitespace.
_tricky = st.text(
    st.sampled_from(
        list("aZ ßİΣσςﬁ\u212b\u030a\u0323\u00c5\t\n\r\x00\x85\u00a0\u2028\u3000\ufeff\u200b\u00ad\x1c\U0001f41f字")
    ),
    max_size=24,
)
_docs = st.lists(st.one_of(_text, _tricky), max_size=8)


def run(step: Any, docs: list[str]) -> list[str]:
    out = step.apply(pa.array(docs, type=pa.large_string()))
    assert out.type == pa.large_string()
    result: list[str] = out.to_pylist()
    return result


# ---------------------------------------------------------------------------------------------
# normalize


@pytest.mark.parametrize(
    "case", CASES, ids=[f"{c['form']}-{c['input'].encode('unicode_escape').decode()}" for c in CASES]
)
def test_normalize_known_answers(case: dict[str, str]) -> None:
    """Each case's source is in the fixture file (UAX #15 and the Unicode Standard)."""
    assert run(Normalize(form=case["form"]), [case["input"], "ascii stays"]) == [case["expected"], "ascii stays"]


@settings(max_examples=200, deadline=None)
@given(docs=_docs, form=st.sampled_from(["NFC", "NFKC", "NFD", "NFKD"]))
def test_normalize_matches_unicodedata(docs: list[str], form: str) -> None:
    """Every document equals unicodedata.normalize(form, document) (reference library), and is stable."""
    got = run(Normalize(form=form), docs)
    assert got == [unicodedata.normalize(form, d) for d in docs]  # type: ignore[arg-type]
    assert run(Normalize(form=form), got) == got


# ---------------------------------------------------------------------------------------------
# lowercase


def test_lowercase_known_answers() -> None:
    """Full case mappings, not one-to-one ones."""
    # SpecialCasing.txt: U+0130 lower-cases to "i" + U+0307 COMBINING DOT ABOVE.
    # SpecialCasing.txt Final_Sigma: a capital sigma ending a word becomes U+03C2.
    assert run(Lowercase(), ["\u0130", "ΟΔΟΣ ΣΑΣ", "Ferry LOG"]) == ["i\u0307", "οδος σας", "ferry log"]
    # CaseFolding.txt: U+00DF folds to "ss" (status F); lower() leaves it.
    assert run(Lowercase(mode="casefold"), ["Straße", "ﬁ"]) == ["strasse", "fi"]
    assert run(Lowercase(mode="lower"), ["Straße"]) == ["straße"]


@settings(max_examples=200, deadline=None)
@given(docs=_docs, mode=st.sampled_from(["lower", "casefold"]))
def test_lowercase_matches_str_methods(docs: list[str], mode: str) -> None:
    """Every document equals str.lower / str.casefold of it (reference), ASCII fast path included."""
    ref = str.lower if mode == "lower" else str.casefold
    assert run(Lowercase(mode=mode), docs) == [ref(d) for d in docs]


def test_lowercase_then_letters_only_leaves_the_alphabet() -> None:
    """English text lower-cased with non-letters replaced leaves the 26 letters and space.

    Common practice; the text is the Apache License 2.0 as the ``regex`` package ships it.
    """
    dist = importlib.metadata.distribution("regex")
    files = [f for f in dist.files or [] if f.name.upper().startswith("LICENSE")]
    assert files, "the regex package ships its licence text"
    text = files[0].read_text(encoding="utf-8")
    out = apply_steps([Lowercase(), Replace(pattern=r"\P{L}", replacement=" ")], pa.array([text]))
    assert set(out[0].as_py()) == set("abcdefghijklmnopqrstuvwxyz ")


# ---------------------------------------------------------------------------------------------
# replace


def test_replace_is_unicode_aware_and_literal() -> None:
    """\\p{..} classes see every script; the replacement text is inserted as written."""
    assert run(Replace(pattern=r"\p{Lu}", replacement=""), ["ÉcoleΩx Ölz"]) == ["colex lz"]
    assert run(Replace(pattern="(a)", replacement="\\1\\g<1>"), ["cab"]) == ["c\\1\\g<1>b"]
    assert run(Replace(pattern=r"\d+"), ["pier 12, berth 7"]) == ["pier  , berth  "]


@settings(max_examples=100, deadline=None)
@given(
    docs=_docs,
    pattern=st.sampled_from([r"\s+", r"\P{L}+", r"[aeiou]", r"\X", r"(?<=a)b|ß"]),
    replacement=st.sampled_from(["", " ", "_", "\\"]),
)
def test_replace_matches_regex_sub(docs: list[str], pattern: str, replacement: str) -> None:
    """Every document equals regex.sub with a function returning the replacement (reference)."""
    compiled = regex.compile(pattern, regex.VERSION1)
    want = [compiled.sub(lambda _m: replacement, d) for d in docs]
    assert run(Replace(pattern=pattern, replacement=replacement), docs) == want


def test_replace_pattern_is_checked_when_built() -> None:
    """A bad or missing pattern is a RecipeError naming the key, before any document is read."""
    with pytest.raises(RecipeError, match=r"recipe\.clean\[2\]\.pattern: not a valid regular expression"):
        parse_step({"kind": "replace", "pattern": "(unclosed"}, "recipe.clean[2]")
    with pytest.raises(RecipeError, match=r"recipe\.clean\[2\]\.pattern: missing"):
        parse_step({"kind": "replace"}, "recipe.clean[2]")


# ---------------------------------------------------------------------------------------------
# strip_control


def _strip_reference(text: str, keep: str) -> str:
    return "".join(c for c in text if c in keep or unicodedata.category(c) not in ("Cc", "Cf"))


def test_strip_control_known_answers() -> None:
    """NUL, DEL, C1 controls and format characters go (U+FEFF included); newline and tab stay."""
    doc = "a\x00b\x7fc\x85d\ufeffe\u200bf\u00adg\u2060h\n\ti\r"
    assert run(StripControl(), [doc]) == ["abcdefgh\n\ti"]
    assert run(StripControl(keep=""), [doc]) == ["abcdefghi"]
    assert run(StripControl(keep="\r\u00ad"), [doc]) == ["abcdef\u00adghi\r"]


@settings(max_examples=200, deadline=None)
@given(docs=_docs, keep=st.sampled_from(["\n\t", "", "\ufeff\x00"]))
def test_strip_control_matches_unicodedata_categories(docs: list[str], keep: str) -> None:
    """The RE2 path removes exactly the characters unicodedata puts in Cc or Cf (reference)."""
    assert run(StripControl(keep=keep), docs) == [_strip_reference(d, keep) for d in docs]


def test_strip_control_covers_every_cc_and_cf_code_point() -> None:
    """One document holding every code point: only those outside Cc/Cf (or kept) survive."""
    every = "".join(chr(cp) for cp in range(sys.maxunicode + 1) if not 0xD800 <= cp < 0xE000)
    assert run(StripControl(), [every]) == [_strip_reference(every, "\n\t")]


def test_strip_control_cleans_what_a_reader_keeps() -> None:
    """A mid-file BOM and NUL bytes that a source keeps are removed by strip_control."""
    hostile = ROOT / "fixtures" / "hostile"
    docs = []
    for name in ("bom_middle.txt", "nul_bytes.txt"):
        for array in TextSource(paths=name, document="line").documents(hostile, ReadStats()):
            docs.extend(run(StripControl(), array.to_pylist()))
    assert docs == ["before the mark", "after the mark", "crossingone", "secondline", ""]


# ---------------------------------------------------------------------------------------------
# collapse_whitespace


def test_collapse_whitespace_known_answers() -> None:
    """Runs of Unicode whitespace become one space (or one newline when kept); ends are trimmed."""
    doc = "\u3000 Ferry\u00a0\u00a0log \n\n\t day\u2028 one  "
    assert run(CollapseWhitespace(), [doc]) == ["Ferry log day one"]
    assert run(CollapseWhitespace(keep_newlines=True), [doc]) == ["Ferry log\nday one"]


@settings(max_examples=200, deadline=None)
@given(docs=_docs)
def test_collapse_whitespace_matches_str_split(docs: list[str]) -> None:
    """keep_newlines = false equals " ".join(text.split()) (Python's whitespace, reference)."""
    assert run(CollapseWhitespace(), docs) == [" ".join(d.split()) for d in docs]


@settings(max_examples=200, deadline=None)
@given(docs=_docs)
def test_collapse_whitespace_keep_newlines_matches_re(docs: list[str]) -> None:
    """keep_newlines = true equals a re.sub over \\s runs (Python's whitespace, reference)."""

    def ref(text: str) -> str:
        return re.sub(r"\s+", lambda m: "\n" if "\n" in m.group() else " ", text).strip()

    assert run(CollapseWhitespace(keep_newlines=True), docs) == [ref(d) for d in docs]


# ---------------------------------------------------------------------------------------------
# min_length and dedupe


@settings(max_examples=100, deadline=None)
@given(docs=_docs, chars=st.integers(1, 12))
def test_min_length_counts_code_points(docs: list[str], chars: int) -> None:
    """Documents of fewer than N code points go; keep() is the mask apply() uses."""
    step = MinLength(characters=chars)
    assert run(step, docs) == [d for d in docs if len(d) >= chars]
    assert step.keep(pa.array(docs, pa.large_string())).tolist() == [len(d) >= chars for d in docs]


def test_min_length_counts_code_points_not_bytes() -> None:
    """ "字字" is 2 code points (6 UTF-8 bytes); "\U0001f41f" is one."""
    assert run(MinLength(characters=2), ["字字", "\U0001f41f", "ab"]) == ["字字", "ab"]


def test_dedupe_is_a_marker() -> None:
    """dedupe passes documents through and is the only step marked is_dedupe."""
    docs = ["same", "same", "other"]
    assert run(Dedupe(), docs) == docs
    assert [k for k, cls in STEP_KINDS.items() if cls.is_dedupe] == ["dedupe"]


# ---------------------------------------------------------------------------------------------
# all steps: recipe tables and array plumbing

_EXAMPLES = [
    {"kind": "normalize", "form": "NFKC"},
    {"kind": "lowercase", "mode": "casefold"},
    {"kind": "replace", "pattern": r"\d", "replacement": "#"},
    {"kind": "strip_control", "keep": "\n"},
    {"kind": "collapse_whitespace", "keep_newlines": True},
    {"kind": "min_length", "characters": 3},
    {"kind": "dedupe"},
]


@pytest.mark.parametrize("table", _EXAMPLES, ids=[t["kind"] for t in _EXAMPLES])
def test_step_round_trips_through_its_table(table: dict[str, Any]) -> None:
    """parse_step(step.to_dict()) rebuilds the step, and to_dict gives back the table."""
    step = parse_step(table, "recipe.clean[0]")
    assert step.to_dict() == table
    assert parse_step(step.to_dict(), "recipe.clean[0]") == step


@pytest.mark.parametrize("table", _EXAMPLES, ids=[t["kind"] for t in _EXAMPLES])
def test_step_accepts_any_string_array(table: dict[str, Any]) -> None:
    """Empty arrays, pa.string() and chunked input all give a large_string array."""
    step = parse_step(table, "c")
    assert step.apply(pa.array([], pa.large_string())).to_pylist() == []
    small = step.apply(pa.array(["Ab 12", "x"], pa.string()))
    chunked = step.apply(pa.chunked_array([["Ab 12"], ["x"]]))
    assert small.type == chunked.type == pa.large_string()
    assert small.to_pylist() == chunked.to_pylist()


@pytest.mark.parametrize(
    ("table", "key", "shown"),
    [
        ({"kind": "trim"}, "recipe.clean[1].kind", "'normalize', 'lowercase'"),
        ({}, "recipe.clean[1].kind", "missing"),
        ({"kind": "normalize", "form": "nfc"}, "recipe.clean[1].form", "got 'nfc'"),
        ({"kind": "lowercase", "mode": "upper"}, "recipe.clean[1].mode", "'upper'"),
        ({"kind": "min_length", "characters": 0}, "recipe.clean[1].characters", "got 0"),
        ({"kind": "collapse_whitespace", "keep_newlines": "yes"}, "recipe.clean[1].keep_newlines", "'yes'"),
        ({"kind": "strip_control", "keep": 5}, "recipe.clean[1].keep", "5"),
        ({"kind": "dedupe", "by": "hash"}, "recipe.clean[1].by", "unknown key"),
    ],
)
def test_parse_step_errors_name_key_and_value(table: dict[str, Any], key: str, shown: str) -> None:
    """Invalid step tables raise RecipeError naming the key path and the bad value or the choices."""
    with pytest.raises(RecipeError) as info:
        parse_step(table, "recipe.clean[1]")
    assert info.value.key == key
    assert shown in str(info.value)


@settings(max_examples=300, deadline=None)
@given(
    docs=st.lists(st.text(alphabet=st.characters(exclude_categories=("Cs",)), max_size=30), max_size=6),
    mode=st.sampled_from(["lower", "casefold"]),
)
def test_lowercase_fast_path_equals_python(docs: list[str], mode: str) -> None:
    """The Arrow-backed lowercase step gives exactly str.lower / str.casefold on any text."""
    from seqpipe.clean.lowercase import Lowercase

    fn = str.lower if mode == "lower" else str.casefold
    got = Lowercase(mode=mode).apply(pa.array(docs, pa.large_string())).to_pylist()
    assert got == [fn(d) for d in docs]


def test_lowercase_special_cases() -> None:
    """One-to-many and contextual mappings follow Unicode SpecialCasing as Python applies them."""
    # Source: Unicode SpecialCasing.txt (U+0130 -> U+0069 U+0307; final sigma rule), via CPython str.lower
    from seqpipe.clean.lowercase import Lowercase

    got = Lowercase().apply(pa.array(["İstanbul", "ΟΔΟΣ ΟΔΟΣ.", "Straße"], pa.large_string())).to_pylist()
    assert got == ["i\u0307stanbul", "οδος οδος.", "straße"]
    assert Lowercase(mode="casefold").apply(pa.array(["Straße"], pa.large_string())).to_pylist() == ["strasse"]


@pytest.mark.parametrize("fn", [str.lower, str.casefold])
def test_block_scan_finds_every_changed_code_point(fn: Any) -> None:
    """The block-wise scan behind the fast path's unsafe class equals the per-character
    definition over every code point (surrogates excluded), for both mappings."""
    from seqpipe.clean.lowercase import _changed_by

    text = "".join(chr(cp) for cp in range(sys.maxunicode + 1) if not 0xD800 <= cp < 0xE000)
    want = [i for i, ch in enumerate(text) if fn(ch) != ch]
    assert _changed_by(fn, text) == want
    assert _changed_by(fn, text, block=7) == want


def test_arrow_lowers_the_whole_text_as_each_character_alone() -> None:
    """Lowering every code point as one value gives, character for character, what lowering
    each alone gives (the unsafe class is derived from the one-value form)."""
    from seqpipe.clean.lowercase import _all_code_points, _arrow_lower_each, _arrow_lower_one_by_one

    text = _all_code_points()
    assert len(text) == 0x110000 - 0x800
    each = _arrow_lower_each(text)
    assert each == _arrow_lower_one_by_one(text)
    assert each[ord("A")] == "a" and ord("a") not in each
