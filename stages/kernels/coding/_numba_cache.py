"""How the coding kernels are compiled, and where numba keeps them.

By default numba writes its cache into ``__pycache__`` beside the source file. For an
installed package that is inside site-packages, where ``pip uninstall`` does not know the
files: a later ``pip install -e .`` then leaves a bare ``atomline/`` folder behind, which
Python takes for a namespace package that shadows the editable install. So unless the user
chose a place (``NUMBA_CACHE_DIR``), kernels are cached under the user's cache directory.
"""

from __future__ import annotations

import os

import numba

__all__ = ["use_user_cache_dir", "cache_dir", "kernel"]


def cache_dir() -> str:
    """``$XDG_CACHE_HOME/atomline/numba`` (``~/.cache/atomline/numba`` by default)."""
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return os.path.join(base, "atomline", "numba")


def use_user_cache_dir() -> str:
    """Point numba's cache at :func:`cache_dir` unless ``NUMBA_CACHE_DIR`` is set.

    Returns
    -------
    str
        The cache directory in use.
    """
    if not numba.config.CACHE_DIR:
        numba.config.CACHE_DIR = cache_dir()
    return numba.config.CACHE_DIR


def kernel(fn=None, **options):
    """Compile a coding kernel with numba: cached on disk, and releasing the GIL.

    ``nogil=True`` because the default task runner runs batches in threads of one
    process: a kernel holding the GIL serialised them (two worker threads encoded at
    1.03x the rate of one before this). Use as ``@kernel`` or ``@kernel(inline="always")``.
    """
    options = {"cache": True, "nogil": True, **options}
    if fn is None:
        return numba.njit(**options)
    return numba.njit(**options)(fn)
