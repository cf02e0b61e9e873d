"""One exception tree for everything seqpipe raises.

Every error a user can provoke with bad input is a ``SeqpipeError``. Each
subclass also inherits the built-in exception that fits, so callers that
already catch ``ValueError`` or ``FileNotFoundError`` keep working::

    SeqpipeError
    ├── RecipeError(ValueError)              a recipe key is unknown, mistyped or out of range
    ├── SourceError(ValueError)              an input file cannot be read as declared
    │   ├── SourceMissingError(FileNotFoundError)   a glob matched nothing / a file vanished
    │   ├── InvalidUtf8Error                 bytes that are not UTF-8 (path + byte offset)
    │   └── RecordError                      a JSON Lines / Parquet / Arrow record is unusable
    ├── EmptyCorpusError(ValueError)         nothing left to build from (after cleaning)
    ├── PatternTimeoutError(TimeoutError)    a regular expression ran past its per-document time limit
    ├── TokenizerError(ValueError)           text the tokenizer cannot encode or decode
    ├── DatasetError(ValueError)             a built dataset cannot be used
    │   ├── ManifestError                    manifest missing, malformed, wrong version
    │   ├── UnsafePathError(PermissionError) a path escapes the dataset directory
    │   ├── ShardMissingError(FileNotFoundError)
    │   └── ShardCorruptError                a shard is truncated, malformed or hashes wrong
    ├── IntegrityError                       ``verify`` found problems (carries the list)
    ├── BuildLockedError(RuntimeError)       another build holds the output directory
    ├── WorkerError(RuntimeError)            a build worker process died (no result, no Python error)
    ├── OutputWriteError(OSError)            a file of the build cannot be written (disk full)
    └── StreamError(ValueError)              bad batch-stream parameters or resume state

Every class has an ``exit_code`` that the CLI uses (see README, "Exit codes").
"""

from __future__ import annotations

from typing import Any, ClassVar, Final

EXIT_OK: Final = 0
EXIT_VERIFY_FAILED: Final = 1
EXIT_USAGE: Final = 2
EXIT_INPUT: Final = 3
EXIT_DATASET: Final = 4
EXIT_LOCKED: Final = 5
EXIT_WORKER: Final = 6


class SeqpipeError(Exception):
    """Base of every error seqpipe raises on purpose."""

    exit_code: ClassVar[int] = EXIT_INPUT

    def __init__(self, message: str, **details: Any) -> None:
        super().__init__(message)
        self.message = message
        self.details = details

    def __str__(self) -> str:
        return self.message


class RecipeError(SeqpipeError, ValueError):
    """A recipe (TOML or Python) is invalid; ``key`` names the key path."""

    exit_code = EXIT_USAGE

    def __init__(self, key: str, message: str) -> None:
        super().__init__(f"{key}: {message}" if key else message, key=key)
        self.key = key
        self.reason = message


class SourceError(SeqpipeError, ValueError):
    """An input file cannot be read as the recipe declares it."""

    def __init__(self, path: str, message: str, *, offset: int | None = None, line: int | None = None) -> None:
        where = path
        if line is not None:
            where += f", line {line}"
        if offset is not None:
            where += f", byte {offset}"
        super().__init__(f"{where}: {message}", path=path, offset=offset, line=line)
        self.path = path
        self.offset = offset
        self.line = line


class SourceMissingError(SourceError, FileNotFoundError):
    """A source glob matched no file, or a listed file is gone."""


class InvalidUtf8Error(SourceError):
    """Bytes that do not decode as UTF-8; ``offset`` is the first bad byte in the file."""


class RecordError(SourceError):
    """A structured record (JSON Lines, Parquet, Arrow) lacks the text field or has the wrong type."""


class EmptyCorpusError(SeqpipeError, ValueError):
    """No document survives reading and cleaning, or a split needed for a step is empty."""


class PatternTimeoutError(SeqpipeError, TimeoutError):
    """A recipe's regular expression took longer than its per-document limit on one document.

    ``step`` names the recipe step (``clean[2] replace``, ``tokenizer words``), ``pattern`` the
    expression and ``document`` the document's index: in the batch the step saw when raised
    by a step, among the part's documents as read once the build names the input file.
    """

    def __init__(self, message: str, *, step: str, pattern: str, document: int) -> None:
        super().__init__(message, step=step, pattern=pattern, document=document)
        self.step = step
        self.pattern = pattern
        self.document = document


class TokenizerError(SeqpipeError, ValueError):
    """Text or ids that a tokenizer cannot handle."""


class DatasetError(SeqpipeError, ValueError):
    """A built dataset directory cannot be used as it is."""

    exit_code = EXIT_DATASET


class ManifestError(DatasetError):
    """The manifest is missing, malformed, of an unknown format version, or inconsistent."""


class UnsafePathError(DatasetError, PermissionError):
    """A path in a manifest is absolute, climbs out with '..', or is a symlink leading outside."""


class ShardMissingError(DatasetError, FileNotFoundError):
    """A file the manifest lists is not there."""


class ShardCorruptError(DatasetError):
    """A shard or table file is truncated, malformed, or does not match its recorded hash."""


class IntegrityError(SeqpipeError):
    """``verify`` found one or more problems; ``problems`` lists them."""

    exit_code = EXIT_VERIFY_FAILED

    def __init__(self, problems: list[Any]) -> None:
        lines = "\n".join(str(p) for p in problems)
        super().__init__(f"{len(problems)} problem(s) found:\n{lines}", problems=problems)
        self.problems = problems


class BuildLockedError(SeqpipeError, RuntimeError):
    """Another live build holds the output directory's lock."""

    exit_code = EXIT_LOCKED


class WorkerError(SeqpipeError, RuntimeError):
    """A build worker process ended without handing back a result (killed, out of memory, or a
    script that starts a multi-process build without an ``if __name__ == "__main__":`` guard)."""

    exit_code = EXIT_WORKER


class OutputWriteError(SeqpipeError, OSError):
    """A file the build writes cannot be written (no space left, no permission); ``path`` names it."""

    exit_code = EXIT_DATASET


class StreamError(SeqpipeError, ValueError):
    """Bad batch-stream parameters, or a resume state that does not fit the stream."""

    exit_code = EXIT_USAGE
