"""The hashed record of a run (record.json): what ran, on what, with which inputs, giving
which results and files."""

from __future__ import annotations

import json
import platform
import sys
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .._version import __version__
from ..errors import RecordError

if TYPE_CHECKING:
    from collections.abc import Sequence

    from ..analysis.analyse import AnalysisResult
    from ..report.styles import InputFile

RECORD_KEYS = ("tool", "run", "spec", "inputs", "environment", "results_sha256", "outputs")
DEPENDENCIES = (
    "numpy",
    "scipy",
    "pandas",
    "pyarrow",
    "matplotlib",
    "jinja2",
    "weasyprint",
    "pyyaml",
    "jsonschema",
    "pydyf",
    "fonttools",
)


def environment() -> dict[str, Any]:
    versions = {}
    for name in DEPENDENCIES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    return {
        "python": sys.version.split()[0],
        "platform": platform.platform(),
        "blas": blas(),
        "packages": versions,
    }


def blas() -> str:
    """The BLAS libraries numpy and scipy loaded and the CPU kernels they chose. Another
    kernel (another CPU) moves the last digits of some numbers: the tables then match as
    numbers, not as bytes, and the rendered report may differ."""
    import scipy.linalg  # noqa: F401  (loads scipy's BLAS, as a run does)
    from threadpoolctl import threadpool_info

    found = sorted(
        {
            f"{i.get('internal_api')} {i.get('version')} "
            f"({i.get('architecture') or 'kernel not reported'})"
            for i in threadpool_info()
            if i.get("user_api") == "blas"
        }
    )
    return "; ".join(found) or "none found"


def settings(result: AnalysisResult) -> dict[str, Any]:
    fit = result.fit
    return {
        "grid": {"start": float(fit.grid[0]), "end": float(fit.grid[-1]), "points": fit.grid.size},
        "kernel": fit.options.kernel,
        "mean_bandwidth": {
            "value": round(fit.mean_bandwidth, 12),
            "method": fit.mean_bandwidth_choice.method,
        },
        "covariance_bandwidth": {
            "value": round(fit.covariance_bandwidth, 12),
            "method": fit.covariance_bandwidth_choice.method,
        },
        "diagonal_bandwidth": {
            "value": round(fit.diagonal_bandwidth, 12),
            "method": fit.diagonal_bandwidth_choice.method,
        },
        "component_rule": fit.selection.rule,
        "n_components": fit.n_components,
        "error_variance": float(f"{fit.error_variance:.10g}"),
        "smoothing_error_variance": float(f"{fit.smoothing_error_variance:.10g}"),
        "refined_components": int(fit.likelihood.eigenvalues.size),
        "likelihood": {
            "loglik": float(f"{fit.likelihood.loglik:.10g}"),
            "iterations": fit.likelihood.iterations,
            "converged": fit.likelihood.converged,
            "subjects": fit.likelihood.n_subjects,
        },
        "surface_eigenvalues": [float(f"{v:.10g}") for v in fit.surface_eigenvalues[:20]],
        "band_level": fit.options.band_level,
        "options": fit.options.as_dict(),
    }


def build_record(
    result: AnalysisResult,
    version: int,
    started: str,
    finished: str,
    source_spec: str,
    results_sha256: str,
    outputs: dict[str, str],
    style_inputs: Sequence[InputFile] = (),
    engine: str = "local",
) -> dict[str, Any]:
    """record.json's content. ``inputs`` lists the data file, then the files the spec's
    report section names (template, style sheet, logo), each with its role. Data given as
    many files carry their manifest; the entry's sha256 is then the manifest's digest
    (``manifest``). ``run.engine`` says where the fits' passes ran (``reportgen.analysis.engine``;
    the results do not depend on it)."""
    spec, ds = result.spec, result.dataset
    return {
        "tool": {"name": "reportgen", "version": __version__},
        "run": {
            "report_id": spec.report_id,
            "version": version,
            "started": started,
            "finished": finished,
            "engine": engine,
        },
        "spec": {
            "path": "spec.yaml",
            "source": source_spec,
            "location": str(spec.path),  # where the spec was: a copied run can find it
            "sha256": spec.sha256,
            "settings": settings(result),
        },
        "inputs": [
            {
                "path": ds.relpath,
                "bytes": ds.n_bytes,
                "sha256": ds.sha256,
                "rows": ds.rows_read,
                **(
                    {
                        "manifest": [
                            {"path": f.path, "bytes": f.n_bytes, "sha256": f.sha256}
                            for f in ds.files
                        ]
                    }
                    if ds.files
                    else {}
                ),
            },
            *(
                {"path": f.path, "bytes": len(f.data), "sha256": f.sha256, "role": f.role}
                for f in style_inputs
            ),
        ],
        "environment": environment(),
        "results_sha256": results_sha256,
        "outputs": dict(sorted(outputs.items())),
    }


def dump_record(record: dict[str, Any]) -> bytes:
    return (json.dumps(record, indent=2, sort_keys=False, ensure_ascii=False) + "\n").encode()


def load_record(run_dir: Path) -> dict[str, Any]:
    path = run_dir / "record.json"
    if not run_dir.is_dir():
        raise RecordError(f"{str(run_dir)!r} is not a run directory")
    if not path.is_file():
        inside = sorted(p.parent.name for p in run_dir.glob("*/record.json"))
        if inside:  # a report's folder of versions: name them
            shown = ", ".join(inside[-3:])
            raise RecordError(
                f"{str(run_dir)!r} holds runs ({shown}), not a run itself; "
                f"give one, e.g. {str(run_dir / inside[-1])!r}"
            )
        raise RecordError(f"{str(run_dir)!r} has no record.json; it is not a complete run")
    try:
        record = json.loads(path.read_text("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as e:
        raise RecordError(f"record.json in {str(run_dir)!r} is damaged: {e}") from e
    if not isinstance(record, dict):
        raise RecordError("record.json is damaged: the top level is not an object")
    missing = [k for k in RECORD_KEYS if k not in record]
    if missing:
        raise RecordError(f"record.json is damaged: missing key(s) {', '.join(missing)}")
    shape_ok = (
        isinstance(record["outputs"], dict)
        and isinstance(record["inputs"], list)
        and isinstance(record["spec"], dict)
        and "sha256" in record["spec"]
        and "source" in record["spec"]
        and isinstance(record["run"], dict)
        and isinstance(record["run"].get("version"), int)
        and isinstance(record["run"].get("finished"), str)
        and all(isinstance(i, dict) and {"path", "sha256"} <= set(i) for i in record["inputs"])
    )
    if not shape_ok:
        raise RecordError(
            "record.json is damaged: outputs, inputs, spec or run has the wrong structure"
        )
    return record
