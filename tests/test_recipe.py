"""Recipe loading: validation messages name key, value and what is allowed; canonical form."""

from __future__ import annotations

from pathlib import Path

import pytest

from seqpipe.errors import RecipeError
from seqpipe.recipe import Recipe, load_recipe, parse_recipe

GOOD = """
[dataset]
name = "ferry"
[[sources]]
kind = "text"
paths = "logs/*.txt"
document = "line"
[[clean]]
kind = "lowercase"
[tokenizer]
kind = "chars"
[vocab]
min_count = 2
[splits]
train = 0.8
validation = 0.1
test = 0.1
[shards]
tokens = 1000
"""


def test_good_recipe_loads_with_defaults() -> None:
    """A valid recipe loads and fills defaults for the sections it leaves out."""
    r = parse_recipe(GOOD)
    assert r.dataset.name == "ferry"
    assert r.tokenizer.kind == "chars"
    assert r.vocab.min_count == 2 and r.vocab.specials == ("<unk>", "<pad>", "<bos>", "<eos>")
    assert r.encode.end is True and r.shards.compression == "none"


def test_canonical_form_round_trips_and_fingerprint_is_stable() -> None:
    """to_dict -> from_dict gives an equal recipe; the fingerprint ignores TOML key order."""
    r = parse_recipe(GOOD)
    again = Recipe.from_dict(r.to_dict())
    assert again == r and again.fingerprint == r.fingerprint
    shuffled = GOOD.replace('[dataset]\nname = "ferry"\n', "") + '\n[dataset]\nname = "ferry"\n'
    assert parse_recipe(shuffled).fingerprint == r.fingerprint
    assert parse_recipe(GOOD.replace("min_count = 2", "min_count = 3")).fingerprint != r.fingerprint


@pytest.mark.parametrize(
    ("change", "match"),
    [
        (("min_count = 2", "min_cout = 2"), r"recipe\.vocab\.min_cout: unknown key \(did you mean 'min_count'\?\)"),
        (("min_count = 2", 'min_count = "two"'), r"recipe\.vocab\.min_count: expected an integer, got 'two'"),
        (("tokens = 1000", "tokens = -3"), r"recipe\.shards\.tokens: expected a positive integer, got -3"),
        (('kind = "chars"', 'kind = "charz"'), r"recipe\.tokenizer\.kind: expected one of .*did you mean 'chars'"),
        (("train = 0.8", "train = 0.9"), r"recipe\.splits\.train: train \+ validation \+ test must be 1"),
        (('document = "line"', 'document = "page"'), r"recipe\.sources\[0\]\.document"),
        (('[[clean]]\nkind = "lowercase"', '[[clean]]\nkind = "lowercas"'), r"recipe\.clean\[0\]\.kind"),
        (("[shards]", "[shardz]"), r"recipe\.shardz: unknown key \(did you mean 'shards'\?\)"),
        (("[[sources]]", "[[source]]"), r"recipe\.source: unknown key"),
    ],
)
def test_bad_recipes_name_the_key(change: tuple[str, str], match: str) -> None:
    """Each mistake is one RecipeError whose message names the key path and the bad value."""
    with pytest.raises(RecipeError, match=match):
        parse_recipe(GOOD.replace(*change))


def test_missing_sources_and_bad_toml() -> None:
    """A recipe without sources, or not TOML at all, is refused clearly."""
    with pytest.raises(RecipeError, match="sources: missing"):
        parse_recipe("[tokenizer]\nkind = 'words'\n")
    with pytest.raises(RecipeError, match="not valid TOML"):
        parse_recipe("[tokenizer\n")


def test_markers_need_specials() -> None:
    """encode.begin without a begin special is refused, naming both keys."""
    text = GOOD.replace("min_count = 2", 'min_count = 2\nbegin = ""') + "\n[encode]\nbegin = true\n"
    with pytest.raises(RecipeError, match=r"encode\.begin.*vocab\.begin"):
        parse_recipe(text)


def test_load_recipe_file_errors(tmp_path: Path) -> None:
    """Missing and non-UTF-8 recipe files give RecipeError naming the file."""
    with pytest.raises(RecipeError, match="recipe file not found"):
        load_recipe(tmp_path / "nope.toml")
    bad = tmp_path / "bad.toml"
    bad.write_bytes(b"\xff\xfe")
    with pytest.raises(RecipeError, match="not UTF-8"):
        load_recipe(bad)
    ok = tmp_path / "r.toml"
    ok.write_text(GOOD)
    assert load_recipe(ok).root == tmp_path.resolve()


@pytest.mark.parametrize("name", [".", "..", "a/b", "../elsewhere", "a\\b"])
def test_dataset_name_must_be_one_plain_directory_name(name: str) -> None:
    """dataset.name is the default output directory: '.', '..' and names with a path separator
    are refused, so a build never defaults into the current directory or outside it."""
    with pytest.raises(RecipeError, match=r"dataset\.name"):
        parse_recipe(GOOD.replace('name = "ferry"', f"name = '{name}'"))
