"""Shared fixtures: a small deterministic corpus, its recipe, and datasets built from it.

The corpus is invented demo data (logbooks of a river-ferry service that does not exist), made
from a seeded generator so every run writes the same bytes. It is not a reference for anything.
"""

from __future__ import annotations

import functools
import os
import random
import subprocess
import sys
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

import pytest
from hypothesis import settings

# Property tests build datasets, train byte-pair merges and map shards; on a shared 2-core machine one
# example can take longer than Hypothesis's default 200 ms deadline without anything being wrong, so
# the suite runs without a deadline (a slow example is a benchmark matter, not a failure).
settings.register_profile("seqpipe", deadline=None)
settings.load_profile("seqpipe")

REPO = Path(__file__).resolve().parent.parent

# Invented vocabulary of the demo scenario; a few hundred distinct words once numbers are added.
_BOATS = ("Marrow Belle", "Quill", "Old Tansy", "Heron Nine", "Dapple", "Saltwick Maid")
_CREW = ("Odile", "Brann", "Kessa", "Tobiah", "Wren", "Ilse", "Corvin", "Marit")
_PLACES = ("Eastreach", "Lower Fenn", "the Weir Steps", "Cobble Quay", "Nettle Point", "Ashford Landing")
_CARGO = (
    "crates of apples",
    "two goats",
    "a crated harmonium",
    "lamp oil",
    "mail sacks",
    "timber",
    "a bicycle",
    "barrels of cider",
    "wool bales",
    "a school class",
    "seed potatoes",
)
_WEATHER = (
    "fog on the water",
    "a steady drizzle",
    "bright and calm",
    "a gusting westerly",
    "low cloud",
    "thin ice at the margins",
    "a warm south wind",
    "heavy rain upstream",
)
_EVENTS = (
    "the rudder pin worked loose and was replaced",
    "a passenger lost a hat overboard",
    "the bell buoy was silent again",
    "we waited for the lock keeper",
    "the engine coughed twice near the shoals",
    "a heron rode the bow rail",
    "the ramp chain was greased",
    "the tally was checked twice",
    "ropes were coiled and dried",
)

RECIPE = """\
[dataset]
name = "ferry-logs"
[[sources]]
kind = "text"
paths = "corpus/*.txt"
document = "paragraph"
[tokenizer]
kind = "words"
[shards]
tokens = {shard_tokens}
"""


def _paragraph(rnd: random.Random, day: int) -> str:
    boat, crew, place = rnd.choice(_BOATS), rnd.choice(_CREW), rnd.choice(_PLACES)
    lines = [
        f"Day {day}, crossing {rnd.randint(1, 40)}: the {boat} left {place} at "
        f"{rnd.randint(5, 21):02d}:{rnd.randint(0, 59):02d} with {rnd.choice(_CARGO)}."
    ]
    for _ in range(rnd.randint(1, 4)):
        lines.append(f"{crew} noted {rnd.choice(_WEATHER)}; {rnd.choice(_EVENTS)}.")
    if rnd.random() < 0.3:
        lines.append(f"Fare box: {rnd.randint(3, 300)} tokens and {rnd.randint(0, 9)} IOUs.")
    return "\n".join(lines)


def write_corpus(root: Path, *, files: int = 3, paragraphs: int = 30, seed: int = 0) -> list[Path]:
    """Write ``files`` text files of ``paragraphs`` blank-line separated paragraphs under
    ``root/corpus`` (same arguments, same bytes) and return their paths."""
    rnd = random.Random(seed)
    folder = root / "corpus"
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for f in range(files):
        text = "\n\n".join(_paragraph(rnd, f * paragraphs + p) for p in range(paragraphs)) + "\n"
        path = folder / f"log-{f:03d}.txt"
        path.write_text(text, encoding="utf-8")
        paths.append(path)
    return paths


def recipe_text(*, shard_tokens: int = 300) -> str:
    """The corpus's recipe (text paragraphs, word tokens) with ``shard_tokens`` per shard."""
    return RECIPE.format(shard_tokens=shard_tokens)


def write_project(root: Path, *, files: int = 3, paragraphs: int = 30, seed: int = 0, shard_tokens: int = 300) -> Path:
    """Corpus plus ``root/recipe.toml``; returns the recipe path."""
    write_corpus(root, files=files, paragraphs=paragraphs, seed=seed)
    path = root / "recipe.toml"
    path.write_text(recipe_text(shard_tokens=shard_tokens), encoding="utf-8")
    return path


def build_dir(recipe_path: Path, out: Path, **kwargs: object) -> Path:
    """Build ``recipe_path`` into ``out`` in this process with one worker; return ``out``."""
    from seqpipe import build
    from seqpipe.recipe import load_recipe

    build(load_recipe(recipe_path), out, workers=1, progress=False, **kwargs)  # type: ignore[arg-type]
    return out


def run_cli(args: Sequence[str], *, timeout: float = 120) -> subprocess.CompletedProcess[str]:
    """Run ``python -m seqpipe.cli ARGS`` in a fresh process; capture text output."""
    env = {k: v for k, v in os.environ.items() if k != "SEQPIPE_DEBUG"}
    return subprocess.run(
        [sys.executable, "-m", "seqpipe.cli", *args], capture_output=True, text=True, timeout=timeout, env=env, cwd=REPO
    )


def full_tests() -> bool:
    """True when the long runs are asked for (``scripts/test --full`` sets SEQPIPE_FULL_TESTS=1)."""
    return os.environ.get("SEQPIPE_FULL_TESTS", "") not in ("", "0")


def skip_unless_full(request: pytest.FixtureRequest) -> None:
    """Skip a long run unless SEQPIPE_FULL_TESTS=1 or the ``-m`` expression asks for ``slow``
    (``scripts/test`` deselects slow tests; a bare ``pytest`` should stay fast too)."""
    asked = "slow" in (request.config.getoption("-m") or "").replace("not slow", "")
    if not (full_tests() or asked):
        pytest.skip("long run: scripts/test --full (SEQPIPE_FULL_TESTS=1) or pytest -m slow")


@pytest.fixture
def project(tmp_path: Path) -> Path:
    """A small corpus with its recipe under ``tmp_path/src``; the recipe path."""
    return write_project(tmp_path / "src")


@pytest.fixture
def built_dataset(tmp_path: Path, project: Path) -> Path:
    """The small corpus built with ``workers=1`` into ``tmp_path/dataset``."""
    return build_dir(project, tmp_path / "dataset")


# -- every manifest the tests build follows the shipped JSON Schema ---------------------------------
# In this process the build's manifest text is made by seqpipe._build.dumps: wrapped below, every
# build any test runs has its manifest checked before it is written. Builds in other processes
# (the CLI tests) are found on disk at the end of the session: every manifest.json under the
# session's temporary directory that the strict reader accepts must pass the schema too.


@functools.cache
def manifest_schema() -> Any:
    """A validator for seqpipe/schemas/manifest-2.schema.json (JSON Schema draft 2020-12)."""
    import json

    from jsonschema import Draft202012Validator

    from seqpipe.manifest import SCHEMA_FILE

    return Draft202012Validator(json.loads(SCHEMA_FILE.read_text(encoding="utf-8")))


def manifest_schema_problems(manifest: object) -> list[str]:
    """Where ``manifest`` breaks seqpipe/schemas/manifest-2.schema.json (draft 2020-12), if anywhere."""
    return [
        f"{'/'.join(map(str, e.absolute_path)) or '(top)'}: {e.message}"
        for e in manifest_schema().iter_errors(manifest)
    ]


def unschematic_manifests(root: Path) -> tuple[int, list[str]]:
    """(manifests the strict reader accepts under ``root``, problems of those the schema refuses)."""
    from seqpipe.errors import DatasetError
    from seqpipe.manifest import MANIFEST_NAME, parse_manifest

    accepted, problems = 0, []
    for folder, _, files in os.walk(root):  # does not follow symlinks (some tests plant loops)
        if MANIFEST_NAME not in files:
            continue
        path = Path(folder) / MANIFEST_NAME
        try:
            manifest = parse_manifest(path.read_bytes(), str(path))
        except (DatasetError, OSError):
            continue  # hostile test data, refused by the reader as it should be
        accepted += 1
        problems += [f"{path}: {p}" for p in manifest_schema_problems(manifest)]
    return accepted, problems


class ManifestSchemaError(AssertionError):
    """A build wrote a manifest that the shipped JSON Schema refuses."""


def schema_checked(dumps: Callable[[dict[str, Any]], str]) -> Callable[[dict[str, Any]], str]:
    """``dumps`` that first checks the manifest against the schema."""

    def checked(manifest: dict[str, Any]) -> str:
        problems = manifest_schema_problems(manifest)
        if problems:
            raise ManifestSchemaError("the build wrote a manifest the schema refuses:\n" + "\n".join(problems))
        return dumps(manifest)

    return checked


def schema_checked_seal(
    seal_and_dump: Callable[..., tuple[dict[str, Any], str]],
) -> Callable[..., tuple[dict[str, Any], str]]:
    """``seal_and_dump`` that checks the sealed manifest against the schema before it is written."""

    def checked(body: dict[str, Any], *args: Any) -> tuple[dict[str, Any], str]:
        manifest, text = seal_and_dump(body, *args)
        problems = manifest_schema_problems(manifest)
        if problems:
            raise ManifestSchemaError("the build wrote a manifest the schema refuses:\n" + "\n".join(problems))
        return manifest, text

    return checked


@pytest.fixture(autouse=True, scope="session")
def _manifests_follow_the_schema(tmp_path_factory: pytest.TempPathFactory) -> Iterator[None]:
    """Every manifest a build writes in this session passes the JSON Schema (see above)."""
    import seqpipe._build

    original, original_seal = seqpipe._build.dumps, seqpipe._build.seal_and_dump
    seqpipe._build.dumps = schema_checked(original)  # (the build writes through either)
    seqpipe._build.seal_and_dump = schema_checked_seal(original_seal)
    yield
    seqpipe._build.dumps, seqpipe._build.seal_and_dump = original, original_seal
    _, problems = unschematic_manifests(tmp_path_factory.getbasetemp())
    if problems:
        pytest.fail("manifests the reader accepts but the schema refuses:\n" + "\n".join(problems[:20]))
