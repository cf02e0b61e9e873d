"""A demo corpus of our own invention: the logbooks of the river ferries of Orrindel.

Orrindel is an invented town on an invented river delta. Each document is one
day's log of one ferry: a header, the day's crossings (landings, passengers,
cargo, weather), passenger remarks, repairs and a sign-off. Every sentence is
built from the templates and word lists below with ``random.Random(seed)``, so the
same seed gives byte-identical files. The text carries some non-ASCII on purpose
(accented names, a few CJK cargo marks, emoji in remarks, and now and then a name
typed in decomposed form so that NFC normalization has work to do), a few
planted duplicates (exact copies for ``dedupe`` and copies with one word changed for
``near_dedupe``; the demo recipe has both, so its summary counts them), and in every
ninth log a notice with invented contact details (an e-mail address at an example.*
domain, documentation IP addresses, a telephone number, a test card number) for the
``redact`` step to replace.

Layout written under ``out_dir``::

    logs/<ferry>.txt              paragraph documents, one blank line between them
    archive/old-ledger.txt.gz     the same, gzip-compressed
    remarks/remark-book.jsonl     one JSON object per line, text in "text"
"""

from __future__ import annotations

import json
import random
import unicodedata
from pathlib import Path
from typing import Final

import pyarrow as pa

from seqpipe.errors import RecipeError

FERRIES: Final = ("Heron Maid", "Lantern Ox", "Pell's Promise", "Tidewren")
MASTERS: Final = (
    "Tomás Quill",
    "Élodie Varsen",
    "Jürgen Hale",
    "Maud Ferrant",
    "Osk Lindqvær",
    "Bryn Oakhollow",
    "Noé Castellane",
)
LANDINGS: Final = (
    "Reedgate Landing",
    "Mill Quay",
    "Ashbar Point",
    "the Salt Steps",
    "Gullhaven",
    "Nørrebank Jetty",
    "the Eel Market",
    "Widow's Ford",
)
SEASONS: Final = ("thaw", "high-water", "long-light", "eel-run", "fog", "ice-edge")
WEATHER: Final = (
    "wind light from the north-east",
    "flat calm, mist on the reeds",
    "rain in squalls",
    "a stiff westerly, chop at the bar",
    "fog so thick we rang the bell every minute",
    "clear and cold",
    "warm, the river low and slow",
    "hail for a quarter hour, then sun",
    "gusts off the marsh, spray over the rail",
    "drizzle, poor sight of the far bank",
)
CARGO: Final = (
    "no cargo",
    "two carts of peat",
    "a crate of geese",
    "sacks of barley",
    "three barrels of pitch",
    "eel traps for the market",
    "a piano for the schoolhouse",
    "bundles of reed thatch",
    "crates marked 茶 from the Kaiyō barges",
    "sacks of 米 for the mill",
    "a goat, unwilling",
    "the post bag",
    "timber for the new jetty",
    "salt in oilcloth",
    "a cask of cider",
)
REMARKS: Final = (
    "a child asked whether the river has an end",
    "the miller's wife complained of the fare 😠",
    "a traveller from upriver sang the whole way across 🎶",
    "two farmers argued about the price of peat",
    "a gentleman lost his hat to the wind and laughed about it",
    "the schoolmaster counted herons aloud",
    "a woman knitted a whole sleeve in one crossing",
    "someone left a basket of plums 🍑 on the bench",
    "a boy caught a fish off the stern 🐟",
    "an old sailor said the bar has moved since his youth",
    "a courier slept through the crossing and had to go back",
    "a dog stood at the bow the whole way 🐕",
)
REPAIRS: Final = (
    "tightened the tiller pin",
    "caulked a seam aft of the mast",
    "replaced a frayed mooring line",
    "greased the windlass",
    "patched the awning",
    "bailed after the squall and found the leak",
    "new thole pins cut from ash",
    "scraped weed from the keel at low water",
    "fitted a new lamp glass",
    "the bell clapper fell off again; wired it back",
)
SIGNOFFS: Final = (
    "all souls landed safe",
    "lamps lit, boat made fast",
    "tide against us, late home",
    "nothing further to report",
    "fare box counted and sealed",
)
# Invented contact details the ferry clerks wrote into some logs, for the redact step to find:
# example.* domains (RFC 2606), documentation addresses (RFC 5737 IPv4, RFC 3849 IPv6), a
# drama-range telephone number and a card number published for testing payment forms.
NOTICES: Final = (
    "Notice: lost property goes to the ticket office, tickets@harbour-office.example.",
    "Notice: the fare machine at Mill Quay reports to 192.0.2.41 and 2001:db8:7::41.",
    "Notice: for the night boat telephone the harbour master on +44 1632 960118.",
    "Notice: a season ticket was paid by card 4111 1111 1111 1111; refund to purser.ned@quay-ledger.example.",
)
_NOTICE_EVERY: Final = 9
_NEAR_DUPLICATE_EVERY: Final = 40
_EXACT_DUPLICATE_EVERY: Final = 97


def _decomposed(text: str, rng: random.Random) -> str:
    # Some clerks' typewriters put the accent after the letter: NFD-style text for NFC to fix.
    return unicodedata.normalize("NFD", text) if rng.random() < 0.1 else text


def _log_entry(rng: random.Random, number: int) -> str:
    ferry = rng.choice(FERRIES)
    master = _decomposed(rng.choice(MASTERS), rng)
    lines = [
        f"Logbook of the {ferry}, day {rng.randint(1, 90)} of the {rng.choice(SEASONS)} season "
        f"(entry {number}), master {master}."
    ]
    minute = rng.randint(5 * 60, 7 * 60)
    here = rng.choice(LANDINGS)
    for _ in range(rng.randint(32, 60)):
        there = rng.choice([x for x in LANDINGS if x != here])
        lines.append(
            f"{minute // 60:02d}:{minute % 60:02d} {here} → {there}: {rng.randint(0, 38)} "
            f"passengers, {rng.choice(CARGO)}; {rng.choice(WEATHER)}."
        )
        if rng.random() < 0.25:
            lines.append(f"Passenger remark: {rng.choice(REMARKS)}.")
        if rng.random() < 0.08:
            lines.append(f"Repair: {rng.choice(REPAIRS)}.")
        minute += rng.randint(25, 55)
        here = there
    if number % _NOTICE_EVERY == 1:
        # by entry number, not the random stream: the rest of the corpus stays as it was
        lines.append(NOTICES[(number // _NOTICE_EVERY) % len(NOTICES)])
    lines.append(f"Signed at {here}, {rng.choice(SIGNOFFS)}.")
    return "\n".join(lines)


def _remark_entry(rng: random.Random, number: int) -> str:
    lines = [f"Remark book of the {rng.choice(FERRIES)}, page {number}."]
    for _ in range(rng.randint(6, 14)):
        lines.append(f"On the crossing to {rng.choice(LANDINGS)}, {rng.choice(REMARKS)}.")
    lines.append(f"Copied fair by {_decomposed(rng.choice(MASTERS), rng)}.")
    return "\n".join(lines)


def _near_duplicate(text: str, rng: random.Random) -> str:
    words = text.split(" ")
    i = rng.randrange(len(words))
    words[i] = rng.choice(("briskly", "slowly", "again", "twice", "also"))
    return " ".join(words)


def _entries(count: int, rng: random.Random, make: str) -> list[str]:
    out: list[str] = []
    for i in range(count):
        if i and i % _EXACT_DUPLICATE_EVERY == 0:
            out.append(out[rng.randrange(len(out))])  # a clerk copied an entry twice
        elif i and i % _NEAR_DUPLICATE_EVERY == 0:
            out.append(_near_duplicate(out[rng.randrange(len(out))], rng))
        else:
            out.append(_log_entry(rng, i) if make == "log" else _remark_entry(rng, i))
    return out


def write_demo_corpus(out_dir: Path, *, documents: int = 600, seed: int = 7) -> list[Path]:
    """Write the demo corpus under ``out_dir``; return the files written, sorted.

    ``documents`` documents in all (about 70% in ``logs/``, 15% in the gzip archive,
    15% in the JSON Lines remark book); about 4 KB each, so the default is a few MB.
    """
    if documents < 3:
        raise RecipeError("documents", f"expected at least 3 (one per format), got {documents}")
    rng = random.Random(seed)
    n_jsonl = max(1, documents * 15 // 100)
    n_archive = max(1, documents * 15 // 100)
    n_logs = documents - n_jsonl - n_archive
    written: list[Path] = []
    logs = _entries(n_logs, rng, "log")
    per_ferry: list[list[str]] = [[] for _ in FERRIES]
    for i, entry in enumerate(logs):
        per_ferry[i % len(FERRIES)].append(entry)
    for name, entries in zip(FERRIES, per_ferry, strict=True):
        if entries:
            slug = "".join(c if c.isalnum() else "-" for c in name.lower()).strip("-")
            written.append(_write(out_dir / "logs" / f"{slug}.txt", "\n\n".join(entries) + "\n"))
    archive = out_dir / "archive" / "old-ledger.txt.gz"
    archive.parent.mkdir(parents=True, exist_ok=True)
    # pyarrow writes a gzip header with mtime 0 and no file name: same bytes every run.
    with pa.CompressedOutputStream(str(archive), "gzip") as sink:
        sink.write(("\n\n".join(_entries(n_archive, rng, "log")) + "\n").encode("utf-8"))
    written.append(archive)
    lines = [
        json.dumps({"text": text, "page": i}, ensure_ascii=False)
        for i, text in enumerate(_entries(n_jsonl, rng, "remark"))
    ]
    written.append(_write(out_dir / "remarks" / "remark-book.jsonl", "\n".join(lines) + "\n"))
    return sorted(written)


def _write(path: Path, text: str) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(text.encode("utf-8"))
    return path


def demo_recipe_text() -> str:
    """A TOML recipe that builds the demo corpus written by :func:`write_demo_corpus`."""
    return """\
[dataset]
name = "ferry-logs"

[[sources]]
kind = "text"
paths = "logs/*.txt"
document = "paragraph"

[[sources]]
kind = "text"
paths = "archive/*.txt.gz"
document = "paragraph"

[[sources]]
kind = "jsonl"
paths = "remarks/*.jsonl"
field = "text"

[[clean]]
kind = "normalize"
form = "NFC"

[[clean]]
kind = "redact"

[[clean]]
kind = "dedupe"

[[clean]]
kind = "near_dedupe"

[tokenizer]
kind = "words"
literal_reserved = true

[vocabulary]
reserved = ["<pad>", "<unk>", "<bos>", "<eos>", "<email>", "<ip>", "<card>", "<phone>"]
min_count = 2

[splits]
train = 0.9
validation = 0.05
test = 0.05

[shards]
tokens = 100000
"""
