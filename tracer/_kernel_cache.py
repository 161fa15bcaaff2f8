"""Where compiled numba kernels are cached, keyed by the source of the whole package.

numba's on-disk cache checks only the timestamp of the file that defines a kernel, not of the files
whose functions it inlines: a kernel in render/_integrator.py would keep the old traversal code after
accel/_traverse.py changed (and read a new node layout with old code). So the cache lives in a folder
named after a hash of every tracer source file: any change anywhere compiles afresh, and an unchanged
package loads its kernels from disk.
"""
import hashlib
import os
from pathlib import Path

import numba

PACKAGE = Path(__file__).resolve().parent


def source_digest() -> str:
    digest = hashlib.sha256()
    for path in sorted(PACKAGE.rglob("*.py")):
        digest.update(str(path.relative_to(PACKAGE)).encode())
        digest.update(path.read_bytes())
    digest.update(numba.__version__.encode())
    return digest.hexdigest()[:16]


def kernel_cache_dir() -> Path:
    base = os.environ.get("NUMBA_CACHE_DIR") or os.path.join(
        os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache"), "tracer")
    return Path(base) / f"kernels-{source_digest()}"


def configure() -> Path:
    """Point numba's cache at the folder for this source; call before any kernel is defined."""
    folder = kernel_cache_dir()
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError:                 # read-only home: numba falls back to compiling in memory
        return folder
    numba.config.CACHE_DIR = str(folder)
    return folder


def is_warm() -> bool:
    """Whether this source's kernels have been compiled and cached before."""
    folder = kernel_cache_dir()
    return folder.is_dir() and any(folder.rglob("*render_rows*.nbi"))
