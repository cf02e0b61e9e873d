"""``kind = "lowercase"``: full Unicode lower-casing or case folding."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Final

import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_str
from seqpipe.clean.base import CleanStep, as_documents, map_non_ascii

MODES: Final = ("lower", "casefold")


@dataclass(frozen=True, slots=True)
class Lowercase(CleanStep):
    """Lower-case (``str.lower``) or case-fold (``str.casefold``) every document.

    ASCII documents go through ``pc.ascii_lower`` (C), which equals both ``str.lower``
    and ``str.casefold`` on ASCII. Other documents get one ``str`` call each:
    ``pc.utf8_lower`` is not used because it applies one-to-one case mappings only
    (U+0130 becomes "i", where ``str.lower`` gives "i" + U+0307 as Unicode's
    SpecialCasing.txt says) and its tables follow another Unicode version.
    """

    kind: ClassVar[str] = "lowercase"

    mode: str = "lower"

    def __post_init__(self) -> None:
        parse_str("mode", self.mode, choices=MODES)

    def apply(self, docs: pa.Array) -> pa.Array:
        """Documents lower-cased (``mode = "lower"``) or case-folded (``"casefold"``)."""
        docs = as_documents(docs)
        fn = str.lower if self.mode == "lower" else str.casefold
        # fn(ascii_lower(s)) == fn(s): both mappings are per character and lowering an
        # ASCII letter keeps it a cased letter, so final-sigma context is unchanged.
        return map_non_ascii(pc.ascii_lower(docs), fn) if len(docs) else docs
