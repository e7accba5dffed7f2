"""reportgen: study appendices for sparse longitudinal data from one YAML spec.

Public API (everything else is internal):

- :func:`fit_sparse_fpca` and its result :class:`FPCAFit`
- :func:`load_fit`: a run's stored fit (:class:`StoredFit`), to score new subjects
- :class:`FPCAOptions`
- the exception hierarchy of :mod:`reportgen.errors`

The numerical names are imported on first use (PEP 562), so that commands which fit
nothing (``check``, ``compare``, ``schema``, ``init``) do not pay for numba and scipy.
"""

import typing as _typing

from .errors import (
    DataError,
    EngineError,
    EstimationError,
    OutputError,
    RecordError,
    ReportgenError,
    SpecError,
    TemplateError,
)

if _typing.TYPE_CHECKING:
    from .api import fit_sparse_fpca
    from .fpca import FPCAFit, FPCAOptions
    from .runs.stored_fit import StoredFit, load_fit

from ._version import __version__

__all__ = [
    "DataError",
    "EngineError",
    "EstimationError",
    "FPCAFit",
    "FPCAOptions",
    "OutputError",
    "RecordError",
    "ReportgenError",
    "SpecError",
    "StoredFit",
    "TemplateError",
    "__version__",
    "fit_sparse_fpca",
    "load_fit",
]


def __getattr__(name: str) -> _typing.Any:
    if name == "fit_sparse_fpca":
        from .api import fit_sparse_fpca

        return fit_sparse_fpca
    if name in ("load_fit", "StoredFit"):
        from .runs import stored_fit

        return getattr(stored_fit, name)
    if name in ("FPCAFit", "FPCAOptions"):
        from . import fpca

        return getattr(fpca, name)
    raise AttributeError(f"module 'reportgen' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
