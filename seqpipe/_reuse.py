"""Reusing another dataset's vocabulary, and the vocabulary fingerprint.

A recipe with ``[vocabulary] reuse_from = "../base-dataset"`` (a path relative to the recipe's
directory, or a filesystem URI) skips the count and fit phases: the build copies the source
dataset's ``vocab.arrow`` and tokenizer files byte for byte (the build later rewrites only the
``count`` column with its own train counts), so every id means in the new dataset exactly what it
means in the source. The recipe's tokenizer and vocabulary settings must
equal the source's (the ids would otherwise mean something the settings do not say); each
difference is refused naming both values. Cleaning steps and sources may differ.

The vocabulary fingerprint names "these ids mean these tokens": XXH3-128 over the canonical JSON
of the vocabulary's token column (lengths and bytes), the reserved roles, the tokenizer's recipe
settings and the hashes of its learned files (merges). Datasets sharing a vocabulary have the same
one, whether they fitted it or reused it.
"""

from __future__ import annotations

import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._hashing import hash_bytes, hash_file, hash_json
from seqpipe._parse import to_plain
from seqpipe.errors import ManifestError, RecipeError, SeqpipeError
from seqpipe.formats import VOCAB_FILE
from seqpipe.recipe import Recipe
from seqpipe.vocab import Vocabulary

# vocabulary settings that say nothing about which id means which token
_FREE_VOCAB_KEYS = ("reuse_from",)


@dataclass(frozen=True, slots=True)
class VocabSource:
    """The dataset a recipe reuses the vocabulary of: where it is (local copy) and its manifest."""

    where: str  # as the recipe wrote it
    directory: Path
    manifest: dict[str, Any]

    @property
    def files(self) -> tuple[str, ...]:
        """The vocabulary file and the tokenizer's learned files, relative to the dataset."""
        return (VOCAB_FILE, *(f["path"] for f in self.manifest["tokenizer"]["files"]))


def open_vocab_source(recipe: Recipe) -> VocabSource | None:
    """The dataset ``[vocabulary] reuse_from`` names (None without it), opened and checked."""
    from seqpipe.dataset import open_dataset
    from seqpipe.filesystem import is_uri

    where = recipe.vocabulary.reuse_from
    if not where:
        return None
    target: str | Path = where if is_uri(where) else recipe.root / where
    try:
        ds = open_dataset(target)
    except SeqpipeError as exc:
        raise RecipeError(
            "vocabulary.reuse_from", f"cannot open the dataset {where!r} to reuse its vocabulary ({exc})"
        ) from exc
    check_compatible(recipe, ds.manifest, where)
    return VocabSource(where, ds.directory, ds.manifest)


def _differences(prefix: str, mine: dict[str, Any], theirs: dict[str, Any]) -> list[tuple[str, Any, Any]]:
    keys = sorted((set(mine) | set(theirs)) - set(_FREE_VOCAB_KEYS))
    return [(f"{prefix}.{k}", mine.get(k), theirs.get(k)) for k in keys if mine.get(k) != theirs.get(k)]


def check_compatible(recipe: Recipe, manifest: dict[str, Any], where: str) -> None:
    """Refuse tokenizer or vocabulary settings that differ from those the source was built with."""
    theirs = manifest["recipe"]
    diffs = _differences("tokenizer", to_plain(recipe.tokenizer), theirs.get("tokenizer", {}))
    diffs += _differences("vocabulary", to_plain(recipe.vocabulary), theirs.get("vocabulary", {}))
    if diffs:
        key, mine, other = diffs[0]
        more = f" (and {len(diffs) - 1} more difference(s))" if len(diffs) > 1 else ""
        raise RecipeError(
            key,
            f"the recipe says {mine!r} but the dataset {where!r} whose vocabulary it reuses was built with "
            f"{other!r}{more}; set {key} = {other!r} (the reused ids only mean what those settings say)",
        )


def adopt_vocabulary(source: VocabSource, stage: Path) -> tuple[int, tuple[str, ...]]:
    """Copy the source's vocabulary and tokenizer files into ``stage`` byte for byte, each checked
    against the source manifest's hash; the number of entries and the tokenizer's files."""
    listed = {VOCAB_FILE: source.manifest["vocabulary"]["hash"]}
    listed.update({f["path"]: f["hash"] for f in source.manifest["tokenizer"]["files"]})
    for rel, expected in listed.items():
        target = stage / rel
        target.unlink(missing_ok=True)
        shutil.copyfile(source.directory / rel, target)
        if hash_file(target) != expected:
            raise ManifestError(
                f"{source.directory / rel}: does not match the hash its manifest lists; "
                f"verify the dataset {source.where!r} (seqpipe verify) before reusing its vocabulary",
                path=str(source.directory / rel),
            )
    return int(source.manifest["vocabulary"]["entries"]), source.files[1:]


def vocabulary_fingerprint(directory: Path, tokenizer: dict[str, Any], files: tuple[str, ...]) -> str:
    """The vocabulary fingerprint (module docstring) of the files in ``directory``."""
    vocab = Vocabulary.load(directory / VOCAB_FILE)
    tokens = vocab.tokens.cast(pa.large_binary())
    lengths = np.asarray(pc.binary_length(tokens).to_numpy(zero_copy_only=False), dtype="<i8")
    data = b"".join(bytes(b) for b in tokens.to_pylist())  # once per build, vocabulary-sized
    return hash_json(
        {
            "lengths": hash_bytes(lengths.tobytes()),
            "tokens": hash_bytes(data),
            "roles": vocab.roles,
            "tokenizer": tokenizer,
            "state": {f: hash_file(directory / f) for f in files},
        }
    )


def reused_entry(source: VocabSource) -> dict[str, Any]:
    """The manifest's ``vocabulary.reused_from``: where the vocabulary came from, the source
    dataset's fingerprint, and the source's cleaning steps (which may differ from this one's)."""
    return {
        "dataset": source.where,
        "fingerprint": source.manifest["fingerprint"],
        "clean": source.manifest["recipe"].get("clean", []),
    }
