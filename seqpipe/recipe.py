"""The recipe: a declarative description of a dataset build.

A recipe is a TOML file (read with the standard library's ``tomllib``) or the same structure
built in Python from frozen dataclasses. Sections, in data-flow order::

    [dataset]    name
    [[sources]]  where the text comes from (seqpipe.sources)
    [[clean]]    ordered cleaning steps (seqpipe.clean)
    [tokenizer]  how text becomes tokens (seqpipe.tokenizers)
    [vocabulary] reserved tokens and their roles, min_count, cap (seqpipe.vocab)
    [encode]     prepend_begin/append_end markers around each document
    [splits]     train/validation/test fractions and the split seed
    [shards]     tokens per shard, compression

Validation happens at construction; every error names the key path, the bad value and what is
allowed. ``Recipe.to_dict()`` is the canonical form (defaults filled in); its canonical JSON is
hashed into ``Recipe.fingerprint``.

Recipe format 2 renamed keys of format 1; a recipe that still uses an old name is refused
with the old name, the new one and where it moved (``RENAMED_KEYS``), not a generic
"unknown key".
"""

from __future__ import annotations

import dataclasses
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Final

from seqpipe._hashing import hash_json
from seqpipe._parse import check_keys, parse_bool, parse_float, parse_int, parse_str, section, to_plain
from seqpipe.clean import parse_step
from seqpipe.clean.base import CleanStep
from seqpipe.errors import RecipeError
from seqpipe.sources import parse_source
from seqpipe.sources.base import Source
from seqpipe.tokenizers import parse_tokenizer
from seqpipe.tokenizers.base import Tokenizer
from seqpipe.tokenizers.words import WordTokenizer
from seqpipe.vocab import VocabSpec

RECIPE_FORMAT: Final = "seqpipe.recipe/2"
SPLIT_NAMES: Final = ("train", "validation", "test")
MAX_RECIPE_BYTES: Final = 1 << 20


@dataclass(frozen=True, slots=True)
class DatasetSpec:
    """Recipe section ``[dataset]``."""

    name: str = "dataset"

    def __post_init__(self) -> None:
        parse_str("name", self.name)
        # the name is the default output directory: it must be one new directory, never
        # the current one, its parent or a path elsewhere
        if self.name in (".", "..") or "/" in self.name or "\\" in self.name:
            raise RecipeError("dataset.name", f"expected a plain directory name, got {self.name!r}")


@dataclass(frozen=True, slots=True)
class EncodeSpec:
    """Recipe section ``[encode]``: markers written around every document."""

    prepend_begin: bool = False
    append_end: bool = True

    def __post_init__(self) -> None:
        parse_bool("prepend_begin", self.prepend_begin)
        parse_bool("append_end", self.append_end)


@dataclass(frozen=True, slots=True)
class SplitSpec:
    """Recipe section ``[splits]``: fractions per split, assigned per document by a seeded
    hash of its cleaned content (a document keeps its split when others change)."""

    train: float = 0.9
    validation: float = 0.05
    test: float = 0.05
    seed: int = 0
    # remove from train the documents whose content also occurs in a source with a fixed
    # validation or test split (they are counted in the summary either way)
    exclude_overlap_from_train: bool = False

    def __post_init__(self) -> None:
        parse_bool("exclude_overlap_from_train", self.exclude_overlap_from_train)
        for name in SPLIT_NAMES:
            object.__setattr__(self, name, parse_float(name, getattr(self, name), minimum=0.0, maximum=1.0))
        parse_int("seed", self.seed, minimum=0, maximum=2**63 - 1)
        total = self.train + self.validation + self.test
        if abs(total - 1.0) > 1e-9:
            raise RecipeError("train", f"train + validation + test must be 1, got {total:g}")
        if self.train == 0.0:
            raise RecipeError("train", "the train fraction must be above 0 (the vocabulary is counted on it)")

    def fractions(self) -> tuple[float, float, float]:
        return (self.train, self.validation, self.test)


@dataclass(frozen=True, slots=True)
class ShardSpec:
    """Recipe section ``[shards]``."""

    tokens: int = 1 << 24
    compression: str = "none"

    def __post_init__(self) -> None:
        parse_int("tokens", self.tokens, minimum=1)
        parse_str("compression", self.compression, choices=("none", "zstd"))


@dataclass(frozen=True, slots=True)
class Recipe:
    """A whole build description. ``root`` is the directory source globs are relative to
    (the recipe file's directory); it is not part of the fingerprint."""

    sources: tuple[Source, ...]
    tokenizer: Tokenizer = field(default_factory=WordTokenizer)
    clean: tuple[CleanStep, ...] = ()
    vocabulary: VocabSpec = field(default_factory=VocabSpec)
    encode: EncodeSpec = field(default_factory=EncodeSpec)
    splits: SplitSpec = field(default_factory=SplitSpec)
    shards: ShardSpec = field(default_factory=ShardSpec)
    dataset: DatasetSpec = field(default_factory=DatasetSpec)
    root: Path = field(default=Path("."), compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "sources", tuple(self.sources))
        object.__setattr__(self, "clean", tuple(self.clean))
        object.__setattr__(self, "root", Path(self.root))
        if not self.sources:
            raise RecipeError("sources", "at least one [[sources]] entry is required")
        tokenizer = self.tokenizer
        names = getattr(tokenizer, "reserved_names", None)
        if names not in (None, self.vocabulary.reserved) and dataclasses.is_dataclass(tokenizer):
            # the tokenizer matches reserved tokens by name; the names live in [vocabulary]
            synced = dataclasses.replace(tokenizer, reserved_names=self.vocabulary.reserved)
            object.__setattr__(self, "tokenizer", synced)
        if getattr(tokenizer, "grows_vocabulary", False) and not self.vocabulary.cap:
            raise RecipeError(
                "vocabulary.cap",
                f"tokenizer kind {getattr(tokenizer, 'kind', '?')!r} learns entries until the vocabulary "
                "reaches [vocabulary] cap; set cap to the number of entries wanted (e.g. cap = 8000)",
            )
        if getattr(tokenizer, "fixed_vocabulary", False) and self.vocabulary.cap:
            # a cap drops byte values, and every byte of a character outside it becomes unknown
            raise RecipeError(
                "vocabulary.cap",
                f"tokenizer kind {getattr(tokenizer, 'kind', '?')!r} has a fixed vocabulary (the byte values "
                f"plus the reserved tokens); a cap of {self.vocabulary.cap} would turn text outside it into "
                "unknown tokens: remove cap (or set cap = 0)",
            )
        dedupes = [i for i, s in enumerate(self.clean) if getattr(s, "is_dedupe", False)]
        if len(dedupes) > 1:
            raise RecipeError(f"clean[{dedupes[1]}]", "only one dedupe step is allowed")
        nears = [i for i, s in enumerate(self.clean) if getattr(s, "is_near_dedupe", False)]
        if len(nears) > 1:
            raise RecipeError(f"clean[{nears[1]}]", "only one near_dedupe step is allowed")
        self._check_placeholders()
        markers = (("prepend_begin", "begin", self.encode.prepend_begin), ("append_end", "end", self.encode.append_end))
        for key, role, wanted in markers:
            if wanted and not getattr(self.vocabulary, role):
                raise RecipeError(f"encode.{key}", f"markers need a reserved token: set vocabulary.{role}")

    def _check_placeholders(self) -> None:
        """Placeholders a step writes (``redact``) must each encode as one reserved id."""
        for i, step in enumerate(self.clean):
            wanted: tuple[str, ...] = getattr(step, "placeholders", ())
            missing = [p for p in wanted if p not in self.vocabulary.reserved]
            if missing:
                raise RecipeError(
                    "vocabulary.reserved",
                    f"clean[{i}] ({step.kind}) writes the placeholders {list(missing)}; add them to "
                    f"[vocabulary] reserved (e.g. reserved = {[*self.vocabulary.reserved, *missing]})",
                )
            if wanted and not getattr(self.tokenizer, "literal_reserved", False):
                raise RecipeError(
                    "tokenizer.literal_reserved",
                    f"clean[{i}] ({step.kind}) writes placeholder tokens; set [tokenizer] literal_reserved = true "
                    "so each placeholder is one reserved id instead of ordinary text",
                )

    def to_dict(self) -> dict[str, Any]:
        """The canonical recipe: every section with defaults filled in."""
        out = {
            "format": RECIPE_FORMAT,
            "dataset": to_plain(self.dataset),
            "sources": [to_plain(s) for s in self.sources],
            "clean": [to_plain(s) for s in self.clean],
            "tokenizer": to_plain(self.tokenizer),
            "vocabulary": to_plain(self.vocabulary),
            "encode": to_plain(self.encode),
            "splits": to_plain(self.splits),
            "shards": to_plain(self.shards),
        }
        return out

    @property
    def fingerprint(self) -> str:
        """XXH3-128 of the canonical recipe's canonical JSON."""
        return hash_json(self.to_dict())

    def replace(self, **changes: Any) -> Recipe:
        """A copy with some sections replaced (validated again)."""
        return dataclasses.replace(self, **changes)

    @classmethod
    def from_dict(cls, data: Any, root: Path | str = ".", path: str = "recipe") -> Recipe:
        """Build and validate a recipe from plain data (parsed TOML or JSON)."""
        allowed = ("format", "dataset", "sources", "clean", "tokenizer", "vocabulary", "encode", "splits", "shards")
        refuse_renamed_keys(data, path)
        table = check_keys(path, data, allowed)
        fmt = table.get("format", RECIPE_FORMAT)
        if fmt != RECIPE_FORMAT:
            todo = "rename the keys the README lists for format 2, then drop or update format" if fmt == 1 else ""
            raise RecipeError(
                f"{path}.format",
                f"this seqpipe reads recipe format {RECIPE_FORMAT!r}, got {fmt!r}" + (f"; {todo}" if todo else ""),
            )
        sources_raw = table.get("sources")
        if sources_raw is None:
            raise RecipeError(f"{path}.sources", "missing: add at least one [[sources]] table")
        if not isinstance(sources_raw, list):
            raise RecipeError(f"{path}.sources", "expected an array of tables ([[sources]])")
        clean_raw = table.get("clean", [])
        if not isinstance(clean_raw, list):
            raise RecipeError(f"{path}.clean", "expected an array of tables ([[clean]])")
        try:
            return cls(
                sources=tuple(parse_source(s, f"{path}.sources[{i}]") for i, s in enumerate(sources_raw)),
                clean=tuple(parse_step(s, f"{path}.clean[{i}]") for i, s in enumerate(clean_raw)),
                tokenizer=parse_tokenizer(table.get("tokenizer", {}), f"{path}.tokenizer"),
                vocabulary=section(VocabSpec, table.get("vocabulary", {}), f"{path}.vocabulary"),
                encode=section(EncodeSpec, table.get("encode", {}), f"{path}.encode"),
                splits=section(SplitSpec, table.get("splits", {}), f"{path}.splits"),
                shards=section(ShardSpec, table.get("shards", {}), f"{path}.shards"),
                dataset=section(DatasetSpec, table.get("dataset", {}), f"{path}.dataset"),
                root=Path(root),
            )
        except RecipeError as exc:
            if exc.key.startswith(path):
                raise
            raise RecipeError(f"{path}.{exc.key}", exc.reason) from None


# Keys recipe format 1 used, by the table they sat in: old name -> new name.
# "*" tables apply to every entry of [[sources]]/[[clean]]; "clean:min_length" only to that kind.
RENAMED_KEYS: Final[dict[str, dict[str, str]]] = {
    "": {"vocab": "vocabulary"},
    "vocabulary": {"specials": "reserved", "max_size": "cap"},
    "tokenizer": {
        "vocab_size": "[vocabulary] cap",
        "literal_specials": "literal_reserved",
        "special_names": "reserved_names",
    },
    "encode": {"begin": "prepend_begin", "end": "append_end"},
    "sources": {"invalid_utf8": "on_invalid_utf8", "bad_records": "on_bad_record", "oversize": "on_oversize"},
    "clean:min_length": {"chars": "characters"},
}


def _renamed(where: str, old: str, new: str) -> RecipeError:
    return RecipeError(
        f"{where}.{old}" if where else old,
        f"recipe format 2 renamed it to {new!r}; rename the key (the README's recipe table lists every renamed key)",
    )


def _check_renamed(table: Any, where: str, renames: dict[str, str]) -> None:
    if isinstance(table, dict):
        for old, new in renames.items():
            if old in table:
                raise _renamed(where, old, new)


def refuse_renamed_keys(data: Any, path: str = "recipe") -> None:
    """Raise a :class:`RecipeError` naming the first recipe-format-1 key in ``data``, if any."""
    if not isinstance(data, dict):
        return
    _check_renamed(data, path, RENAMED_KEYS[""])
    for name in ("tokenizer", "encode", "vocabulary"):
        _check_renamed(data.get(name), f"{path}.{name}", RENAMED_KEYS[name])
    sources = data.get("sources")
    for i, source in enumerate(sources if isinstance(sources, list) else []):
        _check_renamed(source, f"{path}.sources[{i}]", RENAMED_KEYS["sources"])
    steps = data.get("clean")
    for i, step in enumerate(steps if isinstance(steps, list) else []):
        if isinstance(step, dict):
            _check_renamed(step, f"{path}.clean[{i}]", RENAMED_KEYS.get(f"clean:{step.get('kind')}", {}))


def parse_recipe(text: str, root: Path | str = ".", *, name: str = "recipe") -> Recipe:
    """Parse TOML text into a validated :class:`Recipe`."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise RecipeError(name, f"not valid TOML: {exc}") from None
    except RecursionError:
        raise RecipeError(name, "not a usable recipe: arrays or tables nested too deeply to parse") from None
    except ValueError as exc:  # tomllib lets Python's limit on integer digits through
        raise RecipeError(name, f"not a usable recipe: {exc}") from None
    return Recipe.from_dict(data, root)


def load_recipe(path: str | Path) -> Recipe:
    """Read and validate a TOML recipe file; sources are relative to its directory."""
    p = Path(path)
    try:
        raw = p.read_bytes()
    except FileNotFoundError:
        raise RecipeError(str(p), "recipe file not found") from None
    except OSError as exc:
        raise RecipeError(str(p), f"cannot read recipe file ({exc.strerror})") from None
    if len(raw) > MAX_RECIPE_BYTES:
        raise RecipeError(str(p), f"recipe file is larger than {MAX_RECIPE_BYTES} bytes")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise RecipeError(str(p), f"recipe is not UTF-8 (byte {exc.start})") from None
    return parse_recipe(text, p.resolve().parent, name=str(p))
