"""The compiled-kernel cache is keyed by every chain module: an edit to a callee's file must not leave
a cached caller running the old callee (numba itself checks only the caller's own file)."""

from __future__ import annotations

import shutil
from pathlib import Path

import numba

from cubecast.daemon import chain

CHAIN = Path(chain.__file__).parent


def test_cache_directory_follows_every_chain_source(tmp_path, monkeypatch):
    copy = tmp_path / "chain"
    shutil.copytree(CHAIN, copy, ignore=shutil.ignore_patterns("__pycache__"))
    monkeypatch.setenv("NUMBA_CACHE_DIR", str(tmp_path / "cache"))
    first = chain.kernel_cache_dir(copy)
    assert Path(first).parent == tmp_path / "cache"
    assert chain.kernel_cache_dir(copy) == first
    bounds = copy / "bounds.py"            # a module whose kernels others call
    bounds.write_text(bounds.read_text() + "\n# edited\n")
    assert chain.kernel_cache_dir(copy) != first
    monkeypatch.delenv("NUMBA_CACHE_DIR")
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    assert Path(chain.kernel_cache_dir(copy)).parent == tmp_path / "xdg" / "cubecast"


def test_the_process_uses_the_keyed_directory():
    assert numba.config.CACHE_DIR == chain.kernel_cache_dir()
