"""Atomic file replacement: write beside the destination, then rename over it.

The output writers (EXR, PNG, heat maps, statistics JSON, checkpoints) go through `atomic_path`, or
`atomic_open` for a plain file handle. The writer fills a fresh temporary file in the destination's
folder; only when it has finished does `os.replace` rename the temporary over the destination.
rename(2) replaces an existing name in one step when both names are on the same file system: the name
stays visible throughout and refers to either the old or the new file (POSIX.1-2017, rename();
paraphrased from memory), and the same folder guarantees the same file system. So a reader sees either
the previous file or the whole new one, never a half-written file; a write that fails or is
interrupted (any exception, Ctrl-C included) removes its temporary and leaves the previous file
untouched.

The temporary is a hidden sibling `.NAME.PID-RANDOM.tmp`: unique across processes and calls, and
skipped by `ls` and globbing if a crash (power loss, SIGKILL) ever leaves one behind. It is created by
the writer itself (open(), a library's save function), so the file gets the permissions of any new
file: 0666 less the umask. There is no fsync: the guarantee is against interrupted and failed writes,
not against a crash of the operating system.
"""
import os
import secrets
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import IO


def temporary_sibling(path: Path) -> Path:
    """A fresh hidden name in the folder of `path`, for writing before the rename."""
    return path.with_name(f".{path.name}.{os.getpid()}-{secrets.token_hex(4)}.tmp")


@contextmanager
def atomic_path(path) -> Iterator[Path]:
    """Yield a temporary path beside `path`; when the block ends normally, rename it over `path`.

    The block must create and fill the temporary. If the block or the rename raises, the temporary is
    removed, the exception goes on and `path` keeps its previous content (or stays absent). The folder
    of `path` must exist.
    """
    path = Path(path)
    temporary = temporary_sibling(path)
    try:
        yield temporary
        os.replace(temporary, path)
    except BaseException:  # KeyboardInterrupt too: never leave a temporary behind
        temporary.unlink(missing_ok=True)
        raise


@contextmanager
def atomic_open(path, mode: str = "w", **open_options) -> Iterator[IO]:
    """Open a temporary beside `path` for writing (`open` arguments); it replaces `path` once closed."""
    with atomic_path(path) as temporary, open(temporary, mode, **open_options) as handle:
        yield handle
