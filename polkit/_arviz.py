"""ArviZ, imported once for polkit without its optional numba kernels.

ArviZ 0.23 compiles numba functions when it is imported and on first use whenever numba
is installed (numba is a polkit dependency, for its own kernels).  Those functions serve
ECDF bands and variance shortcuts that polkit does not need, and compiling them costs
about a second in every new process.  polkit therefore imports ArviZ with numba hidden,
so ArviZ takes its plain numpy paths (the same estimators; ESS and R-hat agree to
rounding).  An ArviZ imported earlier by the user is used as it is.
"""

from __future__ import annotations

import sys
import threading
import warnings
from types import ModuleType

_LOCK = threading.Lock()


def arviz() -> ModuleType:
    """The ``arviz`` module (imported on first use, see the module notes)."""
    module = sys.modules.get("arviz")
    if module is not None:
        return module
    with _LOCK, warnings.catch_warnings():
        warnings.simplefilter("ignore", FutureWarning)  # ArviZ 0.23 announces its refactor
        if sys.modules.get("arviz") is not None:
            return sys.modules["arviz"]
        had_numba = "numba" in sys.modules
        saved = sys.modules.get("numba")
        sys.modules["numba"] = None  # `import numba` now raises ImportError
        try:
            import arviz as module
        finally:
            if had_numba:
                sys.modules["numba"] = saved
            else:
                del sys.modules["numba"]
    return module
