"""Deterministic text in many scripts for the byte-pair benchmarks.

Nothing here comes from a real text or language: each script gets invented words built from
random syllables of its own letters (consonant + vowel sign for the abugidas, composed
syllable blocks for Hangul, one character per syllable for Han and Ethiopic). Each script has
its own word list drawn with a Zipf-like law (p(rank) ~ 1 / (rank + 2.7) ** 1.0, common
practice for word frequencies) over many words, so the text has very many distinct chunks, as
text in hundreds of languages has. Han and Thai are written without spaces between words (as
real text in them is), so their chunks run from one punctuation mark to the next.

A line holds one script; lines have mixed lengths (a few words to a long paragraph), some
lines are blank, sentences end in the script's own marks, commas sit inside them and some
tokens are numbers (ASCII digits, or the script's own digits where it has them).
"""

from __future__ import annotations

import unicodedata
from dataclasses import dataclass
from pathlib import Path
from typing import Final

import numpy as np


@dataclass(frozen=True)
class Script:
    """How one script's invented words are spelled and set in a line."""

    name: str
    onsets: str  # letters that start a syllable ("" allowed via empty_onset)
    vowels: tuple[str, ...]  # what follows the onset (vowel letters or signs; "" allowed)
    codas: tuple[str, ...]  # what may close a syllable
    spaced: bool = True  # words separated by spaces
    comma: str = ", "
    stops: tuple[str, ...] = (". ",)
    digits: str = "0123456789"
    words: int = 30_000


def _chars(first: int, last: int, step: int = 1) -> str:
    return "".join(chr(c) for c in range(first, last + 1, step))


_HAN_SEED: Final = 71
_HAN = "".join(
    chr(c) for c in sorted(np.random.default_rng(_HAN_SEED).choice(np.arange(0x4E00, 0x9FA0), 2500, replace=False))
)
_HANGUL = "".join(chr(0xAC00 + (i * 21 + v) * 28) for i in range(19) for v in range(21))
_ETHIOPIC = "".join(chr(c) for c in range(0x1200, 0x135B) if unicodedata.category(chr(c)) == "Lo")  # assigned syllables

SCRIPTS: Final = (
    Script("latin", "bcdfghjklmnprstvzłśžčřñç", tuple("aeiouáéíóúàèäöüåøâêôy"), ("", "", "n", "r", "s", "l", "k", "ß")),
    Script("cyrillic", "бвгдзклмнпрстфхцчшщж", tuple("аеиоуыэюяё"), ("", "", "н", "р", "й", "ль", "ст", "к")),
    Script("greek", "βγδζθκλμνξπρστφχψ", tuple("αεηιουωάέήίόύώ"), ("", "", "ς", "ν", "ρ", "σ")),
    Script(
        "arabic",
        "بتثجحخدذرزسشصضطظعغفقكلمنهوي",
        ("", "ا", "و", "ي", "َ", "ُ"),
        ("", "", "ة", "ن", "ل"),
        comma="، ",
        stops=(". ", "؟ "),
        digits="٠١٢٣٤٥٦٧٨٩",
    ),
    Script("hebrew", "בגדהוזחטיכלמנסעפצקרשת", ("", "", "ו", "י", "א"), ("", "ם", "ן", "ך", "ת"), stops=(". ", "? ")),
    Script(
        "devanagari",
        "कखगघचछजझटठडढतथदधनपफबभमयरलवशसह",
        ("", "ा", "ि", "ी", "ु", "ू", "े", "ै", "ो", "ौ"),
        ("", "", "ं", "्र", "ः"),
        stops=("। ",),
        digits="०१२३४५६७८९",
    ),
    Script(
        "thai",
        "กขคงจฉชซญดตถทธนบปผพฟภมยรลวศสหอฮ",
        ("ะ", "า", "ิ", "ี", "ึ", "ื", "ุ", "ู", "่", "้", ""),
        ("", "", "น", "ง", "ม", "ก"),
        spaced=False,
        comma=" ",
        stops=(" ",),
        digits="๐๑๒๓๔๕๖๗๘๙",
    ),
    Script("han", _HAN, ("",), ("",), spaced=False, comma="，", stops=("。", "？", "！"), words=40_000),
    Script("hangul", _HANGUL, ("",), ("", "", "final"), stops=(". ", "? ")),  # "final": a closing consonant
    Script("ethiopic", _ETHIOPIC, ("",), ("",), comma="፣ ", stops=("። ",)),
    Script("georgian", "ბგდვზთკლმნპჟრსტფქღყშჩცძწჭხჯჰ", tuple("აეიოუ"), ("", "", "ი", "ს", "მ")),
    Script("armenian", "բգդզթժլխծկհձղճմյնշչպջռսվտրցփքֆ", tuple("աեէըիոօու"), ("", "", "ն", "ր", "ց"), stops=("։ ",)),
)


def syllables(script: Script) -> list[str]:
    """Every syllable of ``script``: onset + vowel + coda (for Hangul, composed syllable blocks)."""
    if script.name == "hangul":
        # a closing consonant is part of the block: U+AC00 + (initial * 21 + medial) * 28 + final
        return [*script.onsets, *(chr(ord(o) + f) for o in script.onsets[::7] for f in range(1, 28))]
    return [o + v + c for o in script.onsets for v in script.vowels for c in dict.fromkeys(script.codas)]


def invent_words(script: Script, seed: int, count: int) -> list[str]:
    """About ``count`` distinct invented words, short ones first (frequent words are short)."""
    rng = np.random.default_rng(seed)
    table = syllables(script)
    lengths = rng.choice([1, 2, 3, 4, 5], size=count, p=[0.2, 0.35, 0.25, 0.13, 0.07])
    picks = rng.integers(len(table), size=int(lengths.sum())).tolist()
    ends = np.cumsum(lengths).tolist()
    words = dict.fromkeys(
        "".join(table[k] for k in picks[e - n : e]) for e, n in zip(ends, lengths.tolist(), strict=True)
    )
    return sorted(words, key=len)


class _ScriptWriter:
    """Lines of one script."""

    def __init__(self, script: Script, seed: int, count: int) -> None:
        self.script = script
        self.words = invent_words(script, seed, count)
        p = 1.0 / (np.arange(len(self.words)) + 2.7)
        self.cdf = np.cumsum(p / p.sum())
        self.cdf[-1] = 1.0

    def line(self, rng: np.random.Generator) -> str:
        s = self.script
        n = int(min(400, 1 + rng.geometric(1 / 25)))  # words in the line: mostly short, some long
        picks = np.searchsorted(self.cdf, rng.random(n), side="right").tolist()
        marks = rng.random(n)
        gap = " " if s.spaced else ""
        parts: list[str] = []
        for k, (w, r) in enumerate(zip(picks, marks.tolist(), strict=True)):
            word = self.words[w]
            if r < 0.03:  # a number in the script's digits or ASCII
                digits = s.digits if r < 0.015 else "0123456789"
                word = "".join(digits[int(d)] for d in str(int(rng.integers(1, 100_000))))
            parts.append(word)
            if k == n - 1 or r > 0.93:
                parts.append(s.stops[int(rng.integers(len(s.stops)))])
            elif r > 0.86:
                parts.append(s.comma)
            else:
                parts.append(gap)
        return "".join(parts).rstrip(" ") + "\n"


def write_multiscript(path: Path, size: int, seed: int) -> int:
    """Write about ``size`` bytes of many-script lines to ``path`` (whole lines); return the bytes written."""
    # words per script: a list as long as the script's own, or shorter for a small file (so a quick
    # benchmark does not spend its seconds inventing words it never writes)
    writers = [_ScriptWriter(s, seed * 1000 + i, min(s.words, 500 + size // 100)) for i, s in enumerate(SCRIPTS)]
    # some scripts are written more than others
    share = np.array([1.0 / (i + 1.5) for i in range(len(writers))])
    share /= share.sum()
    rng = np.random.default_rng(seed)
    order = rng.permutation(len(writers))  # which script is most written depends on the seed
    path.parent.mkdir(parents=True, exist_ok=True)
    written = 0
    with open(path, "wb") as fh:
        while written < size:
            batch: list[str] = []
            for w in rng.choice(len(writers), size=256, p=share).tolist():
                batch.append("\n" if rng.random() < 0.05 else writers[order[w]].line(rng))
            data = "".join(batch).encode("utf-8")
            if written + len(data) > size:  # end on a line boundary near ``size``
                cut = data.rfind(b"\n", 0, size - written) + 1
                data = data[: max(cut, 1)] if cut > 0 else data[: data.find(b"\n") + 1]
            fh.write(data)
            written += len(data)
    return written
