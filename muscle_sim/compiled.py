"""How laws are compiled: one decorator for kernel functions, one for their numpy face.

Every law of the plant is written once as a small function on floats, compiled by numba
(``@law``). The compiled plant kernel calls these functions directly (numba inlines across them);
the public numpy functions of the physics modules are ufuncs built from the very same source
(:func:`broadcast`), so a test of the numpy function tests the code the simulator runs.
Compiled code is cached on disk (``cache=True``) so a second process does not compile again.
numba's own cache checks only the file a function is defined in, while the plant kernel inlines
laws from several modules; the cache locators below stamp every cached kernel of this package
with a hash of ALL its kernel modules, so a change to any law recompiles everything that uses it.
"""
from __future__ import annotations

import functools
import hashlib
import os
from pathlib import Path

import numba
from numba.core import caching as _caching

_PACKAGE = Path(__file__).resolve().parent


@functools.lru_cache(maxsize=1)
def kernel_stamp() -> str:
    """Hash of every module of this package that compiles laws (this one included)."""
    digest = hashlib.sha256()
    for path in sorted(_PACKAGE.glob("*.py")):
        text = path.read_bytes()
        if path.name == "compiled.py" or b"from .compiled import" in text:
            digest.update(path.name.encode() + b"\0" + text)
    return digest.hexdigest()


class _WholeKernelStamp:
    """Locator mixin: this package's functions are stamped with :func:`kernel_stamp`."""

    def get_source_stamp(self):
        return kernel_stamp()

    @classmethod
    def from_function(cls, py_func, py_file):
        if Path(py_file).resolve().parent != _PACKAGE:
            return None
        return super().from_function(py_func, py_file)


def _install_locators() -> None:
    bases = [getattr(_caching, name, None) for name in
             ("UserProvidedCacheLocator", "InTreeCacheLocator", "UserWideCacheLocator")]
    impl = getattr(_caching, "CacheImpl", None) or getattr(_caching, "_CacheImpl", None)
    if impl is None or any(b is None for b in bases):
        raise ImportError("this numba version's cache locators are unknown; pin numba as pyproject.toml does")
    ours = [type("Kernel" + b.__name__, (_WholeKernelStamp, b), {}) for b in bases]
    known = impl._locator_classes
    if not any(issubclass(c, _WholeKernelStamp) for c in known):
        known[:0] = ours


_install_locators()

#: Options every compiled law shares: on-disk cache, no fast-math (IEEE results, reproducible),
#: GIL released so threads of a sweep can run kernels side by side.
_OPTIONS = {"cache": True, "nogil": True, "fastmath": False}


def law(fn):
    """Compile ``fn`` (floats and numpy arrays in, floats or tuples out) for the kernel."""
    return numba.njit(**_OPTIONS)(fn)


def broadcast(compiled, n_args: int):
    """A numpy ufunc of the compiled law ``compiled`` taking ``n_args`` float64 arguments that
    broadcast against each other (the law's own source, compiled once more as a loop)."""
    signature = numba.float64(*([numba.float64] * n_args))
    return numba.vectorize([signature], cache=True)(compiled.py_func)
