"""The dataset manifest: what a build wrote, with every hash, in a strict schema of our own.

``manifest.json`` (UTF-8 JSON object)::

    format             "seqpipe.manifest/2"   readers refuse any other value
    seqpipe_version    library version that wrote it
    environment        {numpy, pyarrow, python, regex, unicode}: versions that decide the bytes
                       (unicode: Python's Unicode tables; regex: its package version, which fixes
                       its own Unicode tables); absent in manifests written before it was recorded
    recipe             the canonical recipe (see Recipe.to_dict)
    recipe_fingerprint XXH3-128 of the canonical recipe
    inputs             [{path, bytes, hash}]  input files relative to their glob's fixed directory
    tokenizer          {kind, files: [{path, bytes, hash}]}
    vocabulary         {path, bytes, hash, entries}
    dtype              "uint8" | "uint16" | "uint32"
    splits             {name: {documents, tokens, document_table: {path, bytes, hash},
                               shards: [{path, tokens, documents, first_token, bytes, hash, token_hash}]}}
    summary            deterministic build figures (drops, unknown-token counts, ...)
    fingerprint        XXH3-128 over all of the above (canonical JSON)
    manifest_hash      XXH3-128 over all of the above plus fingerprint

The JSON Schema ``seqpipe/schemas/manifest-2.schema.json`` describes the same format; the
README's "On disk" section says how to check a dataset with an Arrow reader and xxhash only.

No timestamps and no absolute paths: two builds of the same recipe and inputs write the same
bytes. Parsing validates types, limits sizes and nesting, and checks both hashes.
"""

from __future__ import annotations

import json
import math
import operator
import posixpath
from collections.abc import Iterator, Mapping
from pathlib import Path, PurePosixPath
from typing import Any, Final

from seqpipe._hashing import canonical_json, hash_chunks, hash_json
from seqpipe.errors import ManifestError, UnsafePathError
from seqpipe.formats import ENVIRONMENT_KEYS

FORMAT: Final = "seqpipe.manifest/2"
OLD_FORMATS: Final = ("seqpipe-dataset/1",)
MANIFEST_NAME: Final = "manifest.json"
# the JSON Schema (draft 2020-12) of this format, shipped as package data for other tools
SCHEMA_FILE: Final = Path(__file__).resolve().parent / "schemas" / "manifest-2.schema.json"
MAX_MANIFEST_BYTES: Final = 64 << 20
MAX_DEPTH: Final = 32
HEX32: Final = frozenset("0123456789abcdef")
DTYPES: Final = ("uint8", "uint16", "uint32", "uint64")
TOP_KEYS: Final = (
    "format",
    "seqpipe_version",
    "recipe",
    "recipe_fingerprint",
    "inputs",
    "tokenizer",
    "vocabulary",
    "dtype",
    "splits",
    "summary",
    "fingerprint",
    "manifest_hash",
)
SHARD_KEYS: Final = ("path", "tokens", "documents", "first_token", "bytes", "hash", "token_hash")

_ESCAPE: Final = json.encoder.encode_basestring_ascii  # JSON string text, quotes included


def seal(body: dict[str, Any]) -> dict[str, Any]:
    """Add ``fingerprint`` and ``manifest_hash`` to a manifest body."""
    core = {k: v for k, v in body.items() if k not in ("fingerprint", "manifest_hash")}
    out = dict(core)
    if any(type(k) is not str for k in core):
        out["fingerprint"] = hash_json(core)
        out["manifest_hash"] = hash_json(out)
        return out
    # both hashes are of canonical JSON that differs in one top-level key: each value is
    # serialized once and the two texts joined from the pieces (a manifest lists every input)
    pieces = {k: canonical_json(v).encode("ascii") for k, v in core.items()}
    _add_hashes(out, pieces)
    return out


def _add_hashes(out: dict[str, Any], pieces: dict[str, bytes]) -> None:
    """Set ``out``'s fingerprint and manifest_hash from its values' canonical JSON (``pieces``)."""
    out["fingerprint"] = _joined_hash(pieces)
    pieces["fingerprint"] = canonical_json(out["fingerprint"]).encode("ascii")
    out["manifest_hash"] = _joined_hash(pieces)


def _joined_hash(pieces: dict[str, bytes]) -> str:
    """``hash_bytes`` of the canonical JSON of an object from its values' canonical JSON
    (``_hashing.canonical_json``, ASCII), streamed into the hash rather than joined first."""
    return hash_chunks(_joined_chunks(pieces))


def _joined_chunks(pieces: dict[str, bytes]) -> Iterator[bytes]:
    yield b"{"
    for i, k in enumerate(sorted(pieces)):
        yield (b"," if i else b"") + _ESCAPE(k).encode("ascii") + b":"
        yield pieces[k]
    yield b"}"


def dumps(manifest: dict[str, Any]) -> str:
    """Manifest text: sorted keys, two-space indent, trailing newline (stable bytes).

    The bytes are ``json.dumps(manifest, sort_keys=True, indent=2, ensure_ascii=True,
    allow_nan=False)``'s; with an indent the json module encodes in Python node by node, so
    plain trees (string keys; strings, ints, finite floats, booleans, None, lists, tuples)
    are written here with each string encoded by the json module's C escaper, and anything
    else is left to ``json.dumps`` (which also raises its errors)."""
    text = _indented(manifest, "")
    if text is None:
        return json.dumps(manifest, sort_keys=True, indent=2, ensure_ascii=True, allow_nan=False) + "\n"
    return text + "\n"


def _indented(obj: Any, indent: str) -> str | None:
    """``obj`` as ``json.dumps(..., sort_keys=True, indent=2)`` writes it at ``indent``; None
    when it holds anything but plain values (see :func:`dumps`)."""
    kind = type(obj)
    if kind is str:
        return str(_ESCAPE(obj))
    if kind is int:
        return int.__repr__(obj)
    if kind is dict:
        return _indented_dict(obj, indent)
    if kind is list or kind is tuple:
        if not obj:
            return "[]"
        inner = indent + "  "
        items = _flat_entries(obj, inner)
        if items is None:
            nested = [_indented(v, inner) for v in obj]
            if any(text is None for text in nested):
                return None
            items = [text for text in nested if text is not None]
        return "[\n" + inner + (",\n" + inner).join(items) + "\n" + indent + "]"
    if obj is None:
        return "null"
    if obj is True:
        return "true"
    if obj is False:
        return "false"
    if kind is float and math.isfinite(obj):
        return float.__repr__(obj)
    return None


def _indented_dict(obj: dict[Any, Any], indent: str) -> str | None:
    if not obj:
        return "{}"
    if any(type(k) is not str for k in obj):
        return None
    inner = indent + "  "
    parts = []
    for k in sorted(obj):
        v = obj[k]
        of = type(v)  # scalars inline: most of a manifest is flat entries (inputs, shards)
        text = _ESCAPE(v) if of is str else int.__repr__(v) if of is int else _indented(v, inner)
        if text is None:
            return None
        parts.append(_ESCAPE(k) + ": " + text)
    return "{\n" + inner + (",\n" + inner).join(parts) + "\n" + indent + "}"


def _flat_entries(entries: list[Any] | tuple[Any, ...], indent: str) -> list[str] | None:
    """A list of objects with the same string keys and only string or int values (a manifest's
    inputs and shards), each written from one template; None for any other list."""
    flat = _flat_columns(entries)
    return None if flat is None else _flat_texts(*flat, indent)


def _flat_columns(entries: list[Any] | tuple[Any, ...]) -> tuple[list[str], list[list[str]]] | None:
    """The sorted keys of a list of objects with the same string keys and only string or int
    values, and each key's values as JSON text, a column at a time (the C escaper mapped over
    it); None for any other list."""
    first = entries[0]
    if type(first) is not dict or not first or any(type(k) is not str for k in first):
        return None
    keys = sorted(first)
    # the same keys in each: all dicts, all of the first's size, each holding the first's keys
    if set(map(type, entries)) != {dict} or set(map(len, entries)) != {len(keys)}:
        return None
    columns = []
    for k in keys:
        try:
            values = list(map(operator.itemgetter(k), entries))
        except KeyError:
            return None
        kinds = set(map(type, values))
        if kinds == {str}:
            columns.append(list(map(_ESCAPE, values)))
        elif kinds == {int}:
            columns.append(list(map(int.__repr__, values)))
        elif kinds == {str, int}:
            columns.append([_ESCAPE(v) if type(v) is str else int.__repr__(v) for v in values])
        else:
            return None
    return keys, columns


def _flat_texts(keys: list[str], columns: list[list[str]], indent: str | None) -> list[str]:
    """Each entry's text from the columns: as ``dumps`` writes it at ``indent``, or (None) as
    canonical JSON."""
    names = [_ESCAPE(k).replace("%", "%%") for k in keys]
    if indent is None:
        template = "{" + ",".join(name + ":%s" for name in names) + "}"
    else:
        inner = indent + "  "
        template = "{\n" + inner + (",\n" + inner).join(name + ": %s" for name in names) + "\n" + indent + "}"
    return list(map(template.__mod__, zip(*columns, strict=True)))


def flat_texts(entries: Any) -> tuple[bytes, str] | None:
    """A top-level list of flat entries (objects with the same string keys and only string or int
    values, such as the inputs) as ``seal_and_dump`` uses it: its canonical JSON (ASCII bytes,
    hashed) and its indented text as the value of a top-level key (written); None for any other
    value."""
    flat = _flat_columns(entries) if type(entries) is list and entries else None
    if flat is None:
        return None
    canonical = ("[" + ",".join(_flat_texts(*flat, None)) + "]").encode("ascii")
    return canonical, "[\n    " + ",\n    ".join(_flat_texts(*flat, "    ")) + "\n  ]"


def seal_and_dump(
    body: dict[str, Any], known: Mapping[str, tuple[bytes, str]] | None = None
) -> tuple[dict[str, Any], str]:
    """``seal(body)`` and ``dumps`` of the sealed manifest (the same values and bytes), with each
    top-level list of flat entries (the inputs: a manifest lists every one) escaped once for both
    its canonical JSON (hashed) and its indented text (written). ``known``: such texts the caller
    already has, by key (``flat_texts`` of that very value, e.g. kept from an earlier build)."""
    core = {k: v for k, v in body.items() if k not in ("fingerprint", "manifest_hash")}
    if any(type(k) is not str for k in core):
        sealed = seal(body)
        return sealed, dumps(sealed)
    pieces: dict[str, bytes] = {}
    indented: dict[str, str] = {}
    for k, v in core.items():
        texts = (known or {}).get(k) or flat_texts(v)
        if texts is None:
            pieces[k] = canonical_json(v).encode("ascii")
            continue
        pieces[k], indented[k] = texts
    out = dict(core)
    _add_hashes(out, pieces)
    parts = []
    for k in sorted(out):
        text = indented[k] if k in indented else _indented(out[k], "  ")
        if text is None:
            return out, dumps(out)
        parts.append(_ESCAPE(k) + ": " + text)
    return out, "{\n  " + ",\n  ".join(parts) + "\n}\n"


def _depth(obj: Any, level: int = 0) -> int:
    if level > MAX_DEPTH:
        return level
    if isinstance(obj, dict):
        return max([_depth(v, level + 1) for v in obj.values()], default=level + 1)
    if isinstance(obj, list):
        return max([_depth(v, level + 1) for v in obj], default=level + 1)
    return level


class _Check:
    """Type checks that name the manifest key path."""

    def __init__(self, where: str) -> None:
        self.where = where

    def fail(self, key: str, msg: str) -> ManifestError:
        return ManifestError(f"{self.where}: {key}: {msg}", key=key)

    def obj(self, v: Any, key: str, keys: tuple[str, ...]) -> dict[str, Any]:
        if not isinstance(v, dict):
            raise self.fail(key, f"expected an object, got {type(v).__name__}")
        missing = [k for k in keys if k not in v]
        extra = sorted(set(v) - set(keys))
        if missing:
            raise self.fail(key, f"missing key(s) {missing}")
        if extra:
            raise self.fail(key, f"unknown key(s) {extra}")
        return v

    def int_(self, v: Any, key: str) -> int:
        if isinstance(v, bool) or not isinstance(v, int) or v < 0:
            raise self.fail(key, f"expected a non-negative integer, got {v!r}"[:200])
        return v

    def hex_(self, v: Any, key: str) -> str:
        if not isinstance(v, str) or len(v) != 32 or not set(v) <= HEX32:
            raise self.fail(key, f"expected 32 lowercase hex digits, got {v!r}"[:200])
        return v

    def str_(self, v: Any, key: str) -> str:
        if not isinstance(v, str):
            raise self.fail(key, f"expected a string, got {type(v).__name__}")
        return v

    def list_(self, v: Any, key: str) -> list[Any]:
        if not isinstance(v, list):
            raise self.fail(key, f"expected an array, got {type(v).__name__}")
        return v

    def file_(self, v: Any, key: str, extra: tuple[str, ...] = ()) -> dict[str, Any]:
        keys = ("path", "bytes", "hash", *extra)
        d = self.obj(v, key, keys)
        self.str_(d["path"], f"{key}.path")
        self.int_(d["bytes"], f"{key}.bytes")
        self.hex_(d["hash"], f"{key}.hash")
        return d


def check_relative(rel: str, *, key: str = "path") -> PurePosixPath:
    """``rel`` as a relative POSIX path; refuse NUL, absolute paths, '..', backslashes and colons.

    The checks on the text alone, shared by local datasets and those behind a URI.
    """
    if not isinstance(rel, str) or "\x00" in rel:
        raise UnsafePathError(f"{key}: path {rel!r} must be a string without NUL bytes", path=str(rel))
    pure = PurePosixPath(rel)
    if any(len(p.encode("utf-8", "surrogateescape")) > 255 for p in pure.parts):
        raise UnsafePathError(f"{key}: a component of {rel[:80]!r}... is longer than 255 bytes", path=rel)
    if not rel or pure.is_absolute() or "\\" in rel or ":" in rel or any(p in ("..", "") for p in pure.parts):
        raise UnsafePathError(f"{key}: path {rel!r} must be relative and stay inside the dataset", path=rel)
    return pure


def safe_relative(directory: Path, rel: str, *, key: str = "path") -> Path:
    """Resolve ``rel`` inside ``directory``; refuse absolute paths, '..', and symlinks leading out."""
    pure = check_relative(rel, key=key)
    full = directory.joinpath(*pure.parts)
    try:
        real = full.resolve(strict=False)
        base = directory.resolve(strict=True)
    except (OSError, ValueError) as exc:
        raise UnsafePathError(f"{key}: cannot resolve {rel!r} ({exc})", path=rel) from exc
    if real != base and base not in real.parents:
        raise UnsafePathError(f"{key}: {rel!r} leads outside the dataset directory (to {real})", path=rel)
    return full


def is_old_format(exc: ManifestError) -> bool:
    """Whether ``exc`` refused a manifest for being of a format an older seqpipe wrote."""
    return "old_format" in exc.details


def _check_counts(c: _Check, m: dict[str, Any]) -> None:
    """Counts that describe one thing twice agree: a split's documents, the documents its shards
    begin, and the summary's count of them."""
    if not isinstance(m["summary"], dict):
        raise c.fail("summary", "expected an object")
    summary = m["summary"].get("splits", {})
    for name, sp in m["splits"].items():
        begun = sum(s["documents"] for s in sp["shards"])
        if sp["shards"] and begun != sp["documents"]:
            raise c.fail(f"splits.{name}.documents", f"shards begin {begun} documents, split says {sp['documents']}")
        told = summary.get(name, {}).get("documents", sp["documents"]) if isinstance(summary, dict) else None
        if told != sp["documents"]:
            raise c.fail(f"summary.splits.{name}.documents", f"says {told!r}, split says {sp['documents']}")


def _check_distinct_paths(c: _Check, m: dict[str, Any]) -> None:
    """Each file is listed once: a path listed twice would be hashed twice by verify (a manifest
    listing one shard 200,000 times would read it 200,000 times) and read twice into a stream."""
    paths = [m["vocabulary"]["path"], *(f["path"] for f in m["tokenizer"]["files"])]
    for sp in m["splits"].values():
        paths += [sp["document_table"]["path"], *(s["path"] for s in sp["shards"])]
    seen: set[str] = set()
    for path in paths:
        key = posixpath.normpath(path) if isinstance(path, str) else repr(path)
        if key in seen:
            raise c.fail("splits", f"the file {path!r} is listed more than once")
        seen.add(key)


def validate(manifest: Any, where: str = MANIFEST_NAME) -> dict[str, Any]:
    """Check a parsed manifest against the schema and its own hashes; return it."""
    c = _Check(where)
    if not isinstance(manifest, dict):
        raise c.fail("(top)", "expected a JSON object")
    _check_format(manifest, where, c)
    m = c.obj(manifest, "(top)", (*TOP_KEYS, "environment") if "environment" in manifest else TOP_KEYS)
    if _depth(m) > MAX_DEPTH:
        raise c.fail("(top)", f"nested deeper than {MAX_DEPTH} levels")
    c.str_(m["seqpipe_version"], "seqpipe_version")
    if "environment" in m:  # absent only in manifests written before it was recorded
        env = c.obj(m["environment"], "environment", ENVIRONMENT_KEYS)
        for key in ENVIRONMENT_KEYS:
            c.str_(env[key], f"environment.{key}")
    if not isinstance(m["recipe"], dict):
        raise c.fail("recipe", "expected an object")
    c.hex_(m["recipe_fingerprint"], "recipe_fingerprint")
    if hash_json(m["recipe"]) != m["recipe_fingerprint"]:
        raise c.fail("recipe_fingerprint", "does not match the recipe stored in the manifest")
    for i, inp in enumerate(c.list_(m["inputs"], "inputs")):
        c.file_(inp, f"inputs[{i}]")
    tok = c.obj(m["tokenizer"], "tokenizer", ("kind", "files"))
    c.str_(tok["kind"], "tokenizer.kind")
    for i, f in enumerate(c.list_(tok["files"], "tokenizer.files")):
        c.file_(f, f"tokenizer.files[{i}]")
    _check_vocabulary(m["vocabulary"], c)
    if m["dtype"] not in DTYPES:
        raise c.fail("dtype", f"expected one of {list(DTYPES)}, got {m['dtype']!r}")
    _check_splits(m["splits"], c)
    if not isinstance(m["summary"], dict):
        raise c.fail("summary", "expected an object")
    _check_counts(c, m)
    _check_distinct_paths(c, m)
    _check_seals(m, c)
    return m


def _check_format(manifest: dict[str, Any], where: str, c: _Check) -> None:
    """An older seqpipe's format gets its own message (rebuild); any other unknown format is refused."""
    if manifest.get("format") in OLD_FORMATS:
        raise ManifestError(
            f"{where}: made by an older seqpipe (format {manifest['format']}); this version reads {FORMAT}: "
            "rebuild it with `seqpipe build RECIPE`",
            key="format",
            old_format=manifest["format"],
        )
    if manifest.get("format") != FORMAT:
        raise c.fail(
            "format",
            f"this seqpipe reads {FORMAT!r}, got {manifest.get('format')!r}; "
            "rebuild the dataset with this version or use the seqpipe that wrote it",
        )


def _check_vocabulary(vocabulary: Any, c: _Check) -> None:
    reused = isinstance(vocabulary, dict) and "reused_from" in vocabulary
    voc = c.file_(vocabulary, "vocabulary", ("entries", "fingerprint", *(("reused_from",) if reused else ())))
    c.int_(voc["entries"], "vocabulary.entries")
    c.hex_(voc["fingerprint"], "vocabulary.fingerprint")
    if reused:
        src = c.obj(voc["reused_from"], "vocabulary.reused_from", ("dataset", "fingerprint", "clean"))
        c.str_(src["dataset"], "vocabulary.reused_from.dataset")
        c.hex_(src["fingerprint"], "vocabulary.reused_from.fingerprint")
        c.list_(src["clean"], "vocabulary.reused_from.clean")


def _check_splits(splits: Any, c: _Check) -> None:
    """Each split's entries, and shards that tile it: each starts where the one before ended."""
    if not isinstance(splits, dict):
        raise c.fail("splits", "expected an object")
    for name, sp in splits.items():
        k = f"splits.{name}"
        d = c.obj(sp, k, ("documents", "tokens", "document_table", "shards"))
        c.int_(d["documents"], f"{k}.documents")
        total = c.int_(d["tokens"], f"{k}.tokens")
        c.file_(d["document_table"], f"{k}.document_table")
        first = 0
        for j, sh in enumerate(c.list_(d["shards"], f"{k}.shards")):
            sk = f"{k}.shards[{j}]"
            s = c.obj(sh, sk, SHARD_KEYS)
            c.str_(s["path"], f"{sk}.path")
            for num in ("tokens", "documents", "first_token", "bytes"):
                c.int_(s[num], f"{sk}.{num}")
            c.hex_(s["hash"], f"{sk}.hash")
            c.hex_(s["token_hash"], f"{sk}.token_hash")
            if s["first_token"] != first:
                raise c.fail(
                    f"{sk}.first_token", f"expected {first} (shards must tile the split), got {s['first_token']}"
                )
            first += s["tokens"]
        if first != total:
            raise c.fail(f"{k}.tokens", f"shards hold {first} tokens, split says {total}")


def _check_seals(m: dict[str, Any], c: _Check) -> None:
    c.hex_(m["fingerprint"], "fingerprint")
    c.hex_(m["manifest_hash"], "manifest_hash")
    resealed = seal(m)
    if resealed["fingerprint"] != m["fingerprint"]:
        raise c.fail("fingerprint", "does not match the manifest's content (the manifest was edited)")
    if resealed["manifest_hash"] != m["manifest_hash"]:
        raise c.fail("manifest_hash", "does not match the manifest's content (the manifest was edited)")


def read_manifest(directory: Path) -> dict[str, Any]:
    """Read, size-limit, parse and validate ``directory/manifest.json``."""
    path = directory / MANIFEST_NAME
    if not directory.is_dir():
        raise ManifestError(
            f"{directory}: not a directory (expected a dataset written by 'seqpipe build')", path=str(directory)
        )
    if not path.is_file():
        raise ManifestError(
            f"{path}: no manifest; this is not a complete seqpipe dataset "
            "(an interrupted build leaves none: run the build again)",
            path=str(path),
        )
    safe_relative(directory, MANIFEST_NAME, key="manifest")  # a symlink leading outside is not this dataset's
    size = path.stat().st_size
    if size > MAX_MANIFEST_BYTES:
        raise ManifestError(
            f"{path}: manifest is {size} bytes, over the {MAX_MANIFEST_BYTES}-byte limit", path=str(path)
        )
    return parse_manifest(path.read_bytes(), str(path))


def parse_manifest(raw: bytes, where: str) -> dict[str, Any]:
    """Parse and validate a manifest's bytes (``where`` names it in errors)."""
    try:
        data = json.loads(raw.decode("utf-8"), parse_constant=_refuse_constant)
    except (UnicodeDecodeError, json.JSONDecodeError, RecursionError, ValueError) as exc:
        raise ManifestError(f"{where}: not valid JSON ({exc})", path=where) from None
    return validate(data, where)


def _refuse_constant(name: str) -> Any:
    raise ValueError(f"{name} is not allowed")
