"""The ``seqpipe`` command: a thin layer over the Python API (no pipeline logic here).

Exit codes: 0 success; 1 verification found problems; 2 usage or recipe error (a bad option
value, an output path that is a regular file, text or ids the tokenizer cannot take); 3 input
error (a source file cannot be read as declared); 4 dataset error (missing, malformed or unsafe;
``verify`` too when there is no dataset to check); 5 another build holds the output directory;
6 a build worker process died;
70 internal error (a bug: please report it).
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import sys
import threading
from collections.abc import Sequence
from pathlib import Path
from typing import Any, Final

from seqpipe.errors import EXIT_OK, EXIT_USAGE, EXIT_VERIFY_FAILED, SeqpipeError, StreamError, TokenizerError

EXIT_INTERNAL = 70


def _print_json(obj: Any) -> None:
    print(json.dumps(obj, indent=2, sort_keys=True, ensure_ascii=False))


def cmd_build(args: argparse.Namespace) -> int:
    from contextlib import nullcontext

    from seqpipe.executors import TaskPool, keep_freed_memory, task_pool

    keep_freed_memory()  # this process is ours: reuse freed arrays' pages (see executors.py)
    # --workers N > 1: start the spawned workers first, so their start-up (an interpreter and
    # the numpy, pyarrow and seqpipe imports) runs while this process imports the same modules
    # and reads the recipe, instead of after the build has begun
    workers = args.workers
    early = workers is not None and workers > 1 and not args.dask_scheduler
    with task_pool(None, workers) if early else nullcontext(None) as pool:
        from seqpipe import build
        from seqpipe.filesystem import is_uri
        from seqpipe.recipe import load_recipe

        recipe = load_recipe(args.recipe)
        if args.dry_run_filters:
            return _preview_filters(recipe, as_json=args.json)
        out: str | Path = Path(recipe.dataset.name)
        if args.output:
            out = args.output if is_uri(args.output) else Path(args.output)
        executor = pool
        client = None
        if args.dask_scheduler:
            from seqpipe.dask_support import connect

            client, dask_executor = connect(args.dask_scheduler)
            executor = TaskPool(dask_executor)
        try:
            result = build(
                recipe,
                out,
                executor=executor,
                workers=None if early else workers,
                cache_dir=args.cache_dir,
                force=args.force,
                progress=False if args.quiet else None,
                work_dir=args.work_dir,
            )
        finally:
            if client is not None:
                client.close()
    if args.json:
        _print_json(
            {
                "directory": str(result.directory),
                "fingerprint": result.fingerprint,
                "seconds": result.seconds,
                "parts": result.parts_total,
                "parts_reused": result.parts_reused,
                "summary": result.manifest["summary"],
            }
        )
    elif not args.quiet:
        print("\n".join(result.summary_lines()))
    return EXIT_OK


def _preview_filters(recipe: Any, *, as_json: bool) -> int:
    from seqpipe.filter_preview import preview_filters

    preview = preview_filters(recipe)
    if as_json:
        _print_json(preview.to_dict())
    else:
        print("\n".join(preview.lines()))
    return EXIT_OK


def cmd_verify(args: argparse.Namespace) -> int:
    from seqpipe._verify import verify
    from seqpipe.storage import open_store

    # no dataset at all is a dataset error (4), as for the other commands; what verify finds
    # in a dataset that is there, a malformed manifest included, is a problem (1)
    open_store(args.directory).read_manifest()
    report = verify(args.directory, against=args.against, expect=args.expect)
    if args.json:
        _print_json(report.to_dict())
    elif report.ok:
        print(
            f"ok: {report.files_checked} files, {report.bytes_checked} bytes verified; fingerprint {report.fingerprint}"
        )
    else:
        for p in report.problems:
            print(p)
        print(f"{len(report.problems)} problem(s) in {args.directory}", file=sys.stderr)
    return EXIT_OK if report.ok else EXIT_VERIFY_FAILED


def _steps(steps: list[Any]) -> str:
    """Cleaning steps by kind, in order (the reused vocabulary's dataset may have other ones)."""
    return ", ".join(str(step.get("kind", "?")) for step in steps if isinstance(step, dict)) or "(none)"


def cmd_inspect(args: argparse.Namespace) -> int:
    from seqpipe.dataset import open_dataset
    from seqpipe.mixture import is_mixture_file, read_mixture, summary_lines

    if is_mixture_file(args.directory):
        lines = summary_lines(
            read_mixture(args.directory).open(), batch_size=args.batch_size, window=args.window, steps=args.steps
        )
        print("\n".join(lines))
        return EXIT_OK

    ds = open_dataset(args.directory)
    m = ds.manifest
    if args.json:
        _print_json(m)
        return EXIT_OK
    print(f"dataset      {args.directory} ({m['recipe']['dataset']['name']})")
    print(f"format       {m['format']}, written by seqpipe {m['seqpipe_version']}")
    print(f"fingerprint  {m['fingerprint']}")
    print(f"recipe       {m['recipe_fingerprint']}")
    env = m.get("environment")
    if env:
        print(
            f"environment  Python {env['python']} (Unicode {env['unicode']}), regex {env['regex']}, "
            f"pyarrow {env['pyarrow']}, numpy {env['numpy']}"
        )
    else:
        print("environment  not recorded (built before seqpipe recorded it)")
    print(f"tokenizer    {m['tokenizer']['kind']}, vocabulary {m['vocabulary']['entries']} entries, ids {m['dtype']}")
    print(f"vocabulary   fingerprint {m['vocabulary']['fingerprint']}")
    reused = m["vocabulary"].get("reused_from")
    if reused:
        print(f"reused from  {reused['dataset']} (dataset fingerprint {reused['fingerprint']})")
    print(f"clean        {_steps(m['recipe'].get('clean', []))}")
    if reused:
        print(f"clean there  {_steps(reused['clean'])}")
    print(f"inputs       {len(m['inputs'])} file(s), {sum(i['bytes'] for i in m['inputs'])} bytes")
    for name in ds.splits:
        sp = m["splits"][name]
        size = sum(s["bytes"] for s in sp["shards"])
        print(
            f"{name:<12} {sp['documents']} documents, {sp['tokens']} tokens, {len(sp['shards'])} shard(s), {size} bytes"
        )
    return EXIT_OK


def cmd_demo(args: argparse.Namespace) -> int:
    from seqpipe import build
    from seqpipe._verify import verify
    from seqpipe.demo import demo_recipe_text, write_demo_corpus
    from seqpipe.recipe import parse_recipe

    root = Path(args.directory)
    corpus = root / "corpus"
    files = write_demo_corpus(corpus)
    (corpus / "recipe.toml").write_text(demo_recipe_text(), encoding="utf-8")
    say = (lambda *_: None) if args.quiet else print  # --quiet: the verdict line only
    say(f"demo corpus: {len(files)} files in {corpus} (recipe: {corpus / 'recipe.toml'})")
    recipe = parse_recipe(demo_recipe_text(), corpus)
    out = root / "dataset"
    result = build(recipe, out, workers=args.workers, progress=False if args.quiet else None)
    say("\n".join(result.summary_lines()))
    report = verify(out)
    if not report.ok:
        for p in report.problems:
            print(p)
        return EXIT_VERIFY_FAILED
    print(f"verify: ok ({report.files_checked} files)")
    say(
        f"next: seqpipe inspect {out}   seqpipe batches {out} --split train --batch-size 2 --window 16 "
        f"--limit 1   seqpipe report {out}"
    )
    return EXIT_OK


# The batches command's options by the BatchStream parameter they set, so an error about a
# parameter names the option the user typed.
_BATCHES_OPTIONS: Final = {
    "batch_size": "--batch-size",
    "window": "--window",
    "order": "--order",
    "seed": "--seed",
    "epoch": "--epoch",
    "rank": "--rank",
    "world_size": "--world-size",
    "start_step": "--start-step",
}


def _option_error(exc: StreamError) -> StreamError:
    """``exc`` with the parameter name at the start of its message replaced by the option name."""
    key = exc.details.get("key")
    if not isinstance(key, str) or key not in _BATCHES_OPTIONS or not exc.message.startswith(f"{key}:"):
        return exc
    return StreamError(_BATCHES_OPTIONS[key] + exc.message[len(key) :], key=key)


def cmd_batches(args: argparse.Namespace) -> int:
    from seqpipe.batch_output import print_batches
    from seqpipe.dataset import open_dataset
    from seqpipe.mixture import is_mixture_file

    if is_mixture_file(args.directory):
        return _mixture_batches(args)
    ds = open_dataset(args.directory, verify=args.verify)
    split = ds.split(args.split or "train")
    try:
        stream = split.batches(**_stream_options(args), keep_last=args.keep_last, positions=args.positions)
    except StreamError as exc:
        raise _option_error(exc) from None
    if not len(stream):
        raise _no_batches(args, split.name, split.num_tokens)
    print_batches(ds, stream, limit=args.limit, fmt=args.format)
    return EXIT_OK


def _stream_options(args: argparse.Namespace) -> dict[str, Any]:
    """The batch-stream settings a dataset split and a mixture take alike."""
    return {
        "batch_size": args.batch_size,
        "window": args.window,
        "order": args.order,
        "seed": args.seed,
        "epoch": args.epoch,
        "rank": args.rank,
        "world_size": args.world_size,
        "boundaries": args.boundaries,
        "start_step": args.start_step,
    }


def _no_batches(args: argparse.Namespace, name: str, tokens: int) -> StreamError:
    """The error for a stream without a single batch: an epoch of none is a mistake, not a result."""
    if args.window + 1 > tokens:
        return StreamError(
            f"--window: {args.window} tokens (plus the one target beyond) is longer than split {name!r}, "
            f"which holds {tokens} tokens; choose a window of at most {max(tokens - 1, 0)}",
            key="window",
        )
    return StreamError(
        f"--batch-size: split {name!r} ({tokens} tokens) gives no full batch of {args.batch_size} "
        f"windows of {args.window} tokens on {args.world_size} rank(s); lower --batch-size or --window, "
        "or pass --keep-last",
        key="batch_size",
    )


def _mixture_batches(args: argparse.Namespace) -> int:
    from seqpipe.batch_output import print_batches
    from seqpipe.mixture import read_mixture

    if args.split is not None:
        raise StreamError("--split: a mixture file names each component's split; leave --split out", key="split")
    if args.keep_last:
        raise StreamError(
            "--keep-last: a mixture has no last, smaller batch (its epochs have no tail)", key="keep_last"
        )
    if args.positions:
        raise StreamError(
            "--positions: not available for a mixture file (a row's component changes per batch)", key="positions"
        )
    opened = read_mixture(args.directory).open(verify=args.verify)
    try:
        stream = opened.batches(**_stream_options(args))
    except StreamError as exc:
        raise _option_error(exc) from None
    print_batches(opened.datasets[0], stream, limit=args.limit, fmt=args.format)
    return EXIT_OK


def cmd_report(args: argparse.Namespace) -> int:
    from seqpipe.dataset import open_dataset
    from seqpipe.report import write_dataset_report

    dataset = open_dataset(args.directory)  # a URI is read from a local copy
    # by default never inside the dataset, whose verification refuses files it does not list
    out = Path(args.output) if args.output else Path(f"{dataset.manifest['recipe']['dataset']['name']}-report")
    report = write_dataset_report(dataset, out, ngram_n=args.leakage_n, progress=not args.quiet and sys.stderr.isatty())
    if report["plots"]:
        print(f"report written to {out} (report.md, report.json, {', '.join(report['plots'])})")
    else:
        print(f"report written to {out} (report.md, report.json)")
        print(f"plots skipped: matplotlib is not installed ({PLOTS_INSTALL} in a seqpipe checkout)", file=sys.stderr)
    if "vocabulary_reuse" in report:
        print(f"vocabulary reused from {report['vocabulary_reuse']['dataset']} (report.md: unknown rate and coverage)")
    return EXIT_OK


def _usage_error(message: str) -> int:
    print(f"seqpipe: error: {message}", file=sys.stderr)
    return EXIT_USAGE


def cmd_encode(args: argparse.Namespace) -> int:
    from seqpipe.dataset import load_encoder

    enc = load_encoder(args.directory)
    try:  # the text is what the user typed: one the tokenizer cannot take is a usage error
        ids = enc.encode(args.text, clean=not args.raw)
    except TokenizerError as exc:
        return _usage_error(f"TEXT: {exc}")
    print(" ".join(str(int(i)) for i in ids))
    return EXIT_OK


def cmd_decode(args: argparse.Namespace) -> int:
    from seqpipe.dataset import load_encoder

    enc = load_encoder(args.directory)
    try:  # as for encode: an id outside the vocabulary is a mistake in the command line
        text = enc.decode(args.ids, show_reserved=args.show_reserved)
    except TokenizerError as exc:
        return _usage_error(f"IDS: {exc}")
    print(text)
    return EXIT_OK


PLOTS_INSTALL: Final = "pip install '.[plots]'"
DASK_INSTALL: Final = "pip install '.[dask]'"


def positive_int(text: str) -> int:
    """An argparse type: an integer >= 1, with a message in the words of the recipe errors."""
    value = _int(text)
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a positive integer, got {value}")
    return value


def _int(text: str) -> int:
    try:
        return int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected an integer, got {text!r}") from None


def directory_path(text: str) -> str:
    """An argparse type: a path that may name a directory (absent or one), or a URI; a path to a
    regular file is refused here, before any work, as a usage error."""
    from seqpipe.filesystem import is_uri

    if not is_uri(text) and Path(text).exists() and not Path(text).is_dir():
        raise argparse.ArgumentTypeError(f"{text} is a file, not a directory; name a new or existing directory")
    return text


URI_DIR_HELP = (
    "dataset directory, or the filesystem URI of a published one (read from a checked local "
    "copy under ~/.cache/seqpipe/copies)"
)


def parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(
        prog="seqpipe", description="Raw text to verified token datasets and reproducible training batches."
    )
    from seqpipe import __version__

    ap.add_argument("--version", action="version", version=f"seqpipe {__version__}", help="print the version and exit")
    sub = ap.add_subparsers(
        dest="command", required=True, metavar="COMMAND", help="one of these (seqpipe COMMAND --help: its options)"
    )
    _add_build(sub)  # the commands in the order the help lists them
    _add_checks(sub)
    _add_demo(sub)
    _add_reading(sub)
    _add_report(sub)
    _add_tokenizer(sub)
    return ap


Subparsers = argparse._SubParsersAction  # argparse has no public name for the add_subparsers() result


def _add_build(sub: Subparsers[argparse.ArgumentParser]) -> None:
    p = sub.add_parser("build", help="build a dataset from a TOML recipe", description="Build a dataset from a recipe.")
    p.add_argument("recipe", help="recipe file (TOML)")
    p.add_argument(
        "-o",
        "--output",
        type=directory_path,
        metavar="DIR|URI",
        help="dataset directory, or a pyarrow filesystem URI such as s3://bucket/prefix (default: ./<dataset.name>)",
    )
    p.add_argument(
        "--work-dir",
        type=directory_path,
        metavar="DIR",
        help="with a URI output: the local directory the build runs in before "
        "it is uploaded (default: CACHE/remote/KEY with --cache-dir, else "
        "~/.cache/seqpipe/remote/KEY)",
    )
    p.add_argument(
        "--workers",
        type=positive_int,
        default=None,
        metavar="N",
        help="processes working on tasks, this one included (N-1 are spawned); "
        "default: this process alone, one thread per core",
    )
    p.add_argument(
        "--dask-scheduler",
        metavar="ADDRESS",
        help=f"run tasks on the Dask cluster at ADDRESS (needs the dask extra: {DASK_INSTALL})",
    )
    p.add_argument(
        "--cache-dir",
        type=directory_path,
        metavar="DIR",
        help="cache directory for ingested parts (default: OUTPUT/.seqpipe/cache)",
    )
    p.add_argument("--force", action="store_true", help="ignore cached parts; rebuild everything")
    p.add_argument(
        "--dry-run-filters",
        action="store_true",
        help="read the inputs and report what each clean step would remove; build nothing",
    )
    p.add_argument("--quiet", action="store_true", help="no progress bars, no summary")
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    p.set_defaults(fn=cmd_build)


def _add_checks(sub: Subparsers[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "verify", help="recompute every hash of a dataset", description="Recompute every hash of a dataset."
    )
    p.add_argument("directory", help="dataset directory or filesystem URI")
    p.add_argument("--json", action="store_true", help="print the report as JSON: files checked, problems, fingerprint")
    p.add_argument("--against", metavar="MANIFEST", help="also compare with a committed manifest.json")
    p.add_argument("--expect", metavar="FINGERPRINT", help="the dataset fingerprint must equal this hex")
    p.set_defaults(fn=cmd_verify)

    p = sub.add_parser(
        "inspect",
        help="show what a dataset's manifest (or a mixture file) holds",
        description="Show a dataset's manifest, or a mixture file's components (MIXTURE.toml).",
    )
    p.add_argument("directory", help=URI_DIR_HELP)
    p.add_argument("--json", action="store_true", help="print the whole manifest as JSON")
    p.add_argument("--batch-size", type=positive_int, metavar="B", help="mixture file: global batch for exact epochs")
    p.add_argument("--window", type=positive_int, metavar="T", help="mixture file: window length for exact epochs")
    p.add_argument("--steps", type=positive_int, metavar="N", help="mixture file: steps in one mixture epoch")
    p.set_defaults(fn=cmd_inspect)


def _add_demo(sub: Subparsers[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "demo",
        help="write the demo corpus, build, verify, summarize",
        description="Write the invented demo corpus into DIR/corpus, build it into DIR/dataset and verify it.",
    )
    p.add_argument(
        "directory",
        nargs="?",
        default="seqpipe-demo",
        type=directory_path,
        metavar="DIR",
        help="where to write (default: seqpipe-demo)",
    )
    p.add_argument(
        "--workers",
        type=positive_int,
        default=1,
        metavar="N",
        help="processes building, this one included (default: 1)",
    )
    p.add_argument("--quiet", action="store_true", help="no progress bars, no build summary")
    p.set_defaults(fn=cmd_demo)


def _add_reading(sub: Subparsers[argparse.ArgumentParser]) -> None:
    from seqpipe.batch_output import FORMATS

    p = sub.add_parser(
        "batches",
        help="show or fingerprint the batch stream of a split or a mixture",
        description="Show or fingerprint the batch stream of a split, or of a mixture file (MIXTURE.toml).",
    )
    p.add_argument("directory", help=URI_DIR_HELP + "; or a mixture file MIXTURE.toml (its components name the splits)")
    p.add_argument("--split", default=None, help="split to read (default: train; not with a mixture file)")
    p.add_argument("--batch-size", type=int, required=True, metavar="B", help="rows per batch on this rank")
    p.add_argument(
        "--window", type=int, required=True, metavar="T", help="window length: tokens per row (inputs and targets)"
    )
    p.add_argument(
        "--order",
        choices=("random", "sequential", "documents", "evaluation"),
        default="random",
        help="random: shuffled windows; sequential: each row continues the previous batch's row; documents: "
        "each row a document or a piece of one, padded; evaluation: every target scored once, from offset 0 "
        "(default: random)",
    )
    p.add_argument("--seed", type=int, default=0, help="seed of the window offset and order (default: 0)")
    p.add_argument("--epoch", type=int, default=0, help="epoch to read; each has its own offset and order (default: 0)")
    p.add_argument("--rank", type=int, default=0, help="this process's rank, 0 .. world size - 1 (default: 0)")
    p.add_argument("--world-size", type=int, default=1, help="number of ranks sharing each global batch (default: 1)")
    p.add_argument(
        "--start-step",
        type=int,
        default=0,
        metavar="STEP",
        help="first batch to show, e.g. a resume point (default: 0)",
    )
    p.add_argument("--limit", type=int, default=None, metavar="K", help="show at most K batches (default: all)")
    p.add_argument(
        "--format",
        choices=FORMATS,
        default="text",
        help="text: decoded tokens per row; jsonl: one JSON object per batch; hash: the stream fingerprint",
    )
    p.add_argument(
        "--keep-last", action="store_true", help="keep the last, smaller batch of the epoch instead of dropping it"
    )
    p.add_argument(
        "--boundaries",
        action="store_true",
        help="mark where documents start (jsonl: a mask per batch; text: target positions per row)",
    )
    p.add_argument(
        "--positions",
        action="store_true",
        help="add per input the document number within the row and the position within the document",
    )
    p.add_argument("--verify", action="store_true", help="hash every file of the dataset before the first batch")
    p.set_defaults(fn=cmd_batches)


def _add_report(sub: Subparsers[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "report",
        help="corpus statistics, leakage checks and baseline perplexities",
        description="Write report.md, report.json and (with matplotlib) a rank-frequency plot.",
    )
    p.add_argument("directory", help=URI_DIR_HELP)
    p.add_argument(
        "-o",
        "--output",
        type=directory_path,
        metavar="DIR",
        help="output directory (default: ./NAME-report in the working directory, NAME the dataset's name; "
        "never inside the dataset unless named here)",
    )
    p.add_argument(
        "--leakage-n",
        type=positive_int,
        default=13,
        metavar="N",
        help="length of the token n-grams compared across splits for leakage (default: 13)",
    )
    p.add_argument("--quiet", action="store_true", help="no progress bars")
    p.set_defaults(fn=cmd_report)


def _add_tokenizer(sub: Subparsers[argparse.ArgumentParser]) -> None:
    p = sub.add_parser("encode", help="encode text with a dataset's tokenizer", description="Print the ids of TEXT.")
    p.add_argument("directory", help="dataset directory")
    p.add_argument("text", metavar="TEXT", help="the text to encode (quote it)")
    p.add_argument("--raw", action="store_true", help="encode TEXT as given, without the dataset's cleaning steps")
    p.set_defaults(fn=cmd_encode)

    p = sub.add_parser("decode", help="decode ids with a dataset's tokenizer", description="Print the text of IDS.")
    p.add_argument("directory", help="dataset directory")
    p.add_argument("ids", nargs="+", type=int, metavar="IDS", help="token ids, separated by spaces")
    p.add_argument(
        "--show-reserved",
        action="store_true",
        help="print reserved tokens (unknown, begin, end, padding) by name instead of leaving them out",
    )
    p.set_defaults(fn=cmd_decode)


class _Terminated(KeyboardInterrupt):
    """SIGTERM, turned into an interrupt so a build stops the way it does on Ctrl-C."""


def _on_sigterm(signum: int, frame: object) -> None:
    raise _Terminated


def main(argv: Sequence[str] | None = None) -> int:
    args = parser().parse_args(argv)
    in_main = threading.current_thread() is threading.main_thread()
    previous = signal.signal(signal.SIGTERM, _on_sigterm) if in_main else None
    try:
        code: int = args.fn(args)
        return code
    except SeqpipeError as exc:
        print(f"seqpipe: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt as exc:
        # the shell's convention: 128 + the signal's number
        terminated = isinstance(exc, _Terminated)
        print(f"seqpipe: {'terminated' if terminated else 'interrupted'}", file=sys.stderr)
        return 143 if terminated else 130
    except BrokenPipeError:
        return EXIT_OK
    except OSError as exc:
        print(f"seqpipe: error: {exc.strerror or exc}: {exc.filename or ''}".rstrip(": "), file=sys.stderr)
        return 3
    except Exception as exc:  # a bug: say so plainly; SEQPIPE_DEBUG=1 shows the traceback
        if os.environ.get("SEQPIPE_DEBUG"):
            raise
        print(
            f"seqpipe: internal error: {type(exc).__name__}: {exc} (please report this; "
            "rerun with SEQPIPE_DEBUG=1 for details)",
            file=sys.stderr,
        )
        return EXIT_INTERNAL
    finally:
        if in_main:
            signal.signal(signal.SIGTERM, previous)


if __name__ == "__main__":
    sys.exit(main())
