"""The README tells the truth: its recipe parses and its Python examples run as written."""

from __future__ import annotations

import dataclasses
import importlib.util
import json
import os
import re
import subprocess
import sys
from pathlib import Path

from seqpipe.demo import demo_recipe_text, write_demo_corpus
from seqpipe.recipe import parse_recipe

REPO = Path(__file__).resolve().parent.parent
README = (REPO / "README.md").read_text(encoding="utf-8")


ADDED_MARKER = "# added.toml\n"  # first line of the README's "Adding data later" recipe block


def blocks(lang: str) -> list[str]:
    return re.findall(rf"```{lang}\n(.*?)```", README, flags=re.S)


def added_recipe_text() -> str:
    """The README's ``added.toml``: the one toml block whose first line is the marker comment."""
    (text,) = [b for b in blocks("toml") if b.startswith(ADDED_MARKER)]
    return text


def test_readme_recipe_is_valid() -> None:
    """The recipe shown in the README loads without error and keeps its stated reserved tokens."""
    (recipe_text,) = [b for b in blocks("toml") if "[[sources]]" in b and not b.startswith(ADDED_MARKER)]
    recipe = parse_recipe(recipe_text)
    assert recipe.vocabulary.reserved == ("<pad>", "<unk>", "<bos>", "<eos>")
    assert [s.kind for s in recipe.clean] == ["normalize", "lowercase", "collapse_whitespace", "min_length", "dedupe"]


def test_readme_added_recipe_matches_the_demo_recipe() -> None:
    """The README's added.toml reuses data/ferry with exactly the demo recipe's tokenizer and
    vocabulary settings (a difference would be refused at build time)."""
    added = parse_recipe(added_recipe_text())
    base = parse_recipe(demo_recipe_text())
    assert added.vocabulary.reuse_from == "data/ferry"
    assert added.dataset.name != base.dataset.name
    assert added.tokenizer == base.tokenizer
    assert dataclasses.replace(added.vocabulary, reuse_from="") == base.vocabulary


def run_script(folder: Path, name: str, code: str, timeout: float = 300) -> subprocess.CompletedProcess[str]:
    """Save ``code`` as ``folder/name`` and run it with this interpreter in ``folder``, as a user would."""
    (folder / name).write_text(code, encoding="utf-8")
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    return subprocess.run(
        [sys.executable, name], cwd=folder, capture_output=True, text=True, timeout=timeout, env=env, check=False
    )


def test_readme_python_examples_run_as_scripts(tmp_path: Path) -> None:
    """Every README Python block, saved as its own script file, runs in a fresh process (in README
    order, sharing the demo corpus and the dataset the first block builds) and exits 0."""
    write_demo_corpus(tmp_path)
    (tmp_path / "recipe.toml").write_text(demo_recipe_text(), encoding="utf-8")
    # "Adding data later": the new logbooks (a second invented corpus, as the README says) and added.toml
    write_demo_corpus(tmp_path / "added", documents=120, seed=8)
    (tmp_path / "added.toml").write_text(added_recipe_text(), encoding="utf-8")
    code = blocks("python")
    assert len(code) >= 3  # build, batches, loader
    if importlib.util.find_spec("torch") is None:
        code = [c for c in code if "torch" not in c]
    for i, block in enumerate(code):
        done = run_script(tmp_path, f"readme_block_{i}.py", block)
        assert done.returncode == 0, f"README python block {i} failed:\n{block}\n{done.stderr[-3000:]}"
    assert (tmp_path / "data" / "ferry" / "manifest.json").is_file()
    assert os.path.isdir(tmp_path / "data" / "ferry" / "shards")
    added = json.loads((tmp_path / "data" / "ferry-added" / "manifest.json").read_text(encoding="utf-8"))
    assert added["vocabulary"]["reused_from"]["dataset"] == "data/ferry"


def test_unguarded_multi_worker_script_gets_a_worker_error(tmp_path: Path) -> None:
    """A script that calls build(workers=2) without a __main__ guard fails with WorkerError and
    the advice to add the guard, not a BrokenProcessPool traceback."""
    write_demo_corpus(tmp_path)
    (tmp_path / "recipe.toml").write_text(demo_recipe_text(), encoding="utf-8")
    script = (
        "from seqpipe import build, load_recipe\n"
        "result = build(load_recipe('recipe.toml'), 'data/ferry', workers=2, progress=False)\n"
    )
    done = run_script(tmp_path, "unguarded.py", script)
    assert done.returncode != 0
    # the spawned worker's own traceback (it hits the build lock) may interleave with the parent's
    raised = [line for line in done.stderr.splitlines() if line.startswith("seqpipe.errors.WorkerError: ")]
    assert raised, done.stderr[-3000:]
    assert "__main__" in raised[0]
