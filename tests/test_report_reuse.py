"""The corpus report of a dataset built with ``[vocabulary] reuse_from``: where the vocabulary came
from, and per split the unknown rate and the share of the vocabulary that occurs."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from seqpipe import build, parse_recipe, write_report
from seqpipe.cli import main

SOURCE = """
[[sources]]
kind = "text"
paths = "{folder}/*.txt"
document = "paragraph"
fixed_split = "{split}"
"""
SETTINGS = """
[tokenizer]
kind = "words"
[vocabulary]
min_count = 1
reuse_from = "{reuse}"
"""

# 7 distinct words: ferry, leaves, dock, at, dawn, returns, dusk
BASE = ["ferry leaves dock at dawn", "ferry returns at dusk"]
# train: 4 content tokens, 3 of the base words (ferry, leaves, at) and one unknown (noon);
# validation: 3 content tokens, 2 base words (dock, dusk) and one unknown (fog)
ADDED_TRAIN = ["ferry leaves at noon"]
ADDED_VALIDATION = ["dock fog dusk"]


def _write(root: Path, folder: str, docs: list[str]) -> None:
    (root / folder).mkdir(parents=True)
    (root / folder / "a.txt").write_text("\n\n".join(docs) + "\n", encoding="utf-8")


def _build(root: Path, name: str, sources: dict[str, str], reuse: str) -> Path:
    """Build ``sources`` (folder -> the split all its documents go to) into out/NAME."""
    text = f'[dataset]\nname = "{name}"\n'
    text += "".join(SOURCE.format(folder=folder, split=split) for folder, split in sources.items())
    text += SETTINGS.format(reuse=reuse)
    out = root / "out" / name
    build(parse_recipe(text, root), out, workers=1, progress=False)
    return out


def test_report_of_a_reused_vocabulary_gives_unknown_rate_and_coverage(tmp_path: Path) -> None:
    """Per split, the unknown rate is unknown / content tokens and the coverage is the share of the
    vocabulary's non-reserved entries occurring in the split; both name the reused dataset."""
    _write(tmp_path, "base", BASE)
    _write(tmp_path, "added", ADDED_TRAIN)
    _write(tmp_path, "more", ADDED_VALIDATION)
    _build(tmp_path, "base", {"base": "train"}, "")
    added = _build(tmp_path, "added", {"added": "train", "more": "validation"}, "out/base")
    report = write_report(added, tmp_path / "report", progress=False)
    base_fingerprint = json.loads((tmp_path / "out" / "base" / "manifest.json").read_text())["fingerprint"]
    reuse = report["vocabulary_reuse"]
    assert reuse["dataset"] == "out/base" and reuse["fingerprint"] == base_fingerprint
    train, validation = reuse["splits"]["train"], reuse["splits"]["validation"]
    assert train["entries"] == 7 and validation["entries"] == 7
    assert (train["entries_seen"], train["coverage"], train["unknown_rate"]) == (3, 3 / 7, 1 / 4)
    assert (validation["entries_seen"], validation["coverage"], validation["unknown_rate"]) == (2, 2 / 7, 1 / 3)
    md = (tmp_path / "report" / "report.md").read_text(encoding="utf-8")
    assert "## Reused vocabulary" in md and "`out/base`" in md
    assert "| train | 25.00% | 42.86% (3 of 7) |" in md


def test_report_of_a_fitted_vocabulary_has_no_reuse_section(tmp_path: Path) -> None:
    """A dataset that fitted its own vocabulary gets no vocabulary_reuse entry and no such section."""
    _write(tmp_path, "base", BASE)
    base = _build(tmp_path, "base", {"base": "train"}, "")
    report = write_report(base, tmp_path / "report", progress=False)
    assert "vocabulary_reuse" not in report
    assert "Reused vocabulary" not in (tmp_path / "report" / "report.md").read_text(encoding="utf-8")


def test_report_command_names_the_reused_dataset(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """``seqpipe report`` on a dataset with a reused vocabulary says on stdout where it came from."""
    _write(tmp_path, "base", BASE)
    _write(tmp_path, "added", ADDED_TRAIN)
    _build(tmp_path, "base", {"base": "train"}, "")
    added = _build(tmp_path, "added", {"added": "train"}, "out/base")
    assert main(["report", str(added), "-o", str(tmp_path / "report"), "--quiet"]) == 0
    assert "vocabulary reused from out/base" in capsys.readouterr().out
