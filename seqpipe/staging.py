"""The output directory's private area: lock, staging, cache, and the atomic publish.

Layout under the dataset directory::

    .seqpipe/lock                 {"pid": ..., "host": ...} while a build runs
    .seqpipe/stage/<build key>/   everything a build writes before it publishes
    .seqpipe/cache/               ingested parts, reusable by later builds
    .seqpipe/inputs.json          input file hashes keyed by (path, size, mtime)

Publishing: delete the old manifest first (the directory stops being a complete dataset),
move each staged entry into place (old ones aside), fsync, then rename the new manifest in
last. A build killed anywhere leaves either the old complete dataset or none.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path

from seqpipe.errors import BuildLockedError
from seqpipe.formats import PRIVATE
from seqpipe.shards import fsync_dir


def private_dir(out: Path) -> Path:
    return out / PRIVATE


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


@contextmanager
def build_lock(out: Path) -> Iterator[Path]:
    """Hold ``out/.seqpipe/lock`` for the duration; fail at once if a live build holds it."""
    priv = private_dir(out)
    priv.mkdir(parents=True, exist_ok=True)
    lock = priv / "lock"
    me = {"pid": os.getpid(), "host": socket.gethostname()}
    for _ in range(2):
        # write the claim to a private file first, then link it into place: the lock never
        # exists without its contents, whenever the process dies
        tmp = priv / f".lock.{me['pid']}.tmp"
        with open(tmp, "w") as fh:
            fh.write(json.dumps(me))
            fh.flush()
            os.fsync(fh.fileno())
        try:
            os.link(tmp, lock)
        except FileExistsError:
            tmp.unlink(missing_ok=True)
            try:
                held = json.loads(lock.read_text() or "{}")
            except (OSError, ValueError):
                held = {}
            pid, host = held.get("pid"), held.get("host")
            if isinstance(pid, int) and host == me["host"] and not _pid_alive(pid):
                lock.unlink(missing_ok=True)  # stale: its process is gone
                continue
            raise BuildLockedError(
                f"{out}: another build is running (lock {lock} held by pid {pid} on {host}); "
                "wait for it, or delete the lock file if that process is gone",
                path=str(lock),
            ) from None
        tmp.unlink(missing_ok=True)
        fsync_dir(priv)
        break
    try:
        yield lock
    finally:
        try:
            if json.loads(lock.read_text()).get("pid") == me["pid"]:
                lock.unlink()
        except (OSError, ValueError):
            pass


def publish(out: Path, stage: Path, entries: Sequence[str], manifest_name: str) -> None:
    """Move staged ``entries`` (files or directories) into ``out``, the manifest last."""
    manifest = out / manifest_name
    if manifest.exists():
        manifest.unlink()
        fsync_dir(out)
    trash = private_dir(out) / "trash"
    shutil.rmtree(trash, ignore_errors=True)
    trash.mkdir(parents=True, exist_ok=True)
    for name in entries:
        src, dst = stage / name, out / name
        if dst.exists() or dst.is_symlink():
            os.rename(dst, trash / name.replace("/", "_"))
        dst.parent.mkdir(parents=True, exist_ok=True)
        os.rename(src, dst)
    fsync_dir(out)
    os.rename(stage / manifest_name, manifest)
    fsync_dir(out)
    shutil.rmtree(trash, ignore_errors=True)
