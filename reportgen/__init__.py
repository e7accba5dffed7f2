"""reportgen: study appendices for sparse longitudinal data from one YAML spec.

Public API (everything else is internal):

- :func:`fit_sparse_fpca` and its result :class:`FPCAFit`
- :class:`FPCAOptions`
- the exception hierarchy of :mod:`reportgen.errors`
"""

from .api import fit_sparse_fpca
from .errors import (
    DataError,
    DegenerateDataWarning,
    EstimationError,
    OutputError,
    RecordError,
    ReportgenError,
    SpecError,
)
from .fpca import FPCAFit, FPCAOptions

__version__ = "0.1.0"

__all__ = [
    "DataError",
    "DegenerateDataWarning",
    "EstimationError",
    "FPCAFit",
    "FPCAOptions",
    "OutputError",
    "RecordError",
    "ReportgenError",
    "SpecError",
    "__version__",
    "fit_sparse_fpca",
]
