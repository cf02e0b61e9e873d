"""Manifest schema: strict version, own hashes, limits, and paths that stay inside the dataset."""

from __future__ import annotations

import contextlib
import json
import os
import re
from pathlib import Path
from typing import Any

import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from seqpipe._hashing import hash_json
from seqpipe.errors import ManifestError, SeqpipeError, UnsafePathError
from seqpipe.manifest import FORMAT, dumps, read_manifest, safe_relative, seal, seal_and_dump, validate

HEX = "0" * 32


def minimal() -> dict[str, Any]:
    recipe = {"format": 1}
    return seal(
        {
            "format": FORMAT,
            "seqpipe_version": "0",
            "recipe": recipe,
            "recipe_fingerprint": hash_json(recipe),
            "inputs": [{"path": "a.txt", "bytes": 3, "hash": HEX}],
            "tokenizer": {"kind": "words", "files": []},
            "vocabulary": {"path": "vocab.arrow", "bytes": 10, "hash": HEX, "entries": 5, "fingerprint": HEX},
            "dtype": "uint8",
            "splits": {
                "train": {
                    "documents": 1,
                    "tokens": 4,
                    "document_table": {"path": "documents/train.arrow", "bytes": 1, "hash": HEX},
                    "shards": [
                        {
                            "path": "shards/train/000000.arrow",
                            "tokens": 4,
                            "documents": 1,
                            "first_token": 0,
                            "bytes": 9,
                            "hash": HEX,
                            "token_hash": HEX,
                        }
                    ],
                }
            },
            "summary": {},
        }
    )


def test_sealed_manifest_validates() -> None:
    """A sealed manifest passes validation and round-trips through its text form."""
    m = minimal()
    assert validate(json.loads(dumps(m))) == m


@pytest.mark.parametrize(
    ("edit", "named"),
    [
        (lambda m: m.update(format="seqpipe.manifest/3"), "format: this seqpipe reads"),
        (lambda m: m.update(extra=1), r"\(top\): unknown key"),
        (lambda m: m["splits"]["train"]["shards"][0].update(tokens=5), "splits.train.tokens: shards hold 5"),
        (lambda m: m["splits"]["train"].update(tokens=3), "splits.train.tokens: shards hold 4"),
        (lambda m: m["vocabulary"].update(hash="XYZ"), "vocabulary.hash: expected 32"),
        (lambda m: m.update(dtype="float32"), "dtype: expected one of"),
        (lambda m: m["recipe"].update(format=2), "recipe_fingerprint: does not match"),
        (lambda m: m.pop("inputs"), r"\(top\): missing key"),
    ],
)
def test_edits_are_refused(edit: Any, named: str) -> None:
    """Each edit (version, unknown key, counts, hashes, types) is refused by the check it breaks,
    even re-sealed, so the manifest's own hash is not what refuses it."""
    m = minimal()
    edit(m)
    with pytest.raises(ManifestError, match=named):
        validate(seal(m))


def test_resealed_edit_still_caught_by_structure() -> None:
    """Even re-sealed, a manifest whose shards do not tile the split is refused."""
    m = minimal()
    m["splits"]["train"]["shards"][0]["first_token"] = 1
    with pytest.raises(ManifestError, match="tile"):
        validate(seal(m))


def test_hand_edited_value_breaks_manifest_hash() -> None:
    """Changing any field without resealing breaks the manifest's own hash."""
    m = minimal()
    m["summary"] = {"note": "edited"}
    with pytest.raises(ManifestError, match="edited"):
        validate(m)


@pytest.mark.parametrize("rel", ["/etc/passwd", "../outside.arrow", "shards/../../x", "", "C:/x", "shards\\..\\x"])
def test_escaping_paths_are_refused(tmp_path: Path, rel: str) -> None:
    """Absolute paths, '..', empty parts and drive/backslash forms are refused."""
    with pytest.raises(UnsafePathError):
        safe_relative(tmp_path, rel)


def test_symlink_leading_outside_is_refused(tmp_path: Path) -> None:
    """A symlink inside the dataset that points outside it is refused."""
    outside = tmp_path / "outside"
    outside.mkdir()
    (outside / "secret.arrow").write_bytes(b"x")
    ds = tmp_path / "ds"
    (ds / "shards").mkdir(parents=True)
    os.symlink(outside, ds / "shards" / "train")
    with pytest.raises(UnsafePathError, match="outside"):
        safe_relative(ds, "shards/train/secret.arrow")
    os.symlink(ds / "shards", ds / "inner")  # a link that stays inside is fine
    assert safe_relative(ds, "inner") == ds / "inner"


def test_read_manifest_limits(tmp_path: Path) -> None:
    """Missing, non-JSON, NaN-bearing and too-deep manifests raise ManifestError."""
    with pytest.raises(ManifestError, match="no manifest"):
        read_manifest(tmp_path)
    (tmp_path / "manifest.json").write_text("{not json")
    with pytest.raises(ManifestError, match="not valid JSON"):
        read_manifest(tmp_path)
    (tmp_path / "manifest.json").write_text('{"format": NaN}')
    with pytest.raises(ManifestError):
        read_manifest(tmp_path)
    (tmp_path / "manifest.json").write_text("[" * 100_000 + "]" * 100_000)
    with pytest.raises(ManifestError):
        read_manifest(tmp_path)


JSON = st.recursive(
    st.none() | st.booleans() | st.integers() | st.text(max_size=8),
    lambda kids: st.lists(kids, max_size=4) | st.dictionaries(st.text(max_size=8), kids, max_size=4),
    max_leaves=30,
)


@settings(max_examples=200, deadline=None)
@given(data=JSON)
def test_any_json_gives_manifest_or_our_error(data: Any) -> None:
    """Arbitrary JSON either validates or raises a seqpipe error, never another exception."""
    with contextlib.suppress(SeqpipeError):
        validate(data)


@settings(max_examples=200, deadline=None)
@given(path=st.sampled_from(["splits", "vocabulary", "tokenizer", "inputs", "summary"]), value=JSON)
def test_mutated_sections_give_our_error(path: str, value: Any) -> None:
    """A section of a valid manifest replaced with junk and re-sealed (so the manifest's own hash
    cannot be what refuses it) either still fits the schema or is refused by a ManifestError that
    names that section; no other error escapes."""
    m = minimal()
    assume(value != m[path])
    m[path] = value
    message = ""
    try:
        validate(seal(m))
    except ManifestError as exc:
        message = str(exc)
    assert not message or re.search(rf"manifest\.json: {path}\b", message), message


_JSON_KEYS = st.sampled_from(["path", "bytes", "hash", "a%s", "%", "é", "\n", ""])
_JSON_SCALARS = (
    st.none()
    | st.booleans()
    | st.integers(min_value=-(2**70), max_value=2**70)
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.text(max_size=6)
)
_JSON_TREES = st.recursive(
    _JSON_SCALARS,
    lambda inner: (
        st.lists(inner, max_size=4)
        | st.dictionaries(_JSON_KEYS, inner, max_size=4)
        | st.lists(
            st.fixed_dictionaries({"path": st.text(max_size=4), "bytes": st.integers(0, 99)}), min_size=1, max_size=3
        )
    ),
    max_leaves=20,
)


@settings(max_examples=300, deadline=None)
@given(_JSON_TREES)
def test_dumps_writes_the_bytes_of_json_dumps_with_sorted_keys_and_an_indent(tree: Any) -> None:
    """dumps gives json.dumps(sort_keys=True, indent=2, ensure_ascii=True, allow_nan=False)'s text
    plus a newline, and raises what it raises (NaN, infinities)."""
    manifest = {"entries": tree, "inputs": [{"path": "a", "bytes": 1, "hash": "0" * 32}]}
    try:
        want = json.dumps(manifest, sort_keys=True, indent=2, ensure_ascii=True, allow_nan=False) + "\n"
    except ValueError:
        with pytest.raises(ValueError, match="JSON compliant"):
            dumps(manifest)
        return
    assert dumps(manifest) == want


@settings(max_examples=200, deadline=None)
@given(st.dictionaries(_JSON_KEYS | st.just("fingerprint"), _JSON_TREES, max_size=6))
def test_seal_hashes_the_canonical_json_of_the_body_then_of_body_and_fingerprint(body: dict[str, Any]) -> None:
    """seal's fingerprint is hash_json of the body without the two hashes, and its manifest_hash
    hash_json of that plus the fingerprint (as the module docstring defines them)."""
    try:
        core = {k: v for k, v in body.items() if k not in ("fingerprint", "manifest_hash")}
        want_fp = hash_json(core)
        want_mh = hash_json({**core, "fingerprint": want_fp})
    except ValueError:
        with pytest.raises(ValueError, match="JSON compliant"):
            seal(body)
        return
    sealed = seal(body)
    assert (sealed["fingerprint"], sealed["manifest_hash"]) == (want_fp, want_mh)
    assert {k: v for k, v in sealed.items() if k not in ("fingerprint", "manifest_hash")} == core


_FLAT_LISTS = st.lists(
    st.fixed_dictionaries(
        {"path": st.text(max_size=6), "bytes": st.integers(0, 2**40), "hash": st.text("0123456789abcdef", max_size=4)}
    )
    | st.fixed_dictionaries({"%s": st.integers(-3, 3) | st.text(max_size=3), "é": st.booleans()}),
    min_size=1,
    max_size=4,
)


@settings(max_examples=300, deadline=None)
@given(st.dictionaries(_JSON_KEYS | st.just("inputs") | st.just("fingerprint"), _FLAT_LISTS | _JSON_TREES, max_size=6))
def test_seal_and_dump_gives_what_seal_then_dumps_give(body: dict[str, Any]) -> None:
    """seal_and_dump (top-level lists of flat entries escaped once for both texts) returns seal's
    manifest and dumps' bytes of it, and raises what they raise; the reference is seal + dumps,
    themselves checked above against hash_json and json.dumps."""
    try:
        sealed = seal(body)
        want = dumps(sealed)
    except ValueError:
        with pytest.raises(ValueError, match="JSON compliant"):
            seal_and_dump(body)
        return
    got, text = seal_and_dump(body)
    assert got == sealed and list(got) == list(sealed)
    assert text == want
