"""The ``redact`` cleaning step: what each target matches, Luhn, placeholders as one id, build counts."""

from __future__ import annotations

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
from seqpipe.clean.redact import PLACEHOLDERS, Redact, luhn_ok, redact_text
from seqpipe.errors import RecipeError
from seqpipe.recipe import parse_recipe
from seqpipe.tokenizers import parse_tokenizer
from seqpipe.tokenizers.words import WordTokenizer
from seqpipe.vocab import VocabSpec

RESERVED = ["<pad>", "<unk>", "<bos>", "<eos>", "<email>", "<ip>", "<card>", "<phone>"]


def only(target: str, text: str) -> tuple[str, int]:
    out, counts = redact_text(text, (target,))
    return out, counts[target]


# -- Luhn ------------------------------------------------------------------------------------------

# Numbers card networks publish for testing payment forms (from memory); all pass the Luhn check.
PUBLISHED_TEST_CARDS = [
    "4111111111111111",  # Visa
    "4012888888881881",  # Visa
    "4222222222222",  # Visa, 13 digits
    "5555555555554444",  # Mastercard
    "5105105105105100",  # Mastercard
    "378282246310005",  # American Express, 15 digits
    "371449635398431",  # American Express
    "6011111111111117",  # Discover
    "6011000990139424",  # Discover
    "3530111333300000",  # JCB
    "30569309025904",  # Diners Club, 14 digits
]


@pytest.mark.parametrize("number", PUBLISHED_TEST_CARDS)
def test_luhn_accepts_published_test_card_numbers(number: str) -> None:
    """Every published test card number passes the Luhn check and is redacted as a card."""
    assert luhn_ok(number)
    spaced = " ".join(number[i : i + 4] for i in range(0, len(number), 4))
    assert only("card", f"paid with {spaced}.") == ("paid with <card>.", 1)
    assert only("card", f"paid with {number}") == ("paid with <card>", 1)


@pytest.mark.parametrize("number", PUBLISHED_TEST_CARDS)
def test_luhn_rejects_every_single_digit_change(number: str) -> None:
    """Changing the last digit to any other value fails the check (Luhn catches single-digit errors)."""
    for d in "0123456789":
        if d != number[-1]:
            changed = number[:-1] + d
            assert not luhn_ok(changed)
            assert only("card", changed) == (changed, 0)


def test_luhn_worked_example() -> None:
    """79927398713 is the worked example usually given for the check (from memory); 79927398710 fails."""
    assert luhn_ok("79927398713") and not luhn_ok("79927398710")


def test_card_needs_13_to_19_digits_and_clean_edges() -> None:
    """Luhn-valid runs outside 13-19 digits, or inside a longer digit run, are not cards."""
    assert only("card", "ref 79927398713")[1] == 0  # 11 digits
    assert only("card", "x 04111111111111111111")[1] == 0  # 20 digits
    assert only("card", "4111-1111-1111-1111")[1] == 1
    assert only("card", "4111--1111-1111-1111")[1] == 0  # separators are single


# -- e-mail ------------------------------------------------------------------------------------------

VALID_EMAILS = [
    "tickets@harbour-office.example",
    "first.last@river.example",  # dot-atom (RFC 5322 section 3.2.3)
    "a+b_c-d@sub.ferry.example",
    "o'neil@quay.example",  # ' is atext (RFC 5322 section 3.2.3)
    "x!#$%&*/=?^`{|}~@a.example",
    "crew@x1.example",  # a label may start with a digit (RFC 5321 section 4.1.2 Let-dig)
]
INVALID_EMAILS = [
    "a..b@river.example",  # consecutive dots: not a dot-atom
    ".a@river.example",  # leading dot
    "crew@localhost",  # single-label domain: outside our subset
    "crew@-quay.example",  # a label cannot start with a hyphen (RFC 5321 section 4.1.2 Ldh-str)
    '"quoted"@river.example',  # quoted-string local part: outside our subset
    "crew@[192.0.2.1]",  # address literal: outside our subset (the IP is still redacted as ip)
    "a" * 65 + "@river.example",  # local part over 64 octets (RFC 5321 section 4.5.3.1.1)
]


@pytest.mark.parametrize("address", VALID_EMAILS)
def test_email_in_the_subset_is_replaced_whole(address: str) -> None:
    """Addresses of the documented subset become one placeholder, punctuation around them kept."""
    assert only("email", f"write to {address}, or call.") == ("write to <email>, or call.", 1)


@pytest.mark.parametrize("address", INVALID_EMAILS)
def test_email_outside_the_subset_is_not_replaced_whole(address: str) -> None:
    """Forms outside the subset are never replaced as a whole address."""
    out, _ = only("email", f"write to {address} now")
    assert out != "write to <email> now"


# -- IP addresses ------------------------------------------------------------------------------------

# RFC 4291 section 2.2: the preferred form, "::" compression, and the mixed form with IPv4.
VALID_IPV6 = [
    "ABCD:EF01:2345:6789:ABCD:EF01:2345:6789",  # 2.2 form 1
    "2001:DB8:0:0:8:800:200C:417A",  # 2.2 form 1, leading zeros left out
    "2001:DB8::8:800:200C:417A",  # 2.2 form 2
    "FF01::101",  # 2.2 form 2, multicast
    "::1",  # 2.2 form 2, loopback
    "fe80::",  # trailing "::"
    "0:0:0:0:0:0:13.1.68.3",  # 2.2 form 3
    "::13.1.68.3",  # 2.2 form 3 compressed
    "::FFFF:129.144.52.38",  # 2.2 form 3 compressed (IPv4-mapped)
    "2001:db8:1:2:3:4:5::",
]
INVALID_IPV6 = [
    "2001:db8::1::2",  # "::" may appear only once (2.2 point 2)
    "1:2:3:4:5:6:7:8:9",  # nine groups
    "2001:db8:12345::1",  # a group has at most four hex digits
    "::",  # the unspecified address alone: left on purpose (module docstring)
]


@pytest.mark.parametrize("address", VALID_IPV6)
def test_ipv6_text_forms_are_replaced(address: str) -> None:
    """Every RFC 4291 section 2.2 text form becomes one placeholder."""
    assert only("ip", f"from {address} at dawn") == ("from <ip> at dawn", 1)


@pytest.mark.parametrize("address", INVALID_IPV6)
def test_ipv6_invalid_forms_are_not_replaced_whole(address: str) -> None:
    """Strings that are not RFC 4291 addresses are never replaced as one whole address."""
    out, _ = only("ip", f"from {address} at dawn")
    assert out != "from <ip> at dawn"


@pytest.mark.parametrize(
    ("text", "count"),
    [
        ("host 192.0.2.44 up", 1),  # RFC 5737 documentation range
        ("host 255.255.255.255 up", 1),
        ("host 256.1.1.1 up", 0),  # octet over 255 (RFC 3986 section 3.2.2 dec-octet)
        ("host 01.2.3.4 up", 0),  # leading zero (dec-octet)
        ("version 1.2.3.4.5", 0),  # a longer dotted run is not an address
        ("at 12:30:45 sharp", 0),  # a time is not IPv6
    ],
)
def test_ipv4_dotted_decimal(text: str, count: int) -> None:
    """IPv4 addresses follow RFC 3986 dec-octet; near misses stay."""
    assert only("ip", text)[1] == count


# -- phone numbers -----------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "count"),
    [
        ("call +44 1632 960123 now", 1),
        ("call +1 555 010 0199 now", 1),
        ("call (555) 010-0199 now", 1),
        ("call 0161 496 0123 now", 1),
        ("sailed 2026-12-04 at noon", 0),  # date shaped
        ("sailed 04.12.2026 at noon", 0),  # date shaped
        ("years 1990-2000", 0),  # two groups: not told from a range
        ("crew of 12 34 56", 0),  # six digits: too short for a number
        ("ticket 1234567", 0),  # a plain run of digits is not phone-like
    ],
)
def test_phone_like_runs(text: str, count: int) -> None:
    """Phone-like runs (documented shapes, 7-15 digits) are replaced; dates, ranges, plain numbers stay."""
    assert only("phone", text)[1] == count


def test_all_targets_together_in_fixed_order() -> None:
    """A card is taken before it could look like a phone; an e-mail's digits are not a phone."""
    text = "crew42@quay.example paid 4111 1111 1111 1111 from 192.0.2.9, call +44 1632 960123"
    out, counts = redact_text(text)
    assert out == "<email> paid <card> from <ip>, call <phone>"
    assert counts == {"email": 1, "ip": 1, "card": 1, "phone": 1}


# -- the step ----------------------------------------------------------------------------------------


def test_step_round_trips_and_counts() -> None:
    """The step rebuilds from its table; apply_counted counts per chosen target and leaves the rest."""
    table: dict[str, Any] = {"kind": "redact", "targets": ["email", "phone"]}
    step = parse_step(table, "recipe.clean[0]")
    assert step.to_dict() == table and parse_step(step.to_dict(), "c") == step
    assert isinstance(step, Redact)
    docs = pa.array(["a@b.example and 192.0.2.1", "nothing here", "+44 1632 960123"], pa.string())
    out, counts = step.apply_counted(docs)
    assert out.to_pylist() == ["<email> and 192.0.2.1", "nothing here", "<phone>"]
    assert counts == {"email": 1, "phone": 1}
    assert step.apply(docs).to_pylist() == out.to_pylist()


@pytest.mark.parametrize("targets", [[], ["mail"], ["ip", "ip"]])
def test_step_refuses_bad_targets(targets: list[str]) -> None:
    """targets must be distinct known names; the error names the key."""
    with pytest.raises(RecipeError) as info:
        parse_step({"kind": "redact", "targets": targets}, "recipe.clean[2]")
    assert info.value.key == "recipe.clean[2].targets"


RECIPE = """
[[sources]]
kind = "text"
paths = ["*.txt"]

[[clean]]
kind = "redact"

[tokenizer]
kind = "{kind}"
{literal}

[vocabulary]
reserved = {reserved}
{extra}

[splits]
train = 1.0
validation = 0.0
test = 0.0
"""


def recipe_for(kind: str, *, literal: bool = True, reserved: list[str] = RESERVED) -> str:
    extra = "cap = 400" if kind == "bpe" else ""
    return RECIPE.format(
        kind=kind,
        literal="literal_reserved = true" if literal else "",
        reserved=json.dumps(reserved),
        extra=extra,
    )


def test_recipe_requires_placeholders_reserved_and_literal() -> None:
    """A redact recipe names what to add when placeholders are not reserved or not literal."""
    with pytest.raises(RecipeError) as info:
        parse_recipe(recipe_for("words", reserved=RESERVED[:4]))
    assert info.value.key == "recipe.vocabulary.reserved" and "<email>" in str(info.value)
    with pytest.raises(RecipeError) as info:
        parse_recipe(recipe_for("words", literal=False))
    assert info.value.key == "recipe.tokenizer.literal_reserved"
    assert parse_recipe(recipe_for("chars")).tokenizer.reserved_names == tuple(RESERVED)  # type: ignore[attr-defined]


@pytest.mark.parametrize("kind", ["words", "chars", "bytes", "bpe"])
def test_placeholder_is_one_reserved_id_for_every_tokenizer(kind: str) -> None:
    """With literal_reserved, each placeholder encodes as exactly its reserved id, whatever the kind."""
    recipe = parse_recipe(recipe_for(kind))
    tok = recipe.tokenizer
    text = "paid <card> then wrote <email>."
    seg = tok.segment([text, "plain"])
    keys = seg.keys.to_pylist()
    counts = pa.table({"key": seg.keys, "count": pa.array(np.bincount(seg.codes, minlength=len(keys)), pa.int64())})
    enc = tok.fit(counts, recipe.vocabulary)
    ids = enc.encode(text).tolist()
    for name in ("<card>", "<email>"):
        assert ids.count(RESERVED.index(name)) == 1
    assert enc.vocabulary.tokens.to_pylist().count(b"<card>") == 1  # reserved only, not counted again
    assert enc.decode(ids, show_reserved=True).replace(" ", "") == text.replace(" ", "")


def test_literal_reserved_leaves_other_text_as_before() -> None:
    """Around the names, literal segmentation gives exactly the tokens of the text without them."""
    for kind in ("words", "chars", "bytes"):
        plain = parse_tokenizer({"kind": kind}, "t")
        literal = parse_tokenizer({"kind": kind, "literal_reserved": True, "reserved_names": ["<ip>"]}, "t")
        texts = ["from <ip> to<ip>x", "", "no names", "<ip>"]
        got = literal.segment(texts)
        ref = plain.segment([t.replace("<ip>", "\x00") for t in texts])
        got_tokens = [got.keys[int(c)].as_py() for c in got.codes]
        ref_tokens = [ref.keys[int(c)].as_py() for c in ref.codes]
        assert [b"\x00" if t == b"<ip>" else t for t in got_tokens] == ref_tokens, kind


def test_build_summary_counts_redactions(tmp_path: Path) -> None:
    """A build of a redacting recipe reports per-target counts in the manifest summary and the text summary."""
    from seqpipe import build

    (tmp_path / "log.txt").write_text(
        "Ferry office: tickets@harbour-office.example or +44 1632 960123.\n\n"
        "Deck radio at 192.0.2.7 and fe80::7; paid 4111 1111 1111 1111.\n\n"
        "Mail the purser at purser@harbour-office.example.\n",
        encoding="utf-8",
    )
    (tmp_path / "r.toml").write_text(recipe_for("words"), encoding="utf-8")
    from seqpipe.recipe import load_recipe

    result = build(load_recipe(tmp_path / "r.toml"), tmp_path / "out", workers=1, progress=False)
    summary = result.manifest["summary"]
    assert summary["redacted"] == {"email": 2, "ip": 2, "card": 1, "phone": 1}
    assert any("redacted email: 2" in line for line in result.summary_lines())


def test_placeholders_follow_targets() -> None:
    """The step's placeholders are those of its targets, in order."""
    assert Redact(targets=("card", "ip")).placeholders == (PLACEHOLDERS["card"], PLACEHOLDERS["ip"])
    assert VocabSpec(reserved=tuple(RESERVED)).reserved[4:] == Redact().placeholders


_ALL_SAMPLES = [
    *(f"write to {a}, or call." for a in VALID_EMAILS),
    *(f"from {a} at dawn" for a in VALID_IPV6),
    "host 192.0.2.44 up",
    "call +44 1632 960123 now",
    "call (555) 010-0199 now",
    "call 0161 496 0123 now",
    "paid 4111-1111-1111-1111 at the quay",
    "crew of 12 34 56, ticket 1234567, at 12:30:45 sharp",
    "mate@quay.example:2001:db8::1 then 1.2.mate@quay.example.3.4 and +mate@quay.example44 1632 960123",
    "4111 1111 1111 1111@pier.example and 192.0.2.1:ab:cd: +44 (0161) 496 0123",
]


@pytest.mark.parametrize("targets", [("email",), ("ip",), ("card",), ("phone",), ("email", "ip", "card", "phone")])
def test_batch_prefilter_skips_no_document_that_would_change(targets: tuple[str, ...]) -> None:
    """The batch-wide RE2 hint is only a shortcut: the step equals redact_text run on every document."""
    docs = [*_ALL_SAMPLES, "a quiet crossing", "", "ferry 7 at 9"]
    out, counts = Redact(targets=targets).apply_counted(pa.array(docs, pa.large_string()))
    expected = [redact_text(d, targets) for d in docs]
    assert out.to_pylist() == [e[0] for e in expected]
    assert counts == {t: sum(e[1][t] for e in expected) for t in targets}
    assert any(e[0] != d for e, d in zip(expected, docs, strict=True))


@pytest.mark.parametrize("kind", ["words", "chars", "bytes"])
def test_batch_with_and_without_placeholders_segments_like_each_document_alone(kind: str) -> None:
    """In a batch mixing documents with and without placeholders, each document's pieces are the
    ones it gets when segmented alone (documents without a name are not split in Python)."""
    from seqpipe.tokenizers._common import segment_with_reserved

    tok = parse_tokenizer({"kind": kind, "literal_reserved": True}, "tokenizer")
    names = ("<email>", "<ip>")
    docs = ["ferry at 9.", "<email> wrote", "", "a<ip>b<email>", "quay é ok", "<ip>"]

    def pieces(batch: list[str]) -> list[list[bytes]]:
        seg = segment_with_reserved(tok._segment, pa.array(batch, pa.large_string()), names)  # type: ignore[attr-defined]
        keys = seg.keys.to_pylist()
        flat = [keys[c] for c in seg.codes.tolist()]
        bounds = np.cumsum([0, *seg.doc_lengths.tolist()])
        return [flat[bounds[i] : bounds[i + 1]] for i in range(len(batch))]

    assert pieces(docs) == [pieces([d])[0] for d in docs]
    assert [b"<email>"] in [p[:1] for p in pieces(docs)]


def test_names_with_pattern_characters_are_found_as_literal_text() -> None:
    """The one-pass search for reserved names treats each name as literal text (punctuation,
    spaces and non-ASCII letters included), finding exactly the documents a plain search finds."""
    from seqpipe.tokenizers._common import _holding_a_name

    names = ("[x]", "a.b", "(q)*", "\\E", "¿é?", "<ip> x", "|")
    docs = ["a.b", "axb", "[x]", "x", "(q)*", "(qq)", "\\E", "E", "¿é?", "é", "<ip> x", "<ip>x", "a|b", "ab", ""]
    plain = [any(n in d for n in names) for d in docs]
    assert _holding_a_name(pa.array(docs, pa.large_string()), names).tolist() == plain
    assert plain.count(True) == 7


@settings(max_examples=300, deadline=None)
@given(
    text=st.lists(
        st.sampled_from(["::", ":", "a", "F", "1", "12", "255", "192.0.2.", ".", " ", "+", "(", ")", "-", "0", "x"]),
        max_size=30,
    ).map("".join)
)
def test_first_character_lookahead_changes_no_match(text: str) -> None:
    """The ip and phone patterns as compiled (with a lookahead for their first character) find
    exactly the spans of the patterns as written."""
    from seqpipe.clean.redact import _COMPILED, _IP, _PHONE

    for target, pattern in (("ip", _IP), ("phone", _PHONE)):
        plain = [m.span() for m in regex.finditer(pattern, text)]
        assert [m.span() for m in _COMPILED[target].finditer(text)] == plain


@settings(max_examples=300, deadline=None)
@given(text=st.lists(st.sampled_from([*"ab.-_+@ 1\nx", "a" * 30, "@b.cd", "x@y.z", "é"]), max_size=40).map("".join))
def test_email_search_from_the_next_at_sign_equals_a_full_scan(text: str) -> None:
    """Searching for e-mail addresses from 64 characters before each "@" gives the same text and count
    as the pattern's own scan of the whole text (local parts up to and past 64 characters included)."""
    from seqpipe.clean.redact import _COMPILED, _email_subn

    assert _email_subn(text, "<email>") == _COMPILED["email"].subn("<email>", text)


@settings(max_examples=300, deadline=None)
@given(
    docs=st.lists(
        st.lists(
            st.sampled_from(
                [*"0123456789", ".", " ", "-", ":", "@", "+", "(", ")", "a", "F", "é", "1234", "4111 1111 "]
            ),
            max_size=40,
        ).map("".join),
        max_size=6,
    )
)
def test_byte_prefilter_marks_every_document_a_hint_matches(docs: list[str]) -> None:
    """The numpy byte prefilter is a necessary condition: every document in which the regex
    engine finds a chosen target's hint is marked for that target (with each target alone and
    all together, as ``hinted``'s column and as ``may_hint``)."""
    from seqpipe.clean.redact import _HINTS, TARGETS, hinted, may_hint

    arr = pa.array(docs, pa.large_string())
    for targets in [*((t,) for t in TARGETS), TARGETS, ("phone", "card")]:
        marked = may_hint(arr, targets)
        flags = hinted(arr, targets)
        assert flags.shape == (len(docs), len(targets))
        for doc, mark, row in zip(docs, marked, flags, strict=True):
            holds = [regex.search(_HINTS[t], doc) is not None for t in targets]
            assert mark == row.any(), (targets, doc)
            assert all(f or not h for f, h in zip(row, holds, strict=True)), (targets, doc, row, holds)


@pytest.mark.parametrize(
    ("text", "target", "expected"),
    [
        # card hint: 13 digits, at most one space or dash between neighbours (common practice
        # for the printed groups of ISO/IEC 7812 numbers)
        ("4111 1111 1111 1", "card", True),
        ("4111 1111 1111 ", "card", False),  # 12 digits
        ("4111  1111 1111 1", "card", False),  # two spaces between two digits
        ("4111.1111-1111-1", "card", False),  # a dot is no card separator
        # phone's third alternative: digit, separator, 2-4 digits, separator, digit
        ("0161 496 0123", "phone", True),
        ("1 2345 6", "phone", True),
        ("1 23456 7", "phone", False),  # five digits in the middle group
        ("1 2 34", "phone", False),  # one digit in the middle group
        ("7 12,5", "phone", False),  # a comma is no separator
        ("x+4", "phone", True),
        ("(5", "phone", True),
        ("x@y", "email", True),
        ("x@-y", "email", False),
        ("1.22.3.4", "ip", True),
        ("a:bc:d", "ip", True),
        ("a:bcdef:", "ip", False),  # six characters between the colons
    ],
)
def test_byte_prefilter_on_worked_examples(text: str, target: str, expected: bool) -> None:
    """Hand-made documents around each hint's edges, alone in a batch (where nothing after the
    text can add a needless mark) and between two plain documents; the regex engine agrees."""
    from seqpipe.clean.redact import _HINTS, hinted

    assert (regex.search(_HINTS[target], text) is not None) == expected
    for docs in ([text], ["plain words", text, "more plain words"]):
        flags = hinted(pa.array(docs, pa.large_string()), (target,))[:, 0]
        assert flags[docs.index(text)] == expected, docs
        assert not flags[[i for i, d in enumerate(docs) if d != text]].any()


def test_byte_prefilter_never_marks_a_null_document() -> None:
    """A null document is never matched (its bytes, if any, are no text)."""
    from seqpipe.clean.redact import TARGETS, hinted

    arr = pa.array(["x@y.example", None, "call 0161 496 0123"], pa.large_string())
    assert hinted(arr, TARGETS).any(axis=1).tolist() == [True, False, True]


@settings(max_examples=200, deadline=None)
@given(
    docs=st.lists(
        st.lists(st.sampled_from(["<email>", "<ip>", "<ip", "a", " ", "é", "\n", "9", "<", "x.y"]), max_size=12).map(
            "".join
        ),
        max_size=6,
    ),
    offset=st.integers(0, 2),
)
def test_byte_cut_at_names_equals_the_string_split(docs: list[str], offset: int) -> None:
    """Cutting the batch's bytes at the names gives the fragments and items of the per-document
    regex split, keeps as many bytes as lie outside the names, and the words kind's segments (its
    byte classes carried over from the whole batch) equal those found on the fragments anew."""
    from seqpipe.tokenizers import _common, words

    names = ("<email>", "<ip>", "<phone>")
    texts = pa.array(["pad"] * offset + docs, pa.large_string()).slice(offset)  # a non-zero array offset
    holds = _common._holding_a_name(texts, names)
    old = _common._split_at_names(texts, holds, names)
    new = _common._cut_at_names(texts, holds, names)
    assert new[0].to_pylist() == old[0].to_pylist()
    assert new[1].tolist() == old[1].tolist() and new[2].tolist() == old[2].tolist()
    assert int(np.diff(new[3], axis=1).sum()) == sum(len(f.encode()) for f in old[0].to_pylist())
    tok = WordTokenizer(literal_reserved=True, reserved_names=names)
    if docs:  # (an empty batch is never segmented in a build)
        words.count_words(texts)  # as a build does first: the batch's byte classes are the last ones kept
    seeded = tok.segment(texts)
    plain = _common.segment_with_reserved(tok._segment, texts, names)  # no seed: classes found anew
    assert seeded.keys.to_pylist() == plain.keys.to_pylist()
    assert seeded.codes.tolist() == plain.codes.tolist()
    assert seeded.doc_lengths.tolist() == plain.doc_lengths.tolist()


@pytest.mark.parametrize("targets", [("email",), ("ip",), ("card", "phone"), ("email", "ip", "card", "phone")])
def test_step_does_not_depend_on_what_scratch_arrays_held(targets: tuple[str, ...]) -> None:
    """With this thread's scratch buffers (the byte scan's arrays) filled with random bytes after
    a larger batch, the step still equals redact_text run on every document."""
    from seqpipe.clean import _quality

    docs = [*_ALL_SAMPLES, "a quiet crossing", "", "ferry 7 at 9"]
    Redact(targets=targets).apply_counted(pa.array([d * 5 for d in docs], pa.large_string()))
    rng = np.random.default_rng(len(targets))
    for buffer in _quality._SCRATCH.buffers.values():
        buffer[:] = rng.integers(0, 256, len(buffer), dtype=np.uint8)
    out, counts = Redact(targets=targets).apply_counted(pa.array(docs, pa.large_string()))
    expected = [redact_text(d, targets) for d in docs]
    assert out.to_pylist() == [e[0] for e in expected]
    assert counts == {t: sum(e[1][t] for e in expected) for t in targets}
