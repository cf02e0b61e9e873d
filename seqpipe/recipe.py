"""The recipe: a declarative description of a dataset build.

A recipe is a TOML file (read with the standard library's ``tomllib``) or the same structure
built in Python from frozen dataclasses. Sections, in data-flow order::

    [dataset]    name
    [[sources]]  where the text comes from (seqpipe.sources)
    [[clean]]    ordered cleaning steps (seqpipe.clean)
    [tokenizer]  how text becomes tokens (seqpipe.tokenizers)
    [vocab]      reserved specials, min_count, max_size (seqpipe.vocab)
    [encode]     begin/end markers around each document
    [splits]     train/validation/test fractions and the split seed
    [shards]     tokens per shard, compression

Validation happens at construction; every error names the key path, the bad value and what is
allowed. ``Recipe.to_dict()`` is the canonical form (defaults filled in); its canonical JSON is
hashed into ``Recipe.fingerprint``.
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

RECIPE_FORMAT: Final = 1
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

    begin: bool = False
    end: bool = True

    def __post_init__(self) -> None:
        parse_bool("begin", self.begin)
        parse_bool("end", self.end)


@dataclass(frozen=True, slots=True)
class SplitSpec:
    """Recipe section ``[splits]``: fractions per split, assigned per document by a seeded
    hash of its cleaned content (a document keeps its split when others change)."""

    train: float = 0.9
    validation: float = 0.05
    test: float = 0.05
    seed: int = 0

    def __post_init__(self) -> None:
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
    vocab: VocabSpec = field(default_factory=VocabSpec)
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
        names = getattr(tokenizer, "special_names", None)
        if names not in (None, self.vocab.specials) and dataclasses.is_dataclass(tokenizer):
            # the tokenizer matches literal specials by name; the names live in [vocab]
            object.__setattr__(self, "tokenizer", dataclasses.replace(tokenizer, special_names=self.vocab.specials))
        dedupes = [i for i, s in enumerate(self.clean) if getattr(s, "is_dedupe", False)]
        if len(dedupes) > 1:
            raise RecipeError(f"clean[{dedupes[1]}]", "only one dedupe step is allowed")
        for role, wanted in (("begin", self.encode.begin), ("end", self.encode.end)):
            if wanted and not getattr(self.vocab, role):
                raise RecipeError(f"encode.{role}", f"markers need a special token: set vocab.{role}")

    def to_dict(self) -> dict[str, Any]:
        """The canonical recipe: every section with defaults filled in."""
        out = {
            "format": RECIPE_FORMAT,
            "dataset": to_plain(self.dataset),
            "sources": [to_plain(s) for s in self.sources],
            "clean": [to_plain(s) for s in self.clean],
            "tokenizer": to_plain(self.tokenizer),
            "vocab": to_plain(self.vocab),
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
        allowed = ("format", "dataset", "sources", "clean", "tokenizer", "vocab", "encode", "splits", "shards")
        table = check_keys(path, data, allowed)
        fmt = table.get("format", RECIPE_FORMAT)
        if fmt != RECIPE_FORMAT:
            raise RecipeError(f"{path}.format", f"this seqpipe reads recipe format {RECIPE_FORMAT}, got {fmt!r}")
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
                vocab=section(VocabSpec, table.get("vocab", {}), f"{path}.vocab"),
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


def parse_recipe(text: str, root: Path | str = ".", *, name: str = "recipe") -> Recipe:
    """Parse TOML text into a validated :class:`Recipe`."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise RecipeError(name, f"not valid TOML: {exc}") from None
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
