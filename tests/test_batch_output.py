"""`seqpipe batches`: what it prints in each format matches the Python API, and its errors name options."""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from seqpipe import build
from seqpipe.batch_output import shown_tokens
from seqpipe.cli import main, parser
from seqpipe.dataset import Dataset, open_dataset
from seqpipe.recipe import parse_recipe
from seqpipe.windows import Batch, BatchStream, stream_fingerprint
from tests.conftest import write_corpus

# Character tokens over paragraphs of several lines, so rows hold newline tokens.
_RECIPE = """\
[[sources]]
kind = "text"
paths = "corpus/*.txt"
document = "paragraph"
[tokenizer]
kind = "chars"
[shards]
tokens = 5000
"""


@pytest.fixture(scope="module")
def dataset(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The conftest ferry corpus as character tokens, built once for this module."""
    root = tmp_path_factory.mktemp("batches")
    write_corpus(root, files=2, paragraphs=20)
    result = build(parse_recipe(_RECIPE, root), root / "dataset", workers=1, progress=False)
    return result.directory


def api_stream(directory: Path, **kwargs: Any) -> tuple[Dataset, BatchStream]:
    ds = open_dataset(directory)
    return ds, ds.split("train").batches(**kwargs)


def run(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    code = main(["batches", *args])
    out, err = capsys.readouterr()
    return code, out, err


def test_jsonl_lines_are_the_api_batches(dataset: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """--format jsonl prints one object per batch, equal to the API batches from --start-step on."""
    code, out, _ = run(
        capsys, str(dataset), "--batch-size", "3", "--window", "9", "--seed", "2", "--start-step", "4", "--limit", "3",
        "--format", "jsonl",
    )  # fmt: skip
    assert code == 0
    _, stream = api_stream(dataset, batch_size=3, window=9, seed=2)
    rows = [json.loads(line) for line in out.splitlines()]
    assert [r["step"] for r in rows] == [4, 5, 6]
    for row in rows:
        want = stream.batch(row["step"])
        assert row["inputs"] == want.inputs.tolist() and row["targets"] == want.targets.tolist()
        assert row["starts"] == want.starts.tolist() and "mask" not in row


def test_hash_is_the_stream_fingerprint(dataset: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """--format hash prints stream_fingerprint of the batches the same API settings give."""
    args = ["--batch-size", "2", "--window", "12", "--order", "sequential", "--epoch", "1", "--start-step", "3"]
    code, out, _ = run(capsys, str(dataset), *args, "--format", "hash")
    assert code == 0
    _, stream = api_stream(dataset, batch_size=2, window=12, order="sequential", epoch=1, start_step=3)
    assert out.strip() == stream_fingerprint(iter(stream))


def test_keep_last_reaches_the_stream(dataset: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """--keep-last reads the epoch's last, smaller batch that the default drops."""
    _, dropped = api_stream(dataset, batch_size=7, window=5, seed=1)
    _, kept = api_stream(dataset, batch_size=7, window=5, seed=1, keep_last=True)
    assert len(kept) == len(dropped) + 1  # this split's window count is not a multiple of 7
    code, out, _ = run(capsys, str(dataset), "--batch-size", "7", "--window", "5", "--seed", "1", "--keep-last",
                       "--format", "jsonl")  # fmt: skip
    assert code == 0
    rows = [json.loads(line) for line in out.splitlines()]
    assert len(rows) == len(kept) and len(rows[-1]["starts"]) < 7


def _rows_shown(out: str) -> list[list[str]]:
    """The text output cut into rows: each row's lines, from its 'row' line on."""
    rows: list[list[str]] = []
    for line in out.splitlines():
        if line.startswith("  row "):
            rows.append([line])
        elif line.startswith("    "):
            rows[-1].append(line)
    return rows


def test_text_rows_say_where_they_start_and_escape_newlines(dataset: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Text output: each row names its first token's offset; newline tokens are shown as \\n."""
    code, out, _ = run(capsys, str(dataset), "--batch-size", "4", "--window", "40", "--limit", "3")
    assert code == 0
    ds, stream = api_stream(dataset, batch_size=4, window=40)
    batches: list[Batch] = [stream.batch(k) for k in range(3)]
    rows = _rows_shown(out)
    assert [r[0] for r in rows] == [f"  row {i} from token {s}" for b in batches for i, s in enumerate(b.starts)]
    assert [r[1] for r in rows] == [f"    inputs : {shown_tokens(ds.encoder, x)}" for b in batches for x in b.inputs]
    newline = ds.encoder.encode("\n")
    assert any(np.isin(newline, b.inputs).all() for b in batches)  # the rows shown do hold a newline
    assert "[\\n]" in out


def test_text_shows_boundaries(dataset: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """With --boundaries each text row lists the target positions where a document starts."""
    code, out, _ = run(capsys, str(dataset), "--batch-size", "3", "--window", "200", "--limit", "2", "--boundaries")
    assert code == 0
    _, stream = api_stream(dataset, batch_size=3, window=200, boundaries=True)
    masks = [row for k in range(2) for row in stream.batch(k).mask]  # type: ignore[union-attr]
    shown = [r[3] for r in _rows_shown(out)]
    assert any(m.any() for m in masks)  # 200 characters span a paragraph break somewhere
    for line, mask in zip(shown, masks, strict=True):
        where = mask.nonzero()[0].tolist()
        expected = f"at target {', '.join(map(str, where))}" if where else "no document starts"
        assert line.startswith("    boundaries: ") and expected in line


class _Tokens:
    """Stands in for an encoder: token id i is ``texts[i]``."""

    def __init__(self, texts: list[str]) -> None:
        self.texts = texts

    def token_text(self, token_id: int) -> str:
        return self.texts[token_id]


def test_shown_tokens_escape_control_characters() -> None:
    """Control characters and line separators in a token are escaped, so a row stays one line."""
    tokens = _Tokens(["a", "\t", "\n", "\r\n", "\x1b[0m", "\x85", "\u2028", "\u00e9"])
    shown = shown_tokens(tokens, np.arange(8))  # type: ignore[arg-type]
    assert shown == "[a][\\t][\\n][\\r\\n][\\x1b[0m][\\x85][\\u2028][\u00e9]"
    assert shown_tokens(tokens, np.zeros(10, dtype=int), width=8) == "[a][a][…"  # type: ignore[arg-type]


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--batch-size", "0", "--window", "8"], "--batch-size: expected a positive integer, got 0"),
        (["--batch-size", "2", "--window", "0"], "--window: expected a positive integer, got 0"),
        (["--batch-size", "2", "--window", "8", "--rank", "1"], "--rank: expected an integer <= 0, got 1"),
        (["--batch-size", "2", "--window", "8", "--seed", "-1"], "--seed: expected an integer >= 0, got -1"),
        (["--batch-size", "2", "--window", "8", "--start-step", "99999"], "--start-step: expected at most"),
        (["--batch-size", "2", "--window", "8", "--limit", "-1"], "--limit: expected an integer >= 0, got -1"),
    ],
)
def test_errors_name_the_option_typed(
    dataset: Path, capsys: pytest.CaptureFixture[str], args: list[str], message: str
) -> None:
    """A bad option value exits 2 with a message that starts with the option as the user typed it."""
    code, _, err = run(capsys, str(dataset), *args)
    assert code == 2
    assert f"seqpipe: error: {message}" in err


def test_every_batches_option_has_help() -> None:
    """Each argument of the batches command carries help text."""
    sub = next(a for a in parser()._actions if isinstance(a, argparse._SubParsersAction))
    actions = sub.choices["batches"]._actions
    assert len(actions) > 10
    assert all(a.help for a in actions), [a.dest for a in actions if not a.help]
