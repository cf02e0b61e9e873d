"""The README tells the truth: its recipe parses and its Python examples run as written."""

from __future__ import annotations

import os
import re
from pathlib import Path

import pytest

from seqpipe.demo import demo_recipe_text, write_demo_corpus
from seqpipe.recipe import parse_recipe

README = (Path(__file__).resolve().parent.parent / "README.md").read_text(encoding="utf-8")


def blocks(lang: str) -> list[str]:
    return re.findall(rf"```{lang}\n(.*?)```", README, flags=re.S)


def test_readme_recipe_is_valid() -> None:
    """The recipe shown in the README loads without error and keeps its stated reserved tokens."""
    (recipe_text,) = [b for b in blocks("toml") if "[[sources]]" in b]
    recipe = parse_recipe(recipe_text)
    assert recipe.vocabulary.reserved == ("<pad>", "<unk>", "<bos>", "<eos>")
    assert [s.kind for s in recipe.clean] == ["normalize", "lowercase", "collapse_whitespace", "min_length", "dedupe"]


def test_readme_python_examples_run(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Build, batch and (with torch) loader examples run in order on the demo corpus."""
    write_demo_corpus(tmp_path)
    (tmp_path / "recipe.toml").write_text(demo_recipe_text(), encoding="utf-8")
    monkeypatch.chdir(tmp_path)
    code = blocks("python")
    try:
        import torch  # noqa: F401
    except ImportError:
        code = [c for c in code if "torch" not in c]
    namespace: dict[str, object] = {}
    for block in code:
        exec(compile(block, "README.md", "exec"), namespace)  # the README's own code, as a user runs it
    assert (tmp_path / "data" / "ferry" / "manifest.json").is_file()
    assert os.path.isdir(tmp_path / "data" / "ferry" / "shards")
