"""Write the hostile manifests under fixtures/manifests and their index, cases.json.

Each case is a small sealed manifest of format seqpipe.manifest/2 (or bytes that are not one)
with one thing wrong. The index says how seqpipe must refuse it (``expect``: "manifest" for
open_dataset/verify, "unsafe" for a path refused at first use) and whether the JSON Schema in
seqpipe/schemas refuses it too (``schema``: "refuses", or "n/a" when the fault is below JSON
values, such as bytes that do not parse, or needs arithmetic or hashing the schema cannot do).

Run from the repository root: ``python scripts/make_manifest_fixtures.py``.
"""

# ruff: noqa: E501 (the case table reads best as one row per case)
from __future__ import annotations

import copy
import json
from collections.abc import Callable
from pathlib import Path
from typing import Any

from seqpipe._hashing import hash_json
from seqpipe.manifest import dumps, seal

OUT = Path(__file__).resolve().parent.parent / "fixtures" / "manifests"
H = "3f1c0d5e7a9b2c4d6e8f0a1b2c3d4e5f"  # any 32 hex digits: these manifests list no real file
RECIPE: dict[str, Any] = {"dataset": {"name": "ferry-logs"}, "format": "seqpipe.recipe/2"}


def base() -> dict[str, Any]:
    """A well-formed, sealed manifest: three splits, two shards in train."""

    def table(split: str, size: int) -> dict[str, Any]:
        return {"path": f"documents/{split}.arrow", "bytes": size, "hash": H}

    shards = [
        {"path": f"shards/train/00000{k}.arrow", "tokens": t, "documents": 1, "first_token": f,
         "bytes": b, "hash": H, "token_hash": H}
        for k, (t, f, b) in enumerate([(20, 0, 634), (10, 20, 626)])
    ]  # fmt: skip
    empty = {"documents": 0, "tokens": 0, "shards": []}
    return {
        "format": "seqpipe.manifest/2",
        "seqpipe_version": "0.1.0",
        "recipe": copy.deepcopy(RECIPE),
        "recipe_fingerprint": hash_json(RECIPE),
        "inputs": [{"path": "corpus/log-000.txt", "bytes": 2210, "hash": H}],
        "tokenizer": {"kind": "words", "files": []},
        "vocabulary": {"path": "vocab.arrow", "bytes": 1530, "hash": H, "entries": 40, "fingerprint": H},
        "dtype": "uint8",
        "splits": {
            "train": {"documents": 2, "tokens": 30, "shards": shards, "document_table": table("train", 1210)},
            "validation": {**empty, "document_table": table("validation", 1000)},
            "test": {**empty, "document_table": table("test", 1000)},
        },
        "summary": {"duplicates_dropped": 0},
    }


def old_format() -> dict[str, Any]:
    """A manifest as seqpipe-dataset/1 wrote it (the old names), sealed the old way."""
    m = base()
    m["format"] = "seqpipe-dataset/1"
    m["inputs"] = [{"path": "corpus/log-000.txt", "size": 2210, "hash": H}]
    m["tokenizer"]["vocab_size"] = 40
    m["vocabulary"]["size"] = m["vocabulary"].pop("entries")
    for sp in m["splits"].values():
        sp["docs"] = sp.pop("document_table")
        sp["docs"]["path"] = sp["docs"]["path"].replace("documents/", "docs/")
        for sh in sp["shards"]:
            sh["first"], sh["file_hash"] = sh.pop("first_token"), sh.pop("hash")
    m["dataset_fingerprint"] = hash_json(m)
    m["manifest_hash"] = hash_json(m)
    return m


def edited(edit: Callable[[dict[str, Any]], Any]) -> bytes:
    """The base manifest with ``edit`` applied, sealed again (its own hashes cannot catch it)."""
    m = base()
    edit(m)
    return dumps(seal(m)).encode()


def shard0(path: str) -> Callable[[dict[str, Any]], Any]:
    return lambda m: m["splits"]["train"]["shards"][0].update(path=path)


def nested(levels: int) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for _ in range(levels):
        out = {"deeper": out}
    return out


def cases() -> dict[str, tuple[bytes, dict[str, Any]]]:
    """name -> (file bytes, index entry)."""
    good = dumps(seal(base())).encode()
    bad = "manifest"
    refuses, na = {"schema": "refuses"}, {"schema": "n/a"}
    parse_only = {**na, "schema_why": "not JSON a schema can see"}
    at_use = {**na, "schema_why": "a path is refused when it is used, as the reader does"}
    sealed = seal(base())
    sealed["summary"]["duplicates_dropped"] = 5
    out: dict[str, tuple[bytes, dict[str, Any]]] = {
        "malformed-bom.json": (b"\xef\xbb\xbf" + good, {"expect": bad, "why": "UTF-8 byte order mark before the JSON text", **parse_only}),
        "malformed-bool-count.json": (edited(lambda m: m["splits"]["train"]["shards"][0].update(documents=True)), {"expect": bad, "why": "boolean where a count belongs, re-sealed", **refuses}),
        "malformed-deep-arrays.json": (b"[" * 100_000 + b"]" * 100_000, {"expect": bad, "why": "100000 nested arrays (parser recursion)", **parse_only}),
        "malformed-dtype.json": (edited(lambda m: m.update(dtype="float32")), {"expect": bad, "why": "id type that is not an unsigned integer, re-sealed", **refuses}),
        "malformed-duplicate-format.json": (good.replace(b'"format": "seqpipe.manifest/2",', b'"format": "seqpipe.manifest/2", "format": "other/9",', 1), {"expect": bad, "why": "duplicate key (the last one wins in JSON parsers)", **refuses}),
        "malformed-empty.json": (b"", {"expect": bad, "why": "empty file", **parse_only}),
        "malformed-float-bytes.json": (edited(lambda m: m["vocabulary"].update(bytes=1530.0)), {"expect": bad, "why": "float where a byte count belongs, re-sealed", **na, "schema_why": "JSON Schema counts 1530.0 as an integer (JSON Schema Validation, draft 2020-12, section 6.1.1)"}),
        "malformed-format-version.json": (edited(lambda m: m.update(format="seqpipe.manifest/3")), {"expect": bad, "why": "unknown format version, re-sealed", **refuses}),
        "malformed-hash-short.json": (edited(lambda m: m["splits"]["train"]["document_table"].update(hash=H[:16])), {"expect": bad, "why": "hash of 16 hex digits, re-sealed", **refuses}),
        "malformed-hash-uppercase.json": (edited(lambda m: m["vocabulary"].update(hash=H.upper())), {"expect": bad, "why": "hash not lowercase hex, re-sealed", **refuses}),
        "malformed-huge-int.json": (good.replace(b'"duplicates_dropped": 0', b'"duplicates_dropped": ' + b"9" * 5001), {"expect": bad, "why": "integer of 5001 digits", **parse_only}),
        "malformed-infinity.json": (good.replace(b'"duplicates_dropped": 0', b'"duplicates_dropped": -Infinity'), {"expect": bad, "why": "-Infinity constant", **parse_only}),
        "malformed-missing-key.json": (edited(lambda m: m.pop("inputs")), {"expect": bad, "why": "missing top-level key, re-sealed", **refuses}),
        "malformed-nan.json": (good.replace(b'"duplicates_dropped": 0', b'"duplicates_dropped": NaN'), {"expect": bad, "why": "NaN constant", **parse_only}),
        "malformed-negative-count.json": (edited(lambda m: m["splits"]["train"].update(documents=-1)), {"expect": bad, "why": "negative document count, re-sealed", **refuses}),
        "malformed-nesting-40.json": (edited(lambda m: m["summary"].update(deep=nested(40))), {"expect": bad, "why": "summary nested 40 levels (limit 32), re-sealed", **na, "schema_why": "the summary is free-form; depth is a reader limit"}),
        "malformed-not-object.json": (b"[]\n", {"expect": bad, "why": "top level is an array", **refuses}),
        "malformed-not-resealed.json": (dumps(sealed).encode(), {"expect": bad, "why": "summary edited without re-sealing", **na, "schema_why": "hashes"}),
        "malformed-not-utf8.json": (good.replace(b'"0.1.0"', b'"0.1.0-\xff"'), {"expect": bad, "why": "a byte that is not UTF-8", **parse_only}),
        "malformed-recipe-edited.json": (edited(lambda m: m["recipe"].update(dataset={"name": "other"})), {"expect": bad, "why": "recipe edited, recipe_fingerprint stale, re-sealed", **na, "schema_why": "hashes"}),
        "malformed-shards-gap.json": (edited(lambda m: m["splits"]["train"]["shards"][1].update(first_token=21)), {"expect": bad, "why": "shards do not tile the split, re-sealed", **na, "schema_why": "sums across entries"}),
        "malformed-shards-not-array.json": (edited(lambda m: m["splits"]["train"].update(shards={})), {"expect": bad, "why": "shards as an object, re-sealed", **refuses}),
        "malformed-split-not-object.json": (edited(lambda m: m["splits"].update(test=[])), {"expect": bad, "why": "split as an array, re-sealed", **refuses}),
        "malformed-token-total.json": (edited(lambda m: m["splits"]["train"].update(tokens=31)), {"expect": bad, "why": "split token total differs from its shards, re-sealed", **na, "schema_why": "sums across entries"}),
        "malformed-truncated.json": (good[: len(good) // 2], {"expect": bad, "why": "text cut in half", **parse_only}),
        "malformed-unknown-key.json": (edited(lambda m: m.update(comment="hello")), {"expect": bad, "why": "unknown top-level key, re-sealed", **refuses}),
        "old-format-1.json": (dumps(old_format()).encode(), {"expect": bad, "why": "written by an older seqpipe (seqpipe-dataset/1, old names)", "match": "made by an older seqpipe", **refuses}),
        "unsafe-absolute-document-table.json": (edited(lambda m: m["splits"]["train"]["document_table"].update(path="/etc/passwd")), {"access": "documents", "expect": "unsafe", "path": "/etc/passwd", "why": "absolute documents table path", **at_use}),
    }  # fmt: skip
    paths = {
        "unsafe-absolute-shard.json": ("/etc/passwd", "absolute shard path"),
        "unsafe-backslash-shard.json": ("shards\\..\\..\\outside.arrow", "Windows separators with .."),
        "unsafe-drive-shard.json": ("C:/Windows/win.ini", "drive-letter path"),
        "unsafe-empty-shard.json": ("", "empty shard path (the dataset directory itself)"),
        "unsafe-nested-parent-shard.json": (
            "shards/train/../../../outside.arrow",
            ".. inside a shard path leading out",
        ),
        "unsafe-nul-shard.json": ("shards/train/\x00.arrow", "NUL byte in a shard path"),
        "unsafe-parent-shard.json": ("../../../../../../etc/passwd", "shard path climbing out with .."),
    }
    for name, (path, why) in paths.items():
        out[name] = (
            edited(shard0(path)),
            {"access": "stream", "expect": "unsafe", "path": path, "why": why, **at_use},
        )
    out["unsafe-parent-vocabulary.json"] = (
        edited(lambda m: m["vocabulary"].update(path="../vocab.arrow")),
        {"access": "vocabulary", "expect": "unsafe", "path": "../vocab.arrow", "why": "vocabulary path climbing out"}
        | at_use,
    )
    return out


def main() -> None:
    for old in OUT.glob("*.json"):
        old.unlink()
    index = {}
    for name, (data, entry) in sorted(cases().items()):
        (OUT / name).write_bytes(data)
        index[name] = entry
    (OUT / "cases.json").write_text(json.dumps(index, indent=2, sort_keys=True) + "\n")
    print(f"wrote {len(index)} cases to {OUT}")


if __name__ == "__main__":
    main()
