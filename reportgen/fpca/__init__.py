"""Numerical core: sparse functional PCA by conditional expectation.

Pure functions and frozen results: arrays in, results out; no files, no printing.
See ``fit.py`` for the order of the steps and the references.
"""

from .bandwidth import BandwidthChoice
from .components import ComponentSelection
from .fit import FPCAFit, FPCAOptions, fit_arrays, with_bandwidths

__all__ = [
    "BandwidthChoice",
    "ComponentSelection",
    "FPCAFit",
    "FPCAOptions",
    "fit_arrays",
    "with_bandwidths",
]
