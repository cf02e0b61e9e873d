"""The command line explains itself (seqpipe/cli.py): every option has help text and is listed in
the README; bad option values name the option typed; each documented exit code holds;
``python -m seqpipe`` runs the same command."""

from __future__ import annotations

import argparse
import re
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import REPO, write_project

from seqpipe import __version__
from seqpipe.cli import main, parser
from seqpipe.dataset import open_dataset
from seqpipe.errors import EXIT_DATASET, EXIT_OK, EXIT_USAGE
from seqpipe.manifest import MANIFEST_NAME

README = (REPO / "README.md").read_text(encoding="utf-8")


def commands() -> dict[str, argparse.ArgumentParser]:
    """Each subcommand's parser, by name."""
    (sub,) = [a for a in parser()._actions if isinstance(a, argparse._SubParsersAction)]
    return dict(sub.choices)


def readme_options(command: str) -> str:
    """The README's option list for ``command``: its bullet under "Every option, per command"."""
    match = re.search(rf"^- (?:.*; )?`{command}`: (.*?)(?=^- |\n\n|; `)", README, flags=re.M | re.S)
    assert match is not None, f"README has no option list for {command}"
    return match.group(1)


def test_every_command_is_in_the_readme_table() -> None:
    """Each subcommand the parser knows appears as ``seqpipe NAME`` in the README."""
    for name in commands():
        assert f"`seqpipe {name}" in README, name


@pytest.mark.parametrize("command", sorted(commands()))
def test_every_option_has_help_and_is_listed_in_the_readme(command: str) -> None:
    """Every option and positional argument of a command has non-empty help text, and every
    option string (but -h/--help) appears in that command's README option list."""
    listed = readme_options(command)
    for action in commands()[command]._actions:
        assert action.help and action.help.strip() and action.help != argparse.SUPPRESS, (command, action.dest)
        for option in action.option_strings:
            if option not in ("-h", "--help"):
                assert re.search(rf"`{re.escape(option)}[ `/]", listed), (command, option)


def test_top_level_options_have_help_and_are_in_the_readme() -> None:
    """``seqpipe --help`` and ``--version`` carry help text, and the README names ``--version``."""
    for action in parser()._actions:
        assert action.help and action.help.strip(), action.dest
    assert "`seqpipe --version`" in README


@pytest.mark.parametrize("command", sorted(commands()))
def test_help_prints_and_exits_0(command: str, capsys: pytest.CaptureFixture[str]) -> None:
    """``seqpipe COMMAND --help`` exits 0 and shows a usage line and the command's description."""
    with pytest.raises(SystemExit) as stop:
        main([command, "--help"])
    out = capsys.readouterr().out
    assert stop.value.code == EXIT_OK
    assert out.startswith(f"usage: seqpipe {command}")
    assert commands()[command].description in " ".join(out.split())


def test_renamed_options_are_gone() -> None:
    """``build --cache`` is ``--cache-dir`` and ``report --ngram`` is ``--leakage-n`` (glossary);
    the old spellings are no option strings any more."""
    strings = {command: {s for a in p._actions for s in a.option_strings} for command, p in commands().items()}
    assert "--cache-dir" in strings["build"] and "--cache" not in strings["build"]
    assert "--leakage-n" in strings["report"] and "--ngram" not in strings["report"]


def usage_error(args: list[str], capsys: pytest.CaptureFixture[str]) -> str:
    """Run ``main(args)``, expect argparse's usage exit (2), return its standard error."""
    with pytest.raises(SystemExit) as stop:
        main(args)
    assert stop.value.code == EXIT_USAGE
    return capsys.readouterr().err


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["build", "recipe.toml", "--workers", "0"], "--workers: expected a positive integer, got 0"),
        (["build", "recipe.toml", "--workers", "two"], "--workers: expected an integer, got 'two'"),
        (["demo", "somewhere", "--workers", "-1"], "--workers: expected a positive integer, got -1"),
        (["report", "data", "--leakage-n", "0"], "--leakage-n: expected a positive integer, got 0"),
    ],
)
def test_bad_option_values_name_the_option(args: list[str], message: str, capsys: pytest.CaptureFixture[str]) -> None:
    """A bad value exits 2 before any work, with a message naming the option as typed."""
    assert message in usage_error(args, capsys)


@pytest.mark.parametrize(
    ("args", "option"),
    [
        (["build", "recipe.toml", "-o", "FILE"], "-o/--output"),
        (["build", "recipe.toml", "--cache-dir", "FILE"], "--cache-dir"),
        (["build", "recipe.toml", "--work-dir", "FILE"], "--work-dir"),
        (["report", "data", "-o", "FILE"], "-o/--output"),
        (["demo", "FILE"], "directory"),
    ],
)
def test_an_output_path_that_is_a_regular_file_is_a_usage_error(
    args: list[str], option: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """An output, cache or work directory that names an existing regular file exits 2 naming the
    option and the file, and leaves the file as it was."""
    target = tmp_path / "taken.txt"
    target.write_text("keep me", encoding="utf-8")
    err = usage_error([str(target) if a == "FILE" else a for a in args], capsys)
    assert option in err and "is a file, not a directory" in err and str(target) in err
    assert target.read_text(encoding="utf-8") == "keep me"


@pytest.fixture(scope="module")
def dataset(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The conftest corpus built once in this process."""
    root = tmp_path_factory.mktemp("options")
    out = root / "dataset"
    assert main(["build", str(write_project(root / "src")), "-o", str(out), "--workers", "1", "--quiet"]) == EXIT_OK
    return out


def test_verify_without_a_dataset_exits_4(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """``verify`` on a missing directory, or on a directory without a manifest, is a dataset
    error (4) naming the path, not a verification failure (1)."""
    assert main(["verify", str(tmp_path / "nowhere")]) == EXIT_DATASET
    assert "nowhere" in capsys.readouterr().err
    (tmp_path / "empty").mkdir()
    assert main(["verify", str(tmp_path / "empty")]) == EXIT_DATASET
    assert MANIFEST_NAME in capsys.readouterr().err


def test_inspect_without_a_dataset_exits_4(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """``inspect`` on a missing directory exits 4 naming it."""
    assert main(["inspect", str(tmp_path / "nowhere")]) == EXIT_DATASET
    assert "nowhere" in capsys.readouterr().err


def test_decode_of_an_id_outside_the_vocabulary_is_a_usage_error(
    dataset: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """``decode`` with an id past the vocabulary exits 2 naming the id; a valid id still decodes."""
    entries = len(open_dataset(dataset).vocabulary)
    assert main(["decode", str(dataset), str(entries)]) == EXIT_USAGE
    assert f"id {entries}" in capsys.readouterr().err
    assert main(["decode", str(dataset), "0"]) == EXIT_OK


def test_demo_quiet_prints_no_summary(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """``demo --quiet`` prints only the verification verdict: no corpus line, no build summary."""
    assert main(["demo", str(tmp_path / "demo"), "--quiet"]) == EXIT_OK
    out = capsys.readouterr().out
    assert out.splitlines() == [line for line in out.splitlines() if line.startswith("verify: ok")] != []


def test_report_without_matplotlib_says_it_skipped_the_plots(
    dataset: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """With matplotlib not importable, ``report`` does not claim plots: it says it skipped them
    and how to install them."""
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # makes `import matplotlib...` fail
    monkeypatch.setitem(sys.modules, "matplotlib.backends.backend_agg", None)
    monkeypatch.setitem(sys.modules, "matplotlib.figure", None)
    assert main(["report", str(dataset), "-o", str(tmp_path / "r"), "--quiet"]) == EXIT_OK
    captured = capsys.readouterr()
    assert "rank_frequency" not in captured.out and not (tmp_path / "r" / "rank_frequency.png").exists()
    assert "plots skipped" in captured.err and "pip install '.[plots]'" in captured.err


def test_python_dash_m_seqpipe_runs_the_command() -> None:
    """``python -m seqpipe --version`` (seqpipe/__main__.py) prints the version and exits 0, and a
    usage error there exits 2 as from ``seqpipe``."""
    ok = subprocess.run([sys.executable, "-m", "seqpipe", "--version"], capture_output=True, text=True, cwd=REPO)
    assert ok.returncode == EXIT_OK and ok.stdout.strip() == f"seqpipe {__version__}"
    bad = subprocess.run([sys.executable, "-m", "seqpipe", "nonsense"], capture_output=True, text=True, cwd=REPO)
    assert bad.returncode == EXIT_USAGE and "usage: seqpipe" in bad.stderr
