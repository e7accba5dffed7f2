"""Numerical core: sparse functional PCA by conditional expectation.

Pure functions and frozen results: arrays in, results out; no files, no printing.
See ``fit.py`` for the order of the steps and the references. The names below are
imported on first use (PEP 562): ``fpca.options`` and ``fpca.smoothing`` load without the
compiled kernels, which the spec and record layers rely on to stay quick.
"""

from typing import TYPE_CHECKING, Any

from .options import FPCAOptions

if TYPE_CHECKING:
    from .bandwidth import BandwidthChoice
    from .components import ComponentSelection
    from .fit import fit_arrays, with_bandwidths
    from .result import FPCAFit

__all__ = [
    "BandwidthChoice",
    "ComponentSelection",
    "FPCAFit",
    "FPCAOptions",
    "fit_arrays",
    "with_bandwidths",
]

_HOMES = {
    "BandwidthChoice": "bandwidth",
    "ComponentSelection": "components",
    "FPCAFit": "result",
    "fit_arrays": "fit",
    "with_bandwidths": "fit",
}


def __getattr__(name: str) -> Any:
    if name in _HOMES:
        import importlib

        return getattr(importlib.import_module(f".{_HOMES[name]}", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
