"""Fuzzed dataset files never crash a reader: bit flips and extreme integers written over shards,
documents tables, the vocabulary and the byte-pair merge table either read or raise one of our
errors, without a signal, a hang or any other exception.

Each batch of cases runs in a child process, so a case that kills the interpreter (a read outside a
memory map) fails the test and names the case instead of ending the test run. Seeded: the same
seed gives the same cases."""

from __future__ import annotations

import json
import random
import struct
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from conftest import REPO, build_dir, skip_unless_full, write_corpus

FULL_CASES = 1200
SAMPLE_CASES = 50
BATCH = 150  # cases per child process: enough to amortise its start-up, few enough to time out cleanly

RECIPE = """\
[dataset]
name = "ferry-fuzz"
[[sources]]
kind = "text"
paths = "corpus/*.txt"
document = "paragraph"
[tokenizer]
kind = "bpe"
[vocabulary]
cap = 300
[shards]
tokens = 400
"""

# Integers that break naive readers when written over a length, offset or count field.
EXTREMES = (
    (4, 0x7FFFFFFF),
    (4, 0xFFFFFFFF),
    (4, 0x80000000),
    (8, (1 << 63) - 1),
    (8, 1 << 63),
    (8, (1 << 64) - 1),
    (8, 1 << 40),
    (8, 10**9),
)

CHILD = r"""
import json, sys, traceback
from pathlib import Path
from seqpipe import open_dataset
from seqpipe.errors import SeqpipeError

root = Path(sys.argv[1])
cases = json.loads(Path(sys.argv[2]).read_text())
for case in cases:
    path = root / case["file"]
    original = path.read_bytes()
    data = bytearray(original)
    at, new = case["at"], bytes.fromhex(case["bytes"])
    data[at : at + len(new)] = new
    path.write_bytes(bytes(data))
    print("start", case["id"], flush=True)
    try:
        ds = open_dataset(root)
        _ = ds.vocabulary
        enc = ds.encoder
        for name in ds.splits:
            split = ds.split(name)
            _ = split.documents
            stream = split.stream
            ids = stream.slice(0, len(stream))
            enc.decode(ids[:64].tolist())
        outcome = "read"
    except SeqpipeError as exc:
        outcome = "refused"
    except BaseException as exc:
        outcome = "crash " + "".join(traceback.format_exception_only(exc)).strip()[:300]
    finally:
        path.write_bytes(original)
    print("done", case["id"], outcome, flush=True)
"""


@pytest.fixture(scope="module")
def bpe_dataset(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A small byte-pair dataset (shards, documents tables, vocabulary, merge table)."""
    root = tmp_path_factory.mktemp("fuzz")
    write_corpus(root / "src", files=2, paragraphs=20)
    (root / "src" / "recipe.toml").write_text(RECIPE)
    return build_dir(root / "src" / "recipe.toml", root / "dataset")


def fuzz_cases(d: Path, count: int, seed: int) -> list[dict[str, Any]]:
    """``count`` seeded cases: a file of the dataset, a byte offset and the bytes written there."""
    manifest = json.loads((d / "manifest.json").read_text())
    groups = {
        "shard": [s["path"] for sp in manifest["splits"].values() for s in sp["shards"]],
        "documents": [sp["document_table"]["path"] for sp in manifest["splits"].values()],
        "vocabulary": [manifest["vocabulary"]["path"]],
        "merges": [f["path"] for f in manifest["tokenizer"]["files"]],
    }
    assert all(groups.values()), groups
    rnd = random.Random(seed)
    cases = []
    for i in range(count):
        rel = rnd.choice(groups[sorted(groups)[i % len(groups)]])
        size = (d / rel).stat().st_size
        if rnd.random() < 0.5:
            at = rnd.randrange(size)
            value = (d / rel).read_bytes()[at] ^ (1 << rnd.randrange(8))
            new = bytes([value])
        else:
            width, number = rnd.choice(EXTREMES)
            at = rnd.randrange(0, size - width + 1, 4 if width == 4 else 8) if size >= width else 0
            new = struct.pack("<Q" if width == 8 else "<I", number)
        cases.append({"id": i, "file": rel, "at": at, "bytes": new.hex()})
    return cases


def run_cases(d: Path, cases: list[dict[str, Any]], scratch: Path) -> list[str]:
    """Run ``cases`` in child processes of up to ``BATCH`` each (after a child dies, the rest of
    its batch goes to a new one); return what went wrong."""
    failures: list[str] = []
    todo = list(cases)
    while todo:
        batch, todo = todo[:BATCH], todo[BATCH:]
        listing = scratch / "cases.json"
        listing.write_text(json.dumps(batch))
        stderr = ""
        try:
            done = subprocess.run(
                [sys.executable, "-c", CHILD, str(d), str(listing)],
                capture_output=True,
                text=True,
                timeout=60 + 2 * len(batch),
                cwd=REPO,
            )
            out, code, stderr = done.stdout, done.returncode, done.stderr
        except subprocess.TimeoutExpired as exc:
            raw = exc.stdout or ""
            out, code = raw.decode() if isinstance(raw, bytes) else raw, None
        lines = out.splitlines()
        failures += [line for line in lines if line.startswith("done ") and " crash " in line]
        if code != 0:
            started = [int(line.split()[1]) for line in lines if line.startswith("start ")]
            finished = {int(line.split()[1]) for line in lines if line.startswith("done ")}
            last = next((c for c in batch if c["id"] in started and c["id"] not in finished), None)
            failures.append(f"child {'hung' if code is None else f'exit {code}'} during case {last}: {stderr[-500:]}")
            if last is not None:  # the cases after it have not run: give them to a new child
                todo = batch[batch.index(last) + 1 :] + todo
    return failures


def test_fuzzed_reader_cases_sample(bpe_dataset: Path, tmp_path: Path) -> None:
    """~50 seeded fuzz cases over shards, documents, vocabulary and merges: no crash, no hang."""
    failures = run_cases(bpe_dataset, fuzz_cases(bpe_dataset, SAMPLE_CASES, seed=3), tmp_path)
    assert not failures, failures[:10]


@pytest.mark.slow
def test_fuzzed_reader_cases_full(bpe_dataset: Path, tmp_path: Path, request: pytest.FixtureRequest) -> None:
    """1,200 seeded fuzz cases (scripts/test --full) over every kind of dataset file: no crash,
    no hang, no exception but ours."""
    skip_unless_full(request)
    failures = run_cases(bpe_dataset, fuzz_cases(bpe_dataset, FULL_CASES, seed=29), tmp_path)
    assert not failures, f"{len(failures)} failures: {failures[:10]}"


def test_fuzz_cases_are_seeded(bpe_dataset: Path) -> None:
    """The same seed gives the same cases; another seed gives others (the runs are reproducible)."""
    assert fuzz_cases(bpe_dataset, 20, seed=5) == fuzz_cases(bpe_dataset, 20, seed=5)
    assert fuzz_cases(bpe_dataset, 20, seed=5) != fuzz_cases(bpe_dataset, 20, seed=6)


def test_fuzz_harness_reports_a_killed_child(
    bpe_dataset: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A child that dies by a signal is reported as a failure naming the case it was running."""
    monkeypatch.setattr(
        sys.modules[__name__],
        "CHILD",
        "import os, signal, sys\nprint('start 0', flush=True)\nos.kill(os.getpid(), signal.SIGSEGV)\n",
    )
    failures = run_cases(bpe_dataset, fuzz_cases(bpe_dataset, 1, seed=1), tmp_path)
    assert len(failures) == 1 and "exit -11" in failures[0] and "'id': 0" in failures[0]
