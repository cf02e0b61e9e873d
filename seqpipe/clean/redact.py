"""``kind = "redact"``: replace personal contact details with reserved placeholder tokens.

What counts as each target (a help against accidental leaks, not a guarantee; the README
lists what it does not catch):

``email``
    ``local@domain`` where ``local`` is an RFC 5322 section 3.2.3 ``dot-atom-text`` of at most
    64 octets (RFC 5321 section 4.5.3.1.1) and ``domain`` is an RFC 5321 section 4.1.2
    ``Domain`` of at least two labels (letters, digits, inner hyphens; labels of at most 63
    octets). Not matched: quoted local parts, address literals (``[192.0.2.1]``), comments,
    internationalized addresses (RFC 6531), single-label domains.
``ip``
    IPv4 dotted decimal with octets 0-255 and no leading zeros (RFC 3986 section 3.2.2
    ``dec-octet``), and every IPv6 text form of RFC 4291 section 2.2: eight groups, ``::``
    compression, and a trailing embedded IPv4 address. The bare unspecified address ``::``
    is left alone (it names no host and is common punctuation in code).
``card``
    13 to 19 digits, single spaces or dashes allowed between them, that pass the Luhn check
    (ISO/IEC 7812-1 annex B).
``phone``
    7 to 15 digits (ITU-T E.164 allows at most 15) written either after a ``+`` country code,
    with an area code in parentheses, or in at least three groups separated by spaces, dots or
    dashes. Runs shaped like dates (``2026-12-04``, ``04.12.2026``) are left, and so are
    two-group runs (``555-0134`` cannot be told from a range such as ``1990-2000``).

Each match becomes its target's placeholder (``<email>``, ``<ip>``, ``<card>``, ``<phone>``).
A recipe with this step must list the placeholders in ``[vocabulary] reserved`` and set
``[tokenizer] literal_reserved = true`` so each placeholder is one id whatever the tokenizer
(checked by :class:`seqpipe.recipe.Recipe`). Matching runs once per document (the ``regex``
module, in C) and only on documents that a numpy pass over the batch's bytes finds holding a
necessary part of some target (``_HINTS``), and there only for the targets whose part it holds.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, ClassVar, Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import regex

from seqpipe._parse import parse_str_tuple
from seqpipe.clean._quality import scratch, utf8_buffers
from seqpipe.clean.base import CleanStep, as_documents
from seqpipe.errors import RecipeError

TARGETS: Final = ("email", "ip", "card", "phone")
PLACEHOLDERS: Final[dict[str, str]] = {t: f"<{t}>" for t in TARGETS}

# RFC 5322 section 3.2.3 atext
_ATEXT: Final = r"A-Za-z0-9!#$%&'*+/=?^_`{|}~\-"
_LABEL: Final = r"[A-Za-z0-9](?:[A-Za-z0-9-]{0,61}[A-Za-z0-9])?"
_EMAIL: Final = (
    rf"(?<![{_ATEXT}.])(?=[{_ATEXT}.]{{1,64}}@)[{_ATEXT}]+(?:\.[{_ATEXT}]+)*"
    rf"@(?:{_LABEL}\.)+{_LABEL}(?![A-Za-z0-9-])"
)

# RFC 3986 section 3.2.2 dec-octet / IPv4address / IPv6address (which spells out RFC 4291 2.2)
_OCTET: Final = r"(?:25[0-5]|2[0-4][0-9]|1[0-9]{2}|[1-9][0-9]|[0-9])"
_IPV4: Final = rf"{_OCTET}(?:\.{_OCTET}){{3}}"
_H16: Final = r"[0-9A-Fa-f]{1,4}"
_LS32: Final = rf"(?:{_IPV4}|{_H16}:{_H16})"
_IPV6_FORMS: Final = (
    rf"(?:{_H16}:){{6}}{_LS32}",
    rf"::(?:{_H16}:){{5}}{_LS32}",
    rf"(?:{_H16})?::(?:{_H16}:){{4}}{_LS32}",
    rf"(?:(?:{_H16}:){{0,1}}{_H16})?::(?:{_H16}:){{3}}{_LS32}",
    rf"(?:(?:{_H16}:){{0,2}}{_H16})?::(?:{_H16}:){{2}}{_LS32}",
    rf"(?:(?:{_H16}:){{0,3}}{_H16})?::{_H16}:{_LS32}",
    rf"(?:(?:{_H16}:){{0,4}}{_H16})?::{_LS32}",
    rf"(?:(?:{_H16}:){{0,5}}{_H16})?::{_H16}",
    rf"(?:(?:{_H16}:){{0,6}}{_H16})::",  # at least one group: a bare "::" is left
)
_IP: Final = r"(?<![0-9A-Za-z_:.])(?:" + "|".join(_IPV6_FORMS) + rf"|{_IPV4})" + r"(?![0-9A-Za-z_:]|\.[0-9])"

_CARD: Final = r"(?<![0-9][ -]?)[0-9](?:[ -]?[0-9]){12,18}(?![ -]?[0-9])"

_SEP: Final = r"[ .\-]"
_PHONE: Final = (
    r"(?<![0-9A-Za-z_+(])"
    rf"(?:\+[0-9]{{1,3}}{_SEP}?(?:\([0-9]{{1,4}}\){_SEP}?)?[0-9]{{1,4}}(?:{_SEP}?[0-9]{{1,4}}){{1,5}}"
    rf"|\([0-9]{{1,4}}\){_SEP}?[0-9]{{2,4}}(?:{_SEP}[0-9]{{2,4}}){{1,4}}"
    rf"|[0-9]{{2,5}}(?:{_SEP}[0-9]{{2,4}}){{2,4}})"
    r"(?![0-9A-Za-z_]|[.\-][0-9])"
)
_DATE: Final = regex.compile(r"[0-9]{4}([.\-])[0-9]{1,2}\1[0-9]{1,2}|[0-9]{1,2}([.\-])[0-9]{1,2}\2[0-9]{4}")

# Per target, a pattern every match of the target's pattern contains (a necessary
# condition, looser than the pattern): documents matching none of the chosen targets' hints
# cannot change, so only the others go through the Python-level matching below.
#   email: the "@" and the first character of the domain's first label;
#   ip: IPv4 is four dotted decimal groups; every IPv6 form (with at least one group) has two
#       colons with at most four hexadecimal digits between them;
#   card: 13 digits with at most one space or dash between neighbours;
#   phone: the three alternatives begin "+digit", "(digit" or hold digit, separator, 2-4 digits,
#       separator, digit.
# :func:`hinted` finds them (or a little more) over the batch's bytes with numpy; the patterns
# here are their definition, which the tests check it against.
_HINTS: Final[dict[str, str]] = {
    "email": r"@[A-Za-z0-9]",
    "ip": r"[0-9]\.[0-9]{1,3}\.[0-9]{1,3}\.[0-9]|:[0-9A-Fa-f]{0,4}:",
    "card": r"[0-9](?:[ -]?[0-9]){12}",
    "phone": r"\+[0-9]|\([0-9]|[0-9][ .\-][0-9]{2,4}[ .\-][0-9]",
}


def _byte(data: np.ndarray, at: np.ndarray, k: int) -> np.ndarray:
    """The byte ``k`` after each position of ``at`` (clipped to ``data``: a byte read past an end
    is the byte at that end, which can only add a needless mark)."""
    where = np.minimum(at + k, len(data) - 1) if k > 0 else np.maximum(at + k, 0)
    out: np.ndarray = np.take(data, where)
    return out


def _is_digit(b: np.ndarray) -> np.ndarray:
    out: np.ndarray = np.subtract(b, ord("0"), dtype=np.uint8) < 10
    return out


def _is_one_of(b: np.ndarray, chars: bytes) -> np.ndarray:
    """Per byte: whether it is one of ``chars`` (a compare per character; np.isin sorts)."""
    out: np.ndarray = np.zeros(len(b), dtype=bool)
    for c in chars:
        out |= b == c
    return out


def _is_sep(b: np.ndarray) -> np.ndarray:
    return _is_one_of(b, b" .-")


def _followed(data: np.ndarray, at: np.ndarray, k: int, test: Callable[[np.ndarray], np.ndarray]) -> np.ndarray:
    """The positions of ``at`` whose byte ``k`` after passes ``test``."""
    out: np.ndarray = at[test(_byte(data, at, k))]
    return out


def _email_at(data: np.ndarray, at_sign: np.ndarray) -> np.ndarray:
    """The "@" followed by an ASCII letter or digit."""
    after = _byte(data, at_sign, 1)
    ok = np.subtract(after | np.uint8(0x20), ord("a"), dtype=np.uint8) < 26
    ok |= _is_digit(after)
    out: np.ndarray = at_sign[ok]
    return out


def _card_at(data: np.ndarray, digit: np.ndarray) -> np.ndarray:
    """The first of 13 digits in a row with at most one space or dash between neighbours."""
    if len(digit) < 13:
        return digit[:0]
    gap = np.diff(digit)
    ok = gap == 1  # next to each other, or one space or dash between
    two = np.flatnonzero(gap == 2)
    ok[two] = _is_one_of(np.take(data, digit[two] + 1), b" -")
    run = np.zeros(len(ok) + 1, dtype=np.int32)
    np.cumsum(ok, out=run[1:])
    out: np.ndarray = digit[: len(digit) - 12][run[12:] - run[:-12] == 12]
    return out


def _phone_at(data: np.ndarray, digit: np.ndarray, after: np.ndarray) -> np.ndarray:
    """The digits after "+" or "(", and those followed by a separator, two to four digits, a
    separator and a digit (``after``: the byte after each digit). Each next byte is read only
    at the positions that passed the ones before."""
    lead = _followed(data, digit, -1, lambda b: _is_one_of(b, b"+("))
    two = digit[_is_one_of(after, b" .-")]
    two = _followed(data, _followed(data, two, 2, _is_digit), 3, _is_digit)
    found = [lead]
    for size in (2, 3, 4):  # the middle group's digits
        found.append(_followed(data, _followed(data, two, 2 + size, _is_sep), 3 + size, _is_digit))
        if size < 4:
            two = _followed(data, two, 2 + size, _is_digit)
    return np.concatenate(found)


def hinted(docs: pa.Array, targets: tuple[str, ...]) -> np.ndarray:
    """Per document (rows) and target of ``targets`` (columns): False when the document surely
    holds no match of the target's hint (``_HINTS``), found over the batch's UTF-8 bytes with
    numpy. One scan marks the bytes the hints start from (digits, "@", ":"); email is then an
    "@" and a letter or digit; ip a digit, "." and a digit, or two ":" at most five bytes apart;
    card and phone exactly their hints. A hint found across two documents marks one of them
    needlessly, never misses one; a null document is never marked."""
    data, offsets = utf8_buffers(docs)
    wants_digits = bool({"ip", "card", "phone"} & set(targets))
    # the byte-sized arrays in this thread's scratch buffers (see _quality.scratch)
    scan = scratch("bytes.1", len(data), np.bool_)
    if wants_digits:
        shifted = scratch("bytes.2", len(data), np.uint8)
        np.subtract(data, np.uint8(ord("0")), out=shifted, dtype=np.uint8)
        np.less(shifted, np.uint8(10), out=scan)
    else:
        scan[:] = False
    for char, target in (("@", "email"), (":", "ip")):
        if target in targets:
            mark = scratch("bytes.2", len(data), np.bool_)
            np.equal(data, np.uint8(ord(char)), out=mark)
            scan |= mark
    found = np.flatnonzero(scan)
    value = np.take(data, found)
    digit = found[np.subtract(value, ord("0"), dtype=np.uint8) < 10] if wants_digits else found[:0]
    after = _byte(data, digit, 1)
    out = np.zeros((len(docs), len(targets)), dtype=bool)
    for column, target in enumerate(targets):
        if target == "email":
            at = _email_at(data, found[value == ord("@")])
        elif target == "ip":
            colon = found[value == ord(":")]
            dotted = _followed(data, digit[after == ord(".")], 2, _is_digit)
            at = np.concatenate([colon[:-1][np.diff(colon) <= 5], dotted])
        elif target == "card":
            at = _card_at(data, digit)
        else:
            at = _phone_at(data, digit, after)
        out[np.searchsorted(offsets, at, side="right") - 1, column] = True
    if docs.null_count:
        out &= np.asarray(docs.is_valid().to_numpy(zero_copy_only=False), dtype=bool)[:, None]
    return out


def may_hint(docs: pa.Array, targets: tuple[str, ...]) -> np.ndarray:
    """Per document: False when it surely matches none of the ``targets``' hints (``_HINTS``)."""
    out: np.ndarray = np.any(hinted(docs, targets), axis=1)
    return out


# Every IP match starts with ":" or with one to four hexadecimal digits and then ":" or "." (an
# IPv4 octet, or an IPv6 group), every phone match with a digit, "+" or "(": a lookahead for that
# start, put before the patterns' own lookbehind (lookarounds at one position commute), lets the
# engine pass over other positions (such as the hexadecimal letters of words) at once. It changes
# no match.
_FIRST: Final[dict[str, str]] = {"ip": "(?=[0-9A-Fa-f]{1,4}[:.]|:)", "phone": "(?=[0-9+(])"}

_COMPILED: Final[dict[str, Any]] = {
    "email": regex.compile(_EMAIL),
    "ip": regex.compile(_FIRST["ip"] + _IP),
    "card": regex.compile(_CARD),
    "phone": regex.compile(_FIRST["phone"] + _PHONE),
}


def luhn_ok(digits: str) -> bool:
    """Whether a string of ASCII digits passes the Luhn check (ISO/IEC 7812-1 annex B)."""
    values = np.frombuffer(digits.encode("ascii"), dtype=np.uint8).astype(np.int64) - 48
    doubled = values[::-1].copy()
    doubled[1::2] *= 2
    doubled[doubled > 9] -= 9
    return bool(len(values)) and int(doubled.sum()) % 10 == 0


def _card_digits_ok(text: str) -> bool:
    digits = text.replace(" ", "").replace("-", "")
    return 13 <= len(digits) <= 19 and luhn_ok(digits)


def _phone_ok(text: str) -> bool:
    digits = sum(ch.isdigit() for ch in text)
    return 7 <= digits <= 15 and _DATE.fullmatch(text) is None


# targets whose pattern finds candidates that a check then accepts or leaves as they are
_CHECKS: Final[dict[str, Callable[[str], bool]]] = {"card": _card_digits_ok, "phone": _phone_ok}


def _email_subn(text: str, placeholder: str) -> tuple[str, int]:
    """``_COMPILED["email"].subn(placeholder, text)``, searching from at most 64 characters before
    the next "@" instead of from where the last match ended: a match starting at ``p`` has its
    "@" 1 to 64 characters after ``p`` (the local part's lookahead), so no match starts earlier,
    and the lookbehind still sees the text before the search start."""
    pattern = _COMPILED["email"]
    pieces: list[str] = []
    last = 0
    at = text.find("@")
    while at >= 0:
        m = pattern.search(text, max(last, at - 64))
        if m is None:
            break
        pieces += (text[last : m.start()], placeholder)
        last = m.end()
        at = text.find("@", last)
    return "".join(pieces) + text[last:], len(pieces) // 2


def redact_text(text: str, targets: tuple[str, ...] = TARGETS) -> tuple[str, dict[str, int]]:
    """``text`` with each target replaced by its placeholder, and the count per target.

    Targets run in the fixed order of :data:`TARGETS` (an e-mail address's digits are never
    taken for a phone number; a card number is checked before it could look like a phone).
    """
    counts = dict.fromkeys(targets, 0)
    for target in TARGETS:
        if target not in counts:
            continue
        placeholder = PLACEHOLDERS[target]
        check = _CHECKS.get(target)
        if target == "email":
            text, n = _email_subn(text, placeholder)
            counts[target] += n
            continue
        if check is None:
            text, n = _COMPILED[target].subn(placeholder, text)
            counts[target] += n
            continue
        found = [m for m in _COMPILED[target].finditer(text) if check(m.group())]
        for m in reversed(found):
            text = text[: m.start()] + placeholder + text[m.end() :]
        counts[target] += len(found)
    return text, counts


@dataclass(frozen=True, slots=True)
class Redact(CleanStep):
    """Replace e-mail addresses, IP addresses, card numbers and phone numbers by placeholders.

    ``targets`` chooses which of ``email``, ``ip``, ``card``, ``phone`` are replaced (all by
    default); see the module docstring for exactly what each matches.
    """

    kind: ClassVar[str] = "redact"

    targets: tuple[str, ...] = TARGETS

    def __post_init__(self) -> None:
        targets = parse_str_tuple("targets", self.targets)
        unknown = [t for t in targets if t not in TARGETS]
        if unknown or not targets or len(set(targets)) != len(targets):
            raise RecipeError("targets", f"expected distinct names among {list(TARGETS)}, got {list(targets)}")
        object.__setattr__(self, "targets", targets)

    @property
    def placeholders(self) -> tuple[str, ...]:
        """The reserved tokens this step writes, in ``targets`` order."""
        return tuple(PLACEHOLDERS[t] for t in self.targets)

    def apply(self, docs: pa.Array) -> pa.Array:
        """Documents with every match replaced."""
        return self.apply_counted(docs)[0]

    def apply_counted(self, docs: pa.Array) -> tuple[pa.Array, dict[str, int]]:
        """Documents with every match replaced, and how many matches each target had."""
        docs = as_documents(docs)
        totals = dict.fromkeys(self.targets, 0)
        # which targets' hints each document may hold: a target whose hint a document lacks is not
        # matched there (the placeholders written before it hold no character of a later target's
        # hint, so replacing cannot make one appear)
        flags = hinted(docs, self.targets)
        where = np.flatnonzero(flags.any(axis=1))
        if not len(where):
            return docs, totals
        held = docs.take(pa.array(where))
        changed: list[str] = []
        for text, chosen in zip(held.to_pylist(), flags[where].tolist(), strict=True):
            out, counts = redact_text(text, tuple(t for t, f in zip(self.targets, chosen, strict=True) if f))
            changed.append(out)
            for target, n in counts.items():
                totals[target] += n
        mask = np.zeros(len(docs), dtype=bool)
        mask[where] = True
        result: pa.Array = pc.replace_with_mask(docs, pa.array(mask), pa.array(changed, type=pa.large_string()))
        return result, totals
