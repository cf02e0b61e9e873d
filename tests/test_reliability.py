"""Reliability: builds killed at any point leave a complete dataset or none and re-run cleanly;
random recipe tables only ever give a Recipe or a RecipeError; the CLI never shows a traceback."""

from __future__ import annotations

import copy
import json
import random
import shutil
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
from conftest import REPO, build_dir, full_tests, run_cli, skip_unless_full, write_project
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from seqpipe._verify import verify
from seqpipe.dataset import open_dataset
from seqpipe.errors import RecipeError, SeqpipeError
from seqpipe.manifest import MANIFEST_NAME
from seqpipe.recipe import Recipe, parse_recipe
from seqpipe.staging import PRIVATE

# Big enough that an uninterrupted CLI build takes a second or two (the CLI has no part_bytes
# option, so many files give many parts); shards small enough that there are dozens of them.
KILL_CORPUS: dict[str, int] = {"files": 12, "paragraphs": 200, "shard_tokens": 4000}
SAMPLE_KILLS = 6
FULL_KILLS = 24


def fingerprint_of(directory: Path) -> str | None:
    """The dataset fingerprint in ``directory``'s manifest, or None when there is none."""
    try:
        return str(json.loads((directory / MANIFEST_NAME).read_text())["fingerprint"])
    except (OSError, ValueError, KeyError):
        return None


def build_args(recipe: Path, out: Path) -> list[str]:
    return ["build", str(recipe), "-o", str(out), "--workers", "1", "--quiet"]


def check_after_kill(out: Path, allowed: set[str]) -> bool:
    """After a kill: a complete dataset must be one of ``allowed``; an incomplete one must not open.
    Returns whether the directory held a complete dataset."""
    report = verify(out)
    if report.ok:
        assert report.fingerprint in allowed, f"complete dataset with unexpected fingerprint {report.fingerprint}"
        return True
    try:
        ds = open_dataset(out)
        for name in ds.splits:  # if a manifest were there, reading every split must still fail
            _ = ds.split(name).stream
    except SeqpipeError:
        return False
    pytest.fail(f"{out}: verify reports problems but the dataset opens and reads: {report.problems}")


def rerun_and_check(recipe: Path, out: Path, reference: str) -> None:
    """The same command again gives the uninterrupted build's fingerprint and verifies clean."""
    proc = run_cli(build_args(recipe, out))
    assert proc.returncode == 0, proc.stderr
    assert fingerprint_of(out) == reference
    report = verify(out)
    assert report.ok, report.problems


@pytest.fixture(scope="module")
def kill_setup(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """The kill corpus, its reference build (timed), and an older dataset built with other shards."""
    root = tmp_path_factory.mktemp("kill")
    recipe = write_project(root / "src", **KILL_CORPUS)
    t0 = time.perf_counter()
    proc = run_cli(build_args(recipe, root / "reference"))
    duration = time.perf_counter() - t0  # only used to spread kill times, never asserted on
    assert proc.returncode == 0, proc.stderr
    old_recipe = root / "src" / "old.toml"
    old_recipe.write_text(recipe.read_text().replace(f"tokens = {KILL_CORPUS['shard_tokens']}", "tokens = 9000"))
    old = build_dir(old_recipe, root / "old")
    shutil.rmtree(old / PRIVATE)  # a rebuild over it then costs as much as a fresh one
    reference, previous = fingerprint_of(root / "reference"), fingerprint_of(old)
    assert reference and previous and reference != previous
    return {
        "root": root,
        "recipe": recipe,
        "duration": duration,
        "reference": reference,
        "old": old,
        "old_fingerprint": previous,
    }


def kill_delays(count: int, duration: float, seed: int) -> Iterator[float]:
    """One seeded random delay in each of ``count`` equal slices of [0, duration], so every phase
    from interpreter start to publish gets kills; then more delays in the first half, for runs
    that finished before their delay (a loaded machine makes builds slower or faster)."""
    rnd = random.Random(seed)
    for i in range(count):
        yield (i + rnd.random()) * duration / count
    while True:
        yield rnd.random() * duration / 2


def run_kills(setup: dict[str, Any], count: int, seed: int) -> dict[str, int]:
    """Kill builds until ``count`` were killed (at most ``2 * count`` runs); check each outcome."""
    outcomes = {"killed": 0, "finished": 0, "complete_after_kill": 0}
    delays = kill_delays(count, setup["duration"], seed)
    for i in range(2 * count):
        if outcomes["killed"] >= count:
            break
        out = setup["root"] / f"run-{seed}-{i}"
        allowed = {setup["reference"]}
        if i % 2:  # every other run rebuilds over an older complete dataset
            shutil.copytree(setup["old"], out)
            allowed.add(setup["old_fingerprint"])
        proc = subprocess.Popen(
            [sys.executable, "-m", "seqpipe.cli", *build_args(setup["recipe"], out)],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            cwd=REPO,
        )
        try:
            code = proc.wait(timeout=next(delays))
            assert code == 0
            outcomes["finished"] += 1
        except subprocess.TimeoutExpired:
            proc.send_signal(signal.SIGKILL)
            proc.wait()
            outcomes["killed"] += 1
        if check_after_kill(out, allowed):
            outcomes["complete_after_kill"] += 1
        rerun_and_check(setup["recipe"], out, setup["reference"])
        shutil.rmtree(out)
    return outcomes


def test_random_kills_sample(kill_setup: dict[str, Any]) -> None:
    """SIGKILL at seeded random points of a CLI build: never a wrong complete dataset, never an
    incomplete one that opens, and the re-run gives the uninterrupted build's fingerprint."""
    outcomes = run_kills(kill_setup, SAMPLE_KILLS, seed=1)
    assert outcomes["killed"] >= SAMPLE_KILLS, outcomes


@pytest.mark.slow
def test_random_kills_full(kill_setup: dict[str, Any], request: pytest.FixtureRequest) -> None:
    """The same property over at least 20 kills spread across the whole build."""
    skip_unless_full(request)
    outcomes = run_kills(kill_setup, FULL_KILLS, seed=2)
    assert outcomes["killed"] >= FULL_KILLS >= 20, outcomes


# -- kills at exact points ---------------------------------------------------------------------------
# The child patches the `os` name seen by seqpipe.staging, so it can SIGKILL itself right before
# or after the n-th rename of the publish step, or right after the lock file is created.
CHILD = r"""
import os, signal, sys
import seqpipe.staging as staging
point, n = sys.argv[1], int(sys.argv[2])
calls = [0]
class _Os:
    def __getattr__(self, name):
        return getattr(os, name)
    def rename(self, src, dst):
        calls[0] += 1
        if point == "before-rename" and calls[0] == n:
            os.kill(os.getpid(), signal.SIGKILL)
        os.rename(src, dst)
        if point == "after-rename" and calls[0] == n:
            os.kill(os.getpid(), signal.SIGKILL)
    def write(self, *args, **kwargs):
        written = os.write(*args, **kwargs)
        if point == "lock-created":
            os.kill(os.getpid(), signal.SIGKILL)
        return written
staging.os = _Os()
if point == "manifest-unlink":
    import pathlib
    real_unlink = pathlib.Path.unlink
    def unlink(self, *args, **kwargs):
        if self.name == "manifest.json" and self.parent.name != "stage":
            os.kill(os.getpid(), signal.SIGKILL)
        real_unlink(self, *args, **kwargs)
    pathlib.Path.unlink = unlink
from seqpipe.cli import main
sys.exit(main(sys.argv[3:]))
"""


def run_child(point: str, n: int, recipe: Path, out: Path) -> int:
    proc = subprocess.run(
        [sys.executable, "-c", CHILD, point, str(n), *build_args(recipe, out)],
        capture_output=True,
        text=True,
        cwd=REPO,
        timeout=120,
    )
    assert "Traceback" not in proc.stderr, proc.stderr
    return proc.returncode


@pytest.fixture(scope="module")
def small_setup(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    root = tmp_path_factory.mktemp("points")
    recipe = write_project(root / "src")
    reference = build_dir(recipe, root / "reference")
    old_recipe = root / "src" / "old.toml"
    old_recipe.write_text(recipe.read_text().replace("tokens = 300", "tokens = 700"))
    old = build_dir(old_recipe, root / "old")
    assert fingerprint_of(reference) and fingerprint_of(old) not in (None, fingerprint_of(reference))
    return {
        "root": root,
        "recipe": recipe,
        "reference": reference,
        "old": old,
        "reference_fingerprint": fingerprint_of(reference),
        "old_fingerprint": fingerprint_of(old),
    }


def test_kill_at_publish_steps(small_setup: dict[str, Any]) -> None:
    """A kill before a rename of the publish step (every one with SEQPIPE_FULL_TESTS=1), or after
    the last, over an older dataset leaves the old dataset, the new one or none that opens; the
    re-run always completes with the uninterrupted build's fingerprint."""
    s = small_setup
    entries = [p.name for p in s["reference"].iterdir() if p.name not in (MANIFEST_NAME, PRIVATE)]
    renames = 2 * len(entries) + 1  # each old entry set aside, each new one moved in, the manifest last
    points = range(1, renames + 2) if full_tests() else (1, len(entries) + 1, renames, renames + 1)
    for n in points:
        out = s["root"] / f"before-{n}"
        shutil.copytree(s["old"], out)
        code = run_child("before-rename", n, s["recipe"], out)
        if n == renames + 1:  # past the last rename: the build finishes untouched
            assert code == 0
            assert fingerprint_of(out) == s["reference_fingerprint"]
            continue
        assert code == -signal.SIGKILL
        check_after_kill(out, {s["reference_fingerprint"], s["old_fingerprint"]})
        rerun_and_check(s["recipe"], out, s["reference_fingerprint"])
    out = s["root"] / "after-last"
    shutil.copytree(s["old"], out)
    assert run_child("after-rename", renames, s["recipe"], out) == -signal.SIGKILL
    assert check_after_kill(out, {s["reference_fingerprint"]})  # manifest in place: new dataset complete
    rerun_and_check(s["recipe"], out, s["reference_fingerprint"])


def test_nothing_the_old_manifest_lists_changes_before_it_is_gone(small_setup: dict[str, Any]) -> None:
    """A build without tokenizer.arrow over an older dataset with one, killed as it deletes the
    old manifest, leaves the old dataset complete: its tokenizer.arrow was not removed first."""
    s = small_setup
    bpe_recipe = s["root"] / "src" / "bpe.toml"
    bpe_recipe.write_text(
        s["recipe"]
        .read_text()
        .replace('kind = "words"', 'kind = "bpe"')
        .replace("[shards]", "[vocabulary]\ncap = 300\n[shards]")
    )
    out = build_dir(bpe_recipe, s["root"] / "old-bpe")
    assert (out / "tokenizer.arrow").exists()
    old = fingerprint_of(out)
    assert run_child("manifest-unlink", 0, s["recipe"], out) == -signal.SIGKILL
    report = verify(out)
    assert report.ok, report.problems
    assert report.fingerprint == old
    rerun_and_check(s["recipe"], out, s["reference_fingerprint"])
    assert not (out / "tokenizer.arrow").exists()


def test_kill_while_creating_lock_does_not_block_later_builds(small_setup: dict[str, Any]) -> None:
    """A build killed right after creating its lock file does not lock the directory forever."""
    s = small_setup
    out = s["root"] / "lock-kill"
    assert run_child("lock-created", 0, s["recipe"], out) == -signal.SIGKILL
    assert (out / PRIVATE / "lock").exists()
    rerun_and_check(s["recipe"], out, s["reference_fingerprint"])


# -- random recipe tables ----------------------------------------------------------------------------
_BASE_TOML = """
[dataset]
name = "ferry-logs"
[[sources]]
kind = "text"
paths = ["corpus/*.txt", "more/**/*.txt"]
document = "paragraph"
[[sources]]
kind = "jsonl"
paths = "radio/*.jsonl"
on_bad_record = "skip"
[[clean]]
kind = "normalize"
[[clean]]
kind = "lowercase"
[[clean]]
kind = "replace"
pattern = "[0-9]+"
replacement = "0"
[[clean]]
kind = "strip_control"
[[clean]]
kind = "collapse_whitespace"
[[clean]]
kind = "min_length"
characters = 5
[[clean]]
kind = "dedupe"
[tokenizer]
kind = "{kind}"
[vocabulary]
min_count = 2
cap = 5000
[encode]
prepend_begin = true
[splits]
train = 0.8
validation = 0.1
test = 0.1
seed = 7
[shards]
tokens = 4096
compression = "zstd"
"""
# the bytes tokenizer's vocabulary is fixed, so its recipe has no cap (one is refused)
BASES = [
    parse_recipe(
        _BASE_TOML.replace("{kind}", k).replace("cap = 5000\n", "" if k == "bytes" else "cap = 5000\n")
    ).to_dict()
    for k in ("words", "chars", "bytes", "bpe")
]

_WORDS = [
    "",
    "none",
    "zstd",
    "text",
    "jsonl",
    "parquet",
    "arrow",
    "words",
    "bpe",
    "chars",
    "bytes",
    "NFC",
    "NFKD",
    "paragraph",
    "line",
    "file",
    "error",
    "skip",
    "replace",
    "truncate",
    "auto",
    "<unk>",
    "<eos>",
    "[",
    "(?P<",
    "\\",
    "*",
    "**/*.txt",
    "../x",
    "kind",
    "format",
]
_LEAF = (
    st.none()
    | st.booleans()
    | st.integers()
    | st.integers(min_value=-(2**70), max_value=2**70)
    | st.floats()
    | st.text(max_size=12)
    | st.sampled_from(_WORDS)
)
VALUES = st.recursive(
    _LEAF,
    lambda inner: (
        st.lists(inner, max_size=4) | st.dictionaries(st.sampled_from(_WORDS) | st.text(max_size=6), inner, max_size=4)
    ),
    max_leaves=8,
)

_LIKE: dict[type, st.SearchStrategy[Any]] = {
    bool: st.booleans(),
    int: st.integers(min_value=-3, max_value=1 << 20),
    float: st.floats(min_value=-0.5, max_value=1.5),
    str: st.sampled_from(_WORDS) | st.text(max_size=6),
}


def _paths(obj: Any, prefix: tuple[Any, ...] = ()) -> Iterator[tuple[Any, ...]]:
    """Every key path inside a nesting of dicts and lists (the root is the empty path)."""
    yield prefix
    items = obj.items() if isinstance(obj, dict) else enumerate(obj) if isinstance(obj, list) else ()
    for k, v in items:
        yield from _paths(v, (*prefix, k))


def _mutate(data: st.DataObject, table: dict[str, Any]) -> None:
    path = data.draw(st.sampled_from(list(_paths(table))))
    parent: Any = table
    for k in path[:-1]:
        parent = parent[k]
    target = parent[path[-1]] if path else table
    op = data.draw(st.sampled_from(["set", "like", "like", "delete", "add", "rename"]))
    if op == "add" and isinstance(target, dict):
        target[data.draw(st.sampled_from(_WORDS) | st.text(max_size=8))] = data.draw(VALUES)
    elif op == "add" and isinstance(target, list):
        target.append(data.draw(VALUES))
    elif not path:
        return
    elif op == "delete":
        del parent[path[-1]]
    elif op == "like" and not isinstance(target, (dict, list)):  # a plausible value of the same type
        parent[path[-1]] = data.draw(_LIKE.get(type(target), VALUES))
    elif op == "rename" and isinstance(parent, dict):
        parent[path[-1] + data.draw(st.sampled_from(["s", "_", "X"]))] = parent.pop(path[-1])
    else:
        parent[path[-1]] = data.draw(VALUES)


@settings(max_examples=400 if full_tests() else 150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.data())
def test_random_recipe_tables_give_recipe_or_recipe_error(data: st.DataObject) -> None:
    """Mutated recipe tables (wrong types, unknown keys, random values) give a Recipe that
    round-trips, or a RecipeError naming a key under 'recipe' -- never another exception."""
    table = copy.deepcopy(data.draw(st.sampled_from(BASES)))
    for _ in range(data.draw(st.integers(min_value=1, max_value=4))):
        _mutate(data, table)
    error: RecipeError | None
    try:
        recipe = Recipe.from_dict(table)
    except RecipeError as exc:
        error = exc
    else:
        error = None
    if error is not None:
        assert error.key.startswith("recipe"), error.key
        return
    again = Recipe.from_dict(recipe.to_dict())
    assert again == recipe and again.fingerprint == recipe.fingerprint


# -- the command line on bad input -------------------------------------------------------------------
def _recipe_case(text: str, corpus: Callable[[Path], None] | None = None) -> Callable[[Path], list[str]]:
    def setup(tmp: Path) -> list[str]:
        write_project(tmp)
        if corpus is not None:
            corpus(tmp)
        (tmp / "recipe.toml").write_text(text)
        return build_args(tmp / "recipe.toml", tmp / "out")

    return setup


def _bytes_recipe(tmp: Path) -> list[str]:
    (tmp / "recipe.toml").write_bytes(b'[[sources]]\nkind = "text"\npaths = "caf\xe9/*.txt"\n')
    return build_args(tmp / "recipe.toml", tmp / "out")


def _invalid_utf8(tmp: Path) -> None:
    (tmp / "corpus" / "log-001.txt").write_bytes(b"Day 1: the Quill left Eastreach.\n\nfare \xff\xfe box\n")


def _empty(tmp: Path) -> None:
    for f in (tmp / "corpus").iterdir():
        f.write_text("\n \n\t\n\n")


_GOOD = '[[sources]]\nkind = "text"\npaths = "corpus/*.txt"\ndocument = "paragraph"\n'


def _dataset_case(edit: Callable[[Path], None], *args: str) -> Callable[[Path], list[str]]:
    def setup(tmp: Path) -> list[str]:
        d = build_dir(write_project(tmp / "src"), tmp / "dataset")
        edit(d)
        return [a.replace("DIR", str(d)) for a in args]

    return setup


def _first_shard(d: Path) -> Path:
    return d / str(json.loads((d / MANIFEST_NAME).read_text())["splits"]["train"]["shards"][0]["path"])


def _flip_shard_byte(d: Path) -> None:
    shard = _first_shard(d)
    raw = bytearray(shard.read_bytes())
    raw[len(raw) // 2] ^= 0x40
    shard.write_bytes(bytes(raw))


def _truncate_shard(d: Path) -> None:
    shard = _first_shard(d)
    shard.write_bytes(shard.read_bytes()[:100])


def _garble_manifest(d: Path) -> None:
    (d / MANIFEST_NAME).write_text((d / MANIFEST_NAME).read_text()[:-40])


CLI_CASES: dict[str, tuple[Callable[[Path], list[str]], int, str]] = {
    # name: (setup returning argv, documented exit code, text the message must hold)
    "no-arguments": (lambda tmp: ["build"], 2, "usage"),
    "missing-recipe": (lambda tmp: build_args(tmp / "nope.toml", tmp / "out"), 2, "recipe file not found"),
    "not-toml": (_recipe_case("[[sources]\nkind = "), 2, "not valid TOML"),
    "recipe-not-utf8": (_bytes_recipe, 2, "not UTF-8"),
    "misspelt-key": (_recipe_case(_GOOD + "[vocabulary]\nmin_cout = 2\n"), 2, "did you mean 'min_count'"),
    "wrong-type": (_recipe_case(_GOOD + "[shards]\ntokens = 'many'\n"), 2, "recipe.shards.tokens"),
    "bad-choice": (_recipe_case(_GOOD + "[tokenizer]\nkind = 'wrds'\n"), 2, "did you mean 'words'"),
    "glob-matches-nothing": (_recipe_case(_GOOD.replace("corpus/*.txt", "ledgers/*.txt")), 3, "ledgers/*.txt"),
    "invalid-utf8-input": (_recipe_case(_GOOD, _invalid_utf8), 3, "log-001.txt"),
    "empty-corpus": (_recipe_case(_GOOD, _empty), 3, "no document"),
    "verify-corrupt-shard": (_dataset_case(_flip_shard_byte, "verify", "DIR"), 1, "problem"),
    "verify-missing-dir": (lambda tmp: ["verify", str(tmp / "nothing-here")], 4, "nothing-here"),
    "inspect-garbled-manifest": (_dataset_case(_garble_manifest, "inspect", "DIR"), 4, "manifest.json"),
    "inspect-missing-dir": (lambda tmp: ["inspect", str(tmp / "nothing-here")], 4, "nothing-here"),
    "batches-truncated-shard": (
        _dataset_case(_truncate_shard, "batches", "DIR", "--batch-size", "2", "--window", "8", "--limit", "1"),
        4,
        "000000.arrow",
    ),
    "batches-verify-corrupt": (
        _dataset_case(
            _flip_shard_byte, "batches", "DIR", "--batch-size", "2", "--window", "8", "--limit", "1", "--verify"
        ),
        1,
        "corrupt",
    ),
    "batches-bad-size": (
        _dataset_case(lambda d: None, "batches", "DIR", "--batch-size", "0", "--window", "8"),
        2,
        "--batch-size: expected a positive integer, got 0",
    ),
}


@pytest.mark.parametrize("case", sorted(CLI_CASES))
def test_cli_bad_input_exit_code_and_no_traceback(case: str, tmp_path: Path) -> None:
    """Each kind of bad input exits with its documented code (cli.py docstring, README "Exit
    codes") and a message, and no traceback or internal error reaches stderr."""
    setup, code, needle = CLI_CASES[case]
    proc = run_cli(setup(tmp_path))
    assert proc.returncode == code, (proc.returncode, proc.stdout, proc.stderr)
    assert "Traceback" not in proc.stderr and "internal error" not in proc.stderr, proc.stderr
    assert needle in proc.stdout + proc.stderr, (proc.stdout, proc.stderr)


# -- interrupts ---------------------------------------------------------------------------------------
@pytest.mark.parametrize(("signum", "code"), [(signal.SIGINT, 130), (signal.SIGTERM, 143)])
def test_an_interrupted_build_stops_early_keeps_the_old_dataset_and_resumes(
    tmp_path: Path, signum: signal.Signals, code: int
) -> None:
    """Ctrl-C (SIGINT) or SIGTERM in the middle of ingesting a default build (tasks on threads)
    drops the queued tasks instead of running them all, exits 130 / 143, leaves the old dataset
    complete, and the same command run again completes with the uninterrupted fingerprint."""
    import os

    recipe = write_project(tmp_path / "src", files=30, paragraphs=200, shard_tokens=4000)
    old_recipe = tmp_path / "src" / "old.toml"
    old_recipe.write_text(recipe.read_text().replace("tokens = 4000", "tokens = 9000"))
    out = build_dir(old_recipe, tmp_path / "out", cache_dir=tmp_path / "old-cache")  # out's cache stays empty
    old = fingerprint_of(out)
    parts = out / PRIVATE / "cache" / "parts"
    env = {k: v for k, v in os.environ.items() if k != "SEQPIPE_DEBUG"}
    env["SEQPIPE_TASK_THREADS"] = "2"  # tasks side by side on threads, as on a two-core machine
    proc = subprocess.Popen(
        [sys.executable, "-m", "seqpipe.cli", "build", str(recipe), "-o", str(out), "--quiet"],
        cwd=REPO,
        env=env,
        stderr=subprocess.PIPE,
        text=True,
    )
    deadline = time.monotonic() + 60
    while not (parts.is_dir() and any(not p.name.startswith(".") for p in parts.iterdir())) and proc.poll() is None:
        assert time.monotonic() < deadline, "the build never cached a part"
        time.sleep(0.005)
    proc.send_signal(signum)
    _, stderr = proc.communicate(timeout=60)
    assert proc.returncode == code, stderr
    assert "Traceback" not in stderr
    cached = sum(1 for p in parts.iterdir() if not p.name.startswith("."))
    assert cached < 30  # the queued parts were dropped, not all read
    report = verify(out)
    assert report.ok and report.fingerprint == old, report.problems
    proc2 = run_cli(build_args(recipe, out))
    assert proc2.returncode == 0, proc2.stderr
    assert verify(out).ok and fingerprint_of(out) != old
