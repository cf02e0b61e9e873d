"""The JSON Schema shipped for manifest.json (seqpipe/schemas/manifest-2.schema.json) agrees with
the strict reader, describes every field, and is checked against every manifest the tests build."""

from __future__ import annotations

import json
import tomllib
from pathlib import Path
from typing import Any

import pytest
from conftest import (
    REPO,
    ManifestSchemaError,
    build_dir,
    manifest_schema,
    manifest_schema_problems,
    unschematic_manifests,
    write_project,
)
from jsonschema import Draft202012Validator

import seqpipe._build
from seqpipe.errors import ManifestError
from seqpipe.manifest import FORMAT, MANIFEST_NAME, SCHEMA_FILE, dumps, parse_manifest, seal

HOSTILE = REPO / "fixtures" / "manifests"
CASES: dict[str, dict[str, Any]] = json.loads((HOSTILE / "cases.json").read_text())


def _schema() -> dict[str, Any]:
    return dict(json.loads(SCHEMA_FILE.read_text(encoding="utf-8")))


def test_schema_is_a_valid_draft_2020_12_schema() -> None:
    """The schema is itself valid under the JSON Schema 2020-12 meta-schema and names our format tag."""
    schema = _schema()
    Draft202012Validator.check_schema(schema)  # jsonschema's check against the 2020-12 meta-schema
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    assert schema["properties"]["format"]["const"] == FORMAT


def _described(node: Any, defs: dict[str, Any]) -> bool:
    if "description" in node:
        return True
    ref = node.get("$ref", "")
    return ref.startswith("#/$defs/") and "description" in defs[ref.removeprefix("#/$defs/")]


def _properties(node: Any, where: str = "") -> list[tuple[str, Any]]:
    """Every (key path, schema) of a named property anywhere in ``node``."""
    out: list[tuple[str, Any]] = []
    if isinstance(node, dict):
        for name, sub in node.get("properties", {}).items():
            out.append((f"{where}.{name}", sub))
        for key, sub in node.items():
            out += _properties(sub, f"{where}.{key}" if key not in ("properties",) else where)
    elif isinstance(node, list):
        for i, sub in enumerate(node):
            out += _properties(sub, f"{where}[{i}]")
    return out


def test_every_field_has_a_description() -> None:
    """Every property and every definition in the schema carries a description (its own or its $ref's)."""
    schema = _schema()
    props = _properties(schema)
    assert len(props) >= 30  # the manifest's fields, not an empty walk
    assert [where for where, sub in props if not _described(sub, schema["$defs"])] == []
    assert [name for name, sub in schema["$defs"].items() if "description" not in sub] == []


def test_schema_ships_as_package_data() -> None:
    """pyproject.toml installs seqpipe/schemas/*.json with the package, and the file is there."""
    config = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))
    assert "schemas/*.json" in config["tool"]["setuptools"]["package-data"]["seqpipe"]
    assert SCHEMA_FILE.is_file() and SCHEMA_FILE.parent.name == "schemas"
    assert any(dep.startswith("jsonschema") for dep in config["project"]["optional-dependencies"]["test"])


def test_a_built_manifest_passes_and_is_found_by_the_session_check(built_dataset: Path) -> None:
    """A freshly built manifest passes the schema, and the session's on-disk scan finds and checks it."""
    assert manifest_schema_problems(json.loads((built_dataset / MANIFEST_NAME).read_text())) == []
    accepted, problems = unschematic_manifests(built_dataset)
    assert (accepted, problems) == (1, [])


def test_planted_schema_violation_is_caught_by_the_build_hook(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A build whose manifest breaks the schema (a field of the old format planted) fails in the
    test session's hook before the manifest is written."""
    body = seqpipe._build._manifest_body

    def planted(*args: Any) -> dict[str, Any]:
        out = body(*args)
        out["tokenizer"]["vocab_size"] = out["vocabulary"]["entries"]
        return out

    monkeypatch.setattr(seqpipe._build, "_manifest_body", planted)
    with pytest.raises(ManifestSchemaError, match="vocab_size"):
        build_dir(write_project(tmp_path / "src", files=1, paragraphs=5), tmp_path / "dataset")
    assert not (tmp_path / "dataset" / MANIFEST_NAME).exists()


@pytest.mark.parametrize(
    "edit",
    [
        pytest.param(lambda m: m["inputs"][0].update(size=m["inputs"][0].pop("bytes")), id="inputs-size"),
        pytest.param(lambda m: m["vocabulary"].update(entries=-1), id="negative-entries"),
        pytest.param(lambda m: m["splits"]["train"]["shards"][0].update(file_hash="0" * 32), id="extra-shard-key"),
        pytest.param(lambda m: m["splits"]["train"].update(docs={}), id="extra-split-key"),
        pytest.param(lambda m: m["tokenizer"]["files"].append({"path": "a", "bytes": 1, "hash": "0" * 32, "x": 1}),
                     id="extra-file-key"),
        pytest.param(lambda m: m.update(fingerprint="0" * 31), id="short-fingerprint"),
    ],
)  # fmt: skip
def test_schema_and_reader_refuse_the_same_resealed_edits(built_dataset: Path, edit: Any) -> None:
    """Each re-sealed structural edit of a built manifest is refused by both the schema and the reader."""
    m = json.loads((built_dataset / MANIFEST_NAME).read_text())
    edit(m)
    resealed = seal(m) if "fingerprint" in m and len(m["fingerprint"]) == 32 else m
    assert manifest_schema_problems(resealed) != []
    with pytest.raises(ManifestError):
        parse_manifest(dumps(resealed).encode(), "edited")


@pytest.mark.parametrize("name", sorted(CASES))
def test_hostile_fixtures_schema_agrees_with_reader(name: str) -> None:
    """Each hostile manifest the reader refuses for a schema reason (cases.json: schema = refuses)
    is refused by the schema too; the sealed ones with unsafe paths pass both at parse time (paths
    are refused when used); the others are faults below or beyond what a schema sees."""
    case = CASES[name]
    raw = (HOSTILE / name).read_bytes()
    if case["schema"] == "refuses":
        assert manifest_schema_problems(json.loads(raw)) != []
        with pytest.raises(ManifestError):
            parse_manifest(raw, name)
    elif case["expect"] == "unsafe":
        assert manifest_schema_problems(parse_manifest(raw, name)) == []
    else:
        assert case["schema"] == "n/a" and case["schema_why"]
        with pytest.raises(ManifestError):
            parse_manifest(raw, name)


def test_validator_is_the_2020_12_one() -> None:
    """The session's validator is jsonschema's draft 2020-12 validator for the shipped file."""
    assert isinstance(manifest_schema(), Draft202012Validator)
    assert manifest_schema().schema == _schema()
