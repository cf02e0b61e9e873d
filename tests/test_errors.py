"""The exception tree (seqpipe/errors.py): every class sits where the module docstring draws it,
derives from the built-ins the drawing names, has the exit code the CLI documents, and carries
its structured attributes."""

from __future__ import annotations

import builtins
import inspect
import re

import pytest

from seqpipe import errors
from seqpipe.errors import (
    BuildLockedError,
    DatasetError,
    IntegrityError,
    RecipeError,
    SeqpipeError,
    SourceError,
    SourceMissingError,
)

# "├── Name(BuiltinA, BuiltinB)   comment": the indentation of the name gives its depth.
TREE_LINE = re.compile(r"^[\s│]*(?:[├└]── )?(?P<name>\w+Error)(?:\((?P<bases>[\w, ]+)\))?")


def drawn_tree() -> dict[str, tuple[str | None, list[str]]]:
    """Class name -> (parent name in the drawing, built-ins named on its line)."""
    out: dict[str, tuple[str | None, list[str]]] = {}
    stack: list[tuple[int, str]] = []
    for line in (errors.__doc__ or "").splitlines():
        match = TREE_LINE.match(line)
        if match is None:
            continue
        depth = match.start("name")
        while stack and stack[-1][0] >= depth:
            stack.pop()
        bases = [b.strip() for b in (match.group("bases") or "").split(",") if b.strip()]
        out[match.group("name")] = (stack[-1][1] if stack else None, bases)
        stack.append((depth, match.group("name")))
    return out


def error_classes() -> dict[str, type[BaseException]]:
    """Every exception class the errors module defines."""
    return {
        name: cls
        for name, cls in vars(errors).items()
        if inspect.isclass(cls) and issubclass(cls, BaseException) and cls.__module__ == errors.__name__
    }


def test_drawing_lists_every_class_once() -> None:
    """The docstring's tree names exactly the classes the module defines, with SeqpipeError at the root."""
    tree = drawn_tree()
    assert set(tree) == set(error_classes())
    assert tree["SeqpipeError"] == (None, [])


@pytest.mark.parametrize("name", sorted(error_classes()))
def test_class_derives_from_its_drawn_parent_and_builtins(name: str) -> None:
    """Each class derives from SeqpipeError, from its parent in the drawing and from every
    built-in exception named on its line."""
    cls = error_classes()[name]
    parent, bases = drawn_tree()[name]
    assert issubclass(cls, SeqpipeError)
    if parent is not None:
        assert issubclass(cls, error_classes()[parent])
    for base in bases:
        assert issubclass(cls, getattr(builtins, base)), base


# The exit codes the command line documents (seqpipe/cli.py docstring, README "Exit codes"):
# 1 verification problems, 2 usage or recipe, 3 input, 4 dataset, 5 locked, 6 a worker died.
EXIT_CODES = {
    "IntegrityError": 1,
    "RecipeError": 2,
    "StreamError": 2,
    "SeqpipeError": 3,
    "SourceError": 3,
    "SourceMissingError": 3,
    "InvalidUtf8Error": 3,
    "RecordError": 3,
    "EmptyCorpusError": 3,
    "PatternTimeoutError": 3,
    "TokenizerError": 3,
    "DatasetError": 4,
    "ManifestError": 4,
    "UnsafePathError": 4,
    "ShardMissingError": 4,
    "ShardCorruptError": 4,
    "OutputWriteError": 4,
    "BuildLockedError": 5,
    "WorkerError": 6,
}


def test_every_class_has_its_documented_exit_code() -> None:
    """exit_code per class matches the table the CLI documents, and the table covers every class."""
    classes = error_classes()
    assert set(EXIT_CODES) == set(classes)
    assert {name: cls.exit_code for name, cls in classes.items()} == EXIT_CODES  # type: ignore[attr-defined]


def test_recipe_error_carries_the_key_path() -> None:
    """RecipeError keeps the key path and the reason apart and prefixes the path in its message."""
    exc = RecipeError("vocabulary.cap", "expected a positive integer, got -3")
    assert (exc.key, exc.reason) == ("vocabulary.cap", "expected a positive integer, got -3")
    assert str(exc) == "vocabulary.cap: expected a positive integer, got -3"
    assert exc.details == {"key": "vocabulary.cap"}
    assert str(RecipeError("", "no sources")) == "no sources"


def test_source_error_says_where() -> None:
    """SourceError keeps path, line and byte offset and names them in its message, in that order."""
    exc = SourceError("logs/a.txt", "not UTF-8", offset=17, line=3)
    assert (exc.path, exc.line, exc.offset) == ("logs/a.txt", 3, 17)
    assert str(exc) == "logs/a.txt, line 3, byte 17: not UTF-8"
    assert str(SourceMissingError("logs/*.txt", "matched no file")) == "logs/*.txt: matched no file"


def test_integrity_error_lists_its_problems() -> None:
    """IntegrityError carries the problem list and counts and lists them in its message."""
    exc = IntegrityError(["shards/a.arrow: hash differs", "docs/b.arrow: missing"])
    assert exc.problems == ["shards/a.arrow: hash differs", "docs/b.arrow: missing"]
    assert str(exc).splitlines() == ["2 problem(s) found:", "shards/a.arrow: hash differs", "docs/b.arrow: missing"]


def test_keyword_details_are_kept() -> None:
    """A plain SeqpipeError subclass keeps keyword details for callers, apart from the message."""
    exc = DatasetError("data/ferry: no split 'dev'", path="data/ferry")
    assert (str(exc), exc.details) == ("data/ferry: no split 'dev'", {"path": "data/ferry"})
    assert isinstance(BuildLockedError("locked"), RuntimeError)
