"""The exceptions reportgen raises on purpose.

Hierarchy::

    ReportgenError                 base class; the CLI turns it into exit code 2
    ├── SpecError                  the YAML spec is malformed or invalid (names the YAML path)
    ├── DataError                  a data file cannot be read or fails a blocking check
    ├── EstimationError            the data cannot support the requested estimate
    ├── OutputError                the run directory cannot be written
    ├── TemplateError              the report template cannot be rendered safely
    ├── EngineError                the chosen engine cannot run the passes (Dask missing,
    │                              scheduler unreachable, a cluster lost during the run)
    └── RecordError                a run directory's record is missing or damaged

The numerical core (``reportgen.fpca``) raises only ``EstimationError`` and never warns
through :mod:`warnings`: it returns what it noticed as strings on the result
(``FPCAFit.warnings``), so that the report can show them and the tests can assert them.
"""

from __future__ import annotations


class ReportgenError(Exception):
    """Base class of every error that reportgen raises on purpose."""


class SpecError(ReportgenError):
    """The spec is not valid; the message names the YAML path, what is allowed and the value."""


class DataError(ReportgenError):
    """A data file cannot be read, or a blocking data check failed (names file, column, row)."""


class EstimationError(ReportgenError):
    """The data cannot support an estimate (the message quotes the numbers involved)."""


class OutputError(ReportgenError):
    """The run directory could not be written (disk full, read-only folder, ...)."""


class TemplateError(ReportgenError):
    """The report's template failed, broke the sandbox's rules or exceeded its limits."""


class EngineError(ReportgenError):
    """The engine chosen on the command line cannot run the passes (names the option)."""


class RecordError(ReportgenError):
    """A run directory's record.json is missing, unreadable or structurally damaged."""
