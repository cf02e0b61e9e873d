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
[vocabulary]
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
    assert r.vocabulary.min_count == 2 and r.vocabulary.reserved == ("<pad>", "<unk>", "<bos>", "<eos>")
    assert r.encode.append_end is True and r.shards.compression == "none"


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
        (
            ("min_count = 2", "min_cout = 2"),
            r"recipe\.vocabulary\.min_cout: unknown key \(did you mean 'min_count'\?\)",
        ),
        (("min_count = 2", 'min_count = "two"'), r"recipe\.vocabulary\.min_count: expected an integer, got 'two'"),
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


def test_markers_need_reserved_tokens() -> None:
    """encode.prepend_begin without a begin token is refused, naming both keys."""
    text = GOOD.replace("min_count = 2", 'min_count = 2\nbegin = ""') + "\n[encode]\nprepend_begin = true\n"
    with pytest.raises(RecipeError, match=r"encode\.prepend_begin.*vocabulary\.begin"):
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


FULL = """
[[sources]]
kind = "jsonl"
paths = "logs/*.jsonl"
on_invalid_utf8 = "replace"
on_bad_record = "skip"
on_oversize = "truncate"
[[clean]]
kind = "min_length"
characters = 4
[tokenizer]
kind = "bpe"
literal_reserved = true
[vocabulary]
reserved = ["<pad>", "<unk>", "<bos>", "<eos>", "<sep>"]
cap = 600
min_count = 2
[encode]
prepend_begin = true
append_end = false
"""


def test_format_2_keys_round_trip() -> None:
    """Every renamed key reads into its field and comes back under the same name from to_dict."""
    r = parse_recipe(FULL)
    d = r.to_dict()
    assert d["format"] == "seqpipe.recipe/2"
    assert "vocab" not in d and d["vocabulary"]["reserved"] == ["<pad>", "<unk>", "<bos>", "<eos>", "<sep>"]
    assert d["vocabulary"]["cap"] == 600 and "max_size" not in d["vocabulary"]
    assert d["encode"] == {"prepend_begin": True, "append_end": False}
    source = d["sources"][0]
    assert (source["on_invalid_utf8"], source["on_bad_record"], source["on_oversize"]) == (
        "replace",
        "skip",
        "truncate",
    )
    assert d["clean"][0] == {"kind": "min_length", "characters": 4}
    assert d["tokenizer"]["literal_reserved"] is True and "vocab_size" not in d["tokenizer"]
    assert d["tokenizer"]["reserved_names"] == d["vocabulary"]["reserved"]
    again = Recipe.from_dict(d)
    assert again == r and again.to_dict() == d and again.fingerprint == r.fingerprint


@pytest.mark.parametrize(
    ("change", "key", "new"),
    [
        (("[vocabulary]", "[vocab]"), r"recipe\.vocab", "vocabulary"),
        (("cap = 600", "max_size = 600"), r"recipe\.vocabulary\.max_size", "cap"),
        (('reserved = ["<pad>"', 'specials = ["<pad>"'), r"recipe\.vocabulary\.specials", "reserved"),
        (
            ("literal_reserved = true", "literal_specials = true"),
            r"recipe\.tokenizer\.literal_specials",
            "literal_reserved",
        ),
        (('kind = "bpe"', 'kind = "bpe"\nvocab_size = 600'), r"recipe\.tokenizer\.vocab_size", r"\[vocabulary\] cap"),
        (("prepend_begin = true", "begin = true"), r"recipe\.encode\.begin", "prepend_begin"),
        (("append_end = false", "end = false"), r"recipe\.encode\.end", "append_end"),
        (
            ('on_invalid_utf8 = "replace"', 'invalid_utf8 = "replace"'),
            r"recipe\.sources\[0\]\.invalid_utf8",
            "on_invalid_utf8",
        ),
        (('on_bad_record = "skip"', 'bad_records = "skip"'), r"recipe\.sources\[0\]\.bad_records", "on_bad_record"),
        (('on_oversize = "truncate"', 'oversize = "truncate"'), r"recipe\.sources\[0\]\.oversize", "on_oversize"),
        (("characters = 4", "chars = 4"), r"recipe\.clean\[0\]\.chars", "characters"),
    ],
)
def test_format_1_keys_are_refused_with_their_new_name(change: tuple[str, str], key: str, new: str) -> None:
    """A recipe-format-1 key fails with one RecipeError naming the old key, its new name and the format change."""
    with pytest.raises(RecipeError, match=rf"^{key}: recipe format 2 renamed it to '?{new}'?"):
        parse_recipe(FULL.replace(*change))


def test_old_format_tag_is_refused() -> None:
    """A recipe stating format 1 (or any other tag) is refused, naming the format this version reads."""
    with pytest.raises(
        RecipeError,
        match=r"recipe\.format: this seqpipe reads recipe format 'seqpipe\.recipe/2', got 1; rename the keys",
    ):
        parse_recipe("format = 1\n" + FULL)
    with pytest.raises(RecipeError, match=r"got 'seqpipe\.recipe/3'$"):
        parse_recipe('format = "seqpipe.recipe/3"\n' + FULL)
    assert parse_recipe('format = "seqpipe.recipe/2"\n' + FULL) == parse_recipe(FULL)


def test_bpe_needs_a_vocabulary_cap() -> None:
    """Byte-pair training grows the vocabulary up to [vocabulary] cap, so cap = 0 (no cap) is refused for bpe."""
    with pytest.raises(RecipeError, match=r"recipe\.vocabulary\.cap: .*'bpe'.*set cap"):
        parse_recipe(FULL.replace("cap = 600\n", ""))
    # other tokenizers keep cap 0 as "no cap"
    assert parse_recipe(
        FULL.replace("cap = 600\n", "").replace('kind = "bpe"\nliteral_reserved = true', 'kind = "words"')
    )


def test_default_reserved_order_puts_padding_at_id_0() -> None:
    """The default reserved tokens start with padding, so zero-filled id arrays are padding."""
    r = parse_recipe(GOOD)
    assert r.vocabulary.reserved.index(r.vocabulary.padding) == 0


@pytest.mark.parametrize("name", [".", "..", "a/b", "../elsewhere", "a\\b"])
def test_dataset_name_must_be_one_plain_directory_name(name: str) -> None:
    """dataset.name is the default output directory: '.', '..' and names with a path separator
    are refused, so a build never defaults into the current directory or outside it."""
    with pytest.raises(RecipeError, match=r"dataset\.name"):
        parse_recipe(GOOD.replace('name = "ferry"', f"name = '{name}'"))


def test_bytes_tokenizer_refuses_a_vocabulary_cap() -> None:
    """A cap on the bytes tokenizer would make dropped byte values unknown (text such as '日本'
    encoding to unknowns), so a recipe with kind = "bytes" and cap > 0 is refused at load."""
    text = GOOD.replace('kind = "chars"', 'kind = "bytes"')
    parse_recipe(text)  # no cap: accepted
    with pytest.raises(RecipeError, match=r"vocabulary\.cap.*bytes"):
        parse_recipe(text.replace("min_count = 2", "min_count = 2\ncap = 100"))
