"""The DSP chain: pure, I/O free stages wired by pipeline.Pipeline.

Compiled kernels are cached by numba (`cache=True`). numba checks only the source file a kernel is
defined in, but kernels here call kernels of other modules, so a cached caller could go on running an
old copy of a callee edited since (or changed by an update). The cache therefore lives in a directory
named by a digest of every chain module and numba's version: any change to the chain starts a fresh
cache. The directory is under NUMBA_CACHE_DIR when that is set, else under ~/.cache/cubecast (or
$XDG_CACHE_HOME/cubecast). Importing this package sets numba's cache directory for the process.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import numba


def kernel_cache_dir(sources: Path = Path(__file__).parent) -> str:
    digest = hashlib.sha256(numba.__version__.encode())
    for path in sorted(Path(sources).glob("*.py")):
        digest.update(path.name.encode() + b"\0" + path.read_bytes())
    base = os.environ.get("NUMBA_CACHE_DIR") or os.path.join(
        os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache"), "cubecast")
    return os.path.join(base, "chain-" + digest.hexdigest()[:16])


numba.config.CACHE_DIR = kernel_cache_dir()
