"""``kind = "normalize"``: Unicode normalization (UAX #15) to NFC, NFKC, NFD or NFKD."""

from __future__ import annotations

import unicodedata
from dataclasses import dataclass
from typing import ClassVar, Final, Literal, cast

import pyarrow as pa

from seqpipe._parse import parse_str
from seqpipe.clean.base import CleanStep, as_documents, map_non_ascii

FORMS: Final = ("NFC", "NFKC", "NFD", "NFKD")
_Form = Literal["NFC", "NFKC", "NFD", "NFKD"]


@dataclass(frozen=True, slots=True)
class Normalize(CleanStep):
    """Normalize every document to ``form``.

    Uses ``unicodedata.normalize`` (C) once per non-ASCII document; ASCII text is
    already normalized in every form and is not touched. ``pc.utf8_normalize`` is
    not used: its tables (utf8proc) follow a newer Unicode version than Python's
    ``unicodedata`` and give different results on some characters (on
    Python 3.11 / pyarrow 26, 167 single code points differ under NFKC), so the
    output would depend on which library ran.
    """

    kind: ClassVar[str] = "normalize"

    form: str = "NFC"

    def __post_init__(self) -> None:
        parse_str("form", self.form, choices=FORMS)

    def apply(self, docs: pa.Array) -> pa.Array:
        """Documents in normalization form ``form``."""
        form = cast(_Form, self.form)
        return map_non_ascii(as_documents(docs), lambda text: unicodedata.normalize(form, text))
