"""The ``seqpipe`` command (seqpipe/cli.py): every command's happy path, and the documented exit
codes for a bad recipe (2), a missing dataset (4) and a dataset that fails verification (1)."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
from conftest import run_cli, write_project

from seqpipe import __version__
from seqpipe.cli import main
from seqpipe.dataset import load_encoder, open_dataset
from seqpipe.errors import EXIT_DATASET, EXIT_OK, EXIT_USAGE, EXIT_VERIFY_FAILED
from seqpipe.manifest import MANIFEST_NAME
from seqpipe.windows import stream_fingerprint


@pytest.fixture(scope="module")
def cli_build(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    """The conftest corpus built once by ``python -m seqpipe.cli build --json`` in a child
    process; the dataset directory and the command's standard output."""
    root = tmp_path_factory.mktemp("cli")
    recipe = write_project(root / "src")
    out = root / "dataset"
    done = run_cli(["build", str(recipe), "-o", str(out), "--workers", "1", "--quiet", "--json"])
    assert done.returncode == EXIT_OK, done.stderr
    return out, done.stdout


def run(args: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    """``main(args)`` in this process: exit code, standard output, standard error."""
    code = main(args)
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_build_prints_a_json_summary_matching_the_manifest(cli_build: tuple[Path, str]) -> None:
    """``build --json`` exits 0 and prints the directory, the manifest's fingerprint and its summary."""
    out, stdout = cli_build
    summary = json.loads(stdout)
    manifest = json.loads((out / MANIFEST_NAME).read_text(encoding="utf-8"))
    assert Path(summary["directory"]) == out
    assert summary["fingerprint"] == manifest["fingerprint"]
    assert summary["summary"] == manifest["summary"]
    assert summary["parts_reused"] == 0


def test_verify_passes_on_a_fresh_build(cli_build: tuple[Path, str], capsys: pytest.CaptureFixture[str]) -> None:
    """``verify`` exits 0 on what ``build`` wrote, in text and in JSON."""
    out, _ = cli_build
    code, stdout, _ = run(["verify", str(out)], capsys)
    assert code == EXIT_OK and stdout.startswith("ok: ")
    code, stdout, _ = run(["verify", str(out), "--json"], capsys)
    report = json.loads(stdout)
    assert code == EXIT_OK and report["problems"] == []


def test_inspect_shows_the_manifest(cli_build: tuple[Path, str], capsys: pytest.CaptureFixture[str]) -> None:
    """``inspect --json`` prints the manifest itself; the text form names the fingerprint and every split."""
    out, _ = cli_build
    manifest = json.loads((out / MANIFEST_NAME).read_text(encoding="utf-8"))
    code, stdout, _ = run(["inspect", str(out), "--json"], capsys)
    assert code == EXIT_OK and json.loads(stdout) == manifest
    code, stdout, _ = run(["inspect", str(out)], capsys)
    assert code == EXIT_OK and manifest["fingerprint"] in stdout
    assert all(any(line.startswith(name) for line in stdout.splitlines()) for name in manifest["splits"])


def test_batches_json_rows_are_shifted_windows(cli_build: tuple[Path, str], capsys: pytest.CaptureFixture[str]) -> None:
    """``batches --format jsonl`` prints one line per batch whose targets are the inputs shifted by one."""
    out, _ = cli_build
    args = ["batches", str(out), "--batch-size", "2", "--window", "8", "--limit", "3", "--format", "jsonl"]
    code, stdout, _ = run(args, capsys)
    rows = [json.loads(line) for line in stdout.splitlines()]
    assert code == EXIT_OK and [r["step"] for r in rows] == [0, 1, 2]
    for row in rows:
        for inputs, targets in zip(row["inputs"], row["targets"], strict=True):
            assert len(inputs) == 8 and inputs[1:] == targets[:-1]


def test_batches_hash_equals_the_api_fingerprint(
    cli_build: tuple[Path, str], capsys: pytest.CaptureFixture[str]
) -> None:
    """``batches --format hash`` prints the fingerprint the Python API gives for the same stream."""
    out, _ = cli_build
    args = ["batches", str(out), "--batch-size", "2", "--window", "8", "--seed", "3", "--format", "hash"]
    code, stdout, _ = run(args, capsys)
    stream = open_dataset(out).split("train").batches(batch_size=2, window=8, seed=3)
    want = stream_fingerprint(stream.batch(step) for step in range(len(stream)))
    assert code == EXIT_OK and stdout.strip() == want


def test_encode_then_decode_round_trips(cli_build: tuple[Path, str], capsys: pytest.CaptureFixture[str]) -> None:
    """``encode`` prints the tokenizer's ids for a text; ``decode`` of those ids prints the text back."""
    out, _ = cli_build
    code, stdout, _ = run(["encode", str(out), "the Quill left Eastreach"], capsys)
    ids = stdout.split()
    assert code == EXIT_OK
    assert [int(i) for i in ids] == load_encoder(out).encode("the Quill left Eastreach").tolist()
    code, stdout, _ = run(["decode", str(out), *ids], capsys)
    assert code == EXIT_OK and stdout.strip() == "the Quill left Eastreach"


def test_report_writes_its_files(
    cli_build: tuple[Path, str], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """``report -o DIR`` exits 0 and writes report.md and a report.json on the dataset's splits."""
    out, _ = cli_build
    code, _, _ = run(["report", str(out), "-o", str(tmp_path / "report"), "--quiet"], capsys)
    assert code == EXIT_OK
    assert (tmp_path / "report" / "report.md").is_file()
    report = json.loads((tmp_path / "report" / "report.json").read_text(encoding="utf-8"))
    ds = open_dataset(out)
    assert set(report["splits"]) == set(ds.splits)
    assert report["dataset"]["fingerprint"] == ds.fingerprint


def test_demo_builds_and_verifies(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """``demo DIR`` writes the demo corpus, builds it, verifies it and exits 0."""
    code, stdout, _ = run(["demo", str(tmp_path / "demo"), "--quiet"], capsys)
    assert code == EXIT_OK and "verify: ok" in stdout
    assert (tmp_path / "demo" / "dataset" / MANIFEST_NAME).is_file()


def test_version_prints_the_package_version(capsys: pytest.CaptureFixture[str]) -> None:
    """``--version`` prints the package's version and exits 0."""
    with pytest.raises(SystemExit) as stop:
        main(["--version"])
    assert stop.value.code == 0 and capsys.readouterr().out.strip() == f"seqpipe {__version__}"


def test_bad_recipe_exits_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A recipe with an unknown key exits 2 with a message naming the key, and builds nothing."""
    recipe = write_project(tmp_path / "src")
    recipe.write_text(recipe.read_text(encoding="utf-8") + "[vocabulary]\nsize_cap = 3\n", encoding="utf-8")
    code, _, stderr = run(["build", str(recipe), "-o", str(tmp_path / "out"), "--quiet"], capsys)
    assert code == EXIT_USAGE and "size_cap" in stderr
    assert not (tmp_path / "out" / MANIFEST_NAME).exists()


def test_missing_dataset_exits_4(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Commands that read a dataset exit 4 with a message when the directory is not one."""
    for command in (["inspect"], ["batches", "--batch-size", "1", "--window", "4"], ["encode", "x"]):
        args = [command[0], str(tmp_path / "nowhere"), *command[1:]]
        code, _, stderr = run(args, capsys)
        assert code == EXIT_DATASET and "nowhere" in stderr, command


def test_verify_problems_exit_1(
    cli_build: tuple[Path, str], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """``verify`` on a dataset with a changed shard byte exits 1 and names the shard."""
    copy = Path(shutil.copytree(cli_build[0], tmp_path / "copy"))
    shard = (
        copy / json.loads((copy / MANIFEST_NAME).read_text(encoding="utf-8"))["splits"]["train"]["shards"][0]["path"]
    )
    data = bytearray(shard.read_bytes())
    data[-100] ^= 0xFF
    shard.write_bytes(bytes(data))
    code, stdout, stderr = run(["verify", str(copy)], capsys)
    assert code == EXIT_VERIFY_FAILED
    assert shard.name in stdout and "problem(s)" in stderr


@pytest.mark.parametrize(
    "command",
    [
        ["inspect"],
        ["inspect", "--json"],
        ["verify"],
        ["verify", "--json"],
        ["batches", "--batch-size", "2", "--window", "4"],
    ],
)
def test_dataset_of_the_old_format_is_refused_with_what_to_do(
    command: list[str], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A dataset an older seqpipe wrote (format seqpipe-dataset/1) exits 4 with a message that names
    both formats and says to rebuild, from every command that reads a dataset."""
    d = tmp_path / "old"
    d.mkdir()
    shutil.copyfile(Path(__file__).parent.parent / "fixtures" / "manifests" / "old-format-1.json", d / MANIFEST_NAME)
    code, out, err = run([command[0], str(d), *command[1:]], capsys)
    assert code == EXIT_DATASET, (out, err)
    assert "made by an older seqpipe (format seqpipe-dataset/1)" in err
    assert "this version reads seqpipe.manifest/2: rebuild it with `seqpipe build RECIPE`" in err


def test_batches_with_a_window_longer_than_the_split_is_a_usage_error(
    cli_build: tuple[Path, str], capsys: pytest.CaptureFixture[str]
) -> None:
    """``batches`` whose window does not fit the split exits 2 naming the window and the split's length,
    instead of printing an epoch of zero batches."""
    out, _ = cli_build
    tokens = open_dataset(out).split("test").num_tokens
    code, stdout, err = run(
        ["batches", str(out), "--split", "test", "--batch-size", "1", "--window", str(tokens)], capsys
    )
    assert code == EXIT_USAGE and stdout == ""
    assert f"--window: {tokens} tokens" in err and f"holds {tokens} tokens" in err
    code, _, err = run(["batches", str(out), "--split", "test", "--batch-size", "100000", "--window", "2"], capsys)
    assert code == EXIT_USAGE and "--batch-size" in err and "no full batch" in err


def test_report_by_default_writes_outside_the_dataset(
    cli_build: tuple[Path, str], tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """``report DIR`` without ``-o`` writes ./<dataset-name>-report in the working directory, so the
    dataset is unchanged and ``verify`` still passes."""
    out, _ = cli_build
    monkeypatch.chdir(tmp_path)
    code, _, _ = run(["report", str(out.resolve()), "--quiet"], capsys)
    name = open_dataset(out).manifest["recipe"]["dataset"]["name"]
    assert code == EXIT_OK and (tmp_path / f"{name}-report" / "report.json").is_file()
    code, stdout, _ = run(["verify", str(out.resolve())], capsys)
    assert code == EXIT_OK and stdout.startswith("ok: ")


@pytest.fixture(scope="module")
def lowercased(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The conftest corpus built with a lowercase cleaning step."""
    from conftest import build_dir

    root = tmp_path_factory.mktemp("lower")
    recipe = write_project(root / "src")
    text = recipe.read_text(encoding="utf-8").replace("[tokenizer]", '[[clean]]\nkind = "lowercase"\n[tokenizer]')
    recipe.write_text(text, encoding="utf-8")
    return build_dir(recipe, root / "dataset")


def test_encode_applies_the_dataset_cleaning_unless_raw(lowercased: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """On a dataset whose recipe lowercases, ``encode`` (CLI and API) lowercases the text first, so
    mixed-case words get their ids instead of the unknown id; ``--raw`` / ``clean=False`` does not."""
    enc = load_encoder(lowercased)
    unk = enc.vocabulary.unknown_id
    want = enc.encode("the quill left eastreach", clean=False).tolist()
    assert unk not in want
    assert enc.encode("The QUILL left Eastreach").tolist() == want
    code, stdout, _ = run(["encode", str(lowercased), "The QUILL left Eastreach"], capsys)
    assert code == EXIT_OK and [int(i) for i in stdout.split()] == want
    code, stdout, _ = run(["encode", str(lowercased), "--raw", "The QUILL left Eastreach"], capsys)
    raw = [int(i) for i in stdout.split()]
    assert code == EXIT_OK and raw == enc.encode("The QUILL left Eastreach", clean=False).tolist()
    assert unk in raw


def test_decode_shows_reserved_tokens_when_asked(lowercased: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """``decode`` leaves reserved tokens out by default; ``--show-reserved`` prints them by name,
    so an unknown id no longer disappears silently."""
    enc = load_encoder(lowercased)
    unk = enc.vocabulary.unknown_id
    assert unk is not None
    ids = [str(i) for i in [*enc.encode("quill").tolist(), unk]]
    code, stdout, _ = run(["decode", str(lowercased), *ids], capsys)
    assert code == EXIT_OK and "<unk>" not in stdout
    code, stdout, _ = run(["decode", str(lowercased), "--show-reserved", *ids], capsys)
    assert code == EXIT_OK and "quill" in stdout and "<unk>" in stdout
