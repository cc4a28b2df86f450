"""PyTensor backend choice: compiled C where a C++ compiler exists, NUMBA otherwise.

The pure-Python fallback is about 700 times slower, so it is never used.
"""

from __future__ import annotations

import shutil

__all__ = ["configure_backend", "backend_name"]


def configure_backend() -> str:
    """Choose the PyTensor mode once; returns ``"c"`` or ``"numba"``."""
    import pytensor

    if pytensor.config.cxx and shutil.which(str(pytensor.config.cxx).split()[0]):
        return "c"
    try:
        import numba  # noqa: F401
    except ImportError as exc:  # pragma: no cover - numba is a dependency
        raise RuntimeError("no C++ compiler and no numba: install g++ (apt-get install g++) or numba") from exc
    pytensor.config.mode = "NUMBA"
    return "numba"


def backend_name() -> str:
    import pytensor

    return "numba" if str(pytensor.config.mode).upper() == "NUMBA" else "c"
