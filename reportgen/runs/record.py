"""The hashed record of a run (record.json), and the comparison of two runs."""

from __future__ import annotations

import json
import platform
import sys
from dataclasses import dataclass
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from .._version import __version__
from ..errors import RecordError
from ..fpca.smoothing import trapezoid_weights

if TYPE_CHECKING:
    from collections.abc import Sequence

    from ..analysis.analyse import AnalysisResult
    from ..report.styles import InputFile

RECORD_KEYS = ("tool", "run", "spec", "inputs", "environment", "results_sha256", "outputs")
DEPENDENCIES = ("numpy", "scipy", "pandas", "pyarrow", "matplotlib", "jinja2", "weasyprint",
                "pyyaml", "jsonschema", "pydyf", "fonttools")


def environment() -> dict[str, Any]:
    versions = {}
    for name in DEPENDENCIES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    return {"python": sys.version.split()[0], "platform": platform.platform(),
            "blas": blas(), "packages": versions}


def blas() -> str:
    """The BLAS libraries numpy and scipy loaded and the CPU kernels they chose. Another
    kernel (another CPU) moves the last digits of some numbers: the tables then match as
    numbers, not as bytes, and the rendered report may differ."""
    import scipy.linalg  # noqa: F401  (loads scipy's BLAS, as a run does)
    from threadpoolctl import threadpool_info

    found = sorted({f"{i.get('internal_api')} {i.get('version')} "
                    f"({i.get('architecture') or 'kernel not reported'})"
                    for i in threadpool_info() if i.get("user_api") == "blas"})
    return "; ".join(found) or "none found"


def settings(result: AnalysisResult) -> dict[str, Any]:
    fit = result.fit
    return {
        "grid": {"start": float(fit.grid[0]), "end": float(fit.grid[-1]), "points": fit.grid.size},
        "kernel": fit.options.kernel,
        "mean_bandwidth": {"value": round(fit.mean_bandwidth, 12),
                           "method": fit.mean_bandwidth_choice.method},
        "covariance_bandwidth": {"value": round(fit.covariance_bandwidth, 12),
                                 "method": fit.covariance_bandwidth_choice.method},
        "diagonal_bandwidth": {"value": round(fit.diagonal_bandwidth, 12),
                               "method": fit.diagonal_bandwidth_choice.method},
        "component_rule": fit.selection.rule,
        "n_components": fit.n_components,
        "error_variance": float(f"{fit.error_variance:.10g}"),
        "smoothing_error_variance": float(f"{fit.smoothing_error_variance:.10g}"),
        "refined_components": int(fit.likelihood.eigenvalues.size),
        "likelihood": {"loglik": float(f"{fit.likelihood.loglik:.10g}"),
                       "iterations": fit.likelihood.iterations,
                       "converged": fit.likelihood.converged,
                       "subjects": fit.likelihood.n_subjects},
        "surface_eigenvalues": [float(f"{v:.10g}") for v in fit.surface_eigenvalues[:20]],
        "band_level": fit.options.band_level,
        "options": fit.options.as_dict(),
    }


def build_record(result: AnalysisResult, version: int, started: str, finished: str,
                 source_spec: str, results_sha256: str, outputs: dict[str, str],
                 style_inputs: Sequence[InputFile] = (), engine: str = "local") -> dict:
    """record.json's content. ``inputs`` lists the data file, then the files the spec's
    report section names (template, style sheet, logo), each with its role. Data given as
    many files carry their manifest; the entry's sha256 is then the manifest's digest
    (``manifest``). ``run.engine`` says where the fits' passes ran (``reportgen.analysis.engine``;
    the results do not depend on it)."""
    spec, ds = result.spec, result.dataset
    return {
        "tool": {"name": "reportgen", "version": __version__},
        "run": {"report_id": spec.report_id, "version": version, "started": started,
                "finished": finished, "engine": engine},
        "spec": {"path": "spec.yaml", "source": source_spec, "sha256": spec.sha256,
                 "settings": settings(result)},
        "inputs": [{"path": ds.relpath, "bytes": ds.n_bytes, "sha256": ds.sha256,
                    "rows": ds.rows_read,
                    **({"manifest": [{"path": p.path, "bytes": p.n_bytes, "sha256": p.sha256}
                                     for p in ds.parts]} if ds.parts else {})},
                   *({"path": f.path, "bytes": len(f.data), "sha256": f.sha256,
                      "role": f.role} for f in style_inputs)],
        "environment": environment(),
        "results_sha256": results_sha256,
        "outputs": dict(sorted(outputs.items())),
    }


def dump_record(record: dict) -> bytes:
    return (json.dumps(record, indent=2, sort_keys=False, ensure_ascii=False) + "\n").encode()


def load_record(run_dir: Path) -> dict[str, Any]:
    path = run_dir / "record.json"
    if not run_dir.is_dir():
        raise RecordError(f"{str(run_dir)!r} is not a run directory")
    if not path.is_file():
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
    shape_ok = (isinstance(record["outputs"], dict) and isinstance(record["inputs"], list)
                and isinstance(record["spec"], dict) and "sha256" in record["spec"]
                and "source" in record["spec"] and isinstance(record["run"], dict)
                and isinstance(record["run"].get("version"), int)
                and isinstance(record["run"].get("finished"), str)
                and all(isinstance(i, dict) and {"path", "sha256"} <= set(i)
                        for i in record["inputs"]))
    if not shape_ok:
        raise RecordError("record.json is damaged: outputs, inputs, spec or run has the "
                          "wrong structure")
    return record


# --- compare -----------------------------------------------------------------------------


@dataclass(frozen=True)
class Finding:
    item: str
    a: str
    b: str
    crossed: bool = False


def _table(run_dir: Path, name: str, columns: list[str] | None = None) -> pd.DataFrame:
    """A run's table: tables/NAME.csv, or the parts listed in tables/NAME/parts.json."""
    path = run_dir / "tables" / f"{name}.csv"
    if path.is_file():
        return pd.read_csv(path, dtype={"subject": str}, usecols=columns)
    from ..report.subject_parts import manifest_file, read_manifest

    if (run_dir / manifest_file(name)).is_file():
        import pyarrow.parquet as pq

        try:
            files = [run_dir / e.file for e in read_manifest(run_dir, name)]
            return pd.concat([pq.read_table(f, columns=columns).to_pandas() for f in files],
                             ignore_index=True)
        except (ValueError, OSError) as e:
            raise RecordError(f"{str(run_dir)!r}: tables/{name} cannot be read: {e}") from e
    raise RecordError(f"{str(run_dir)!r} has no tables/{name}.csv")


def _units(run_dir: Path) -> tuple[str, str]:
    """(time unit, value unit) from a run's spec.yaml; empty when not stated."""
    from ..inputs.spec import parse_spec_bytes

    path = run_dir / "spec.yaml"
    if not path.is_file():
        raise RecordError(f"{str(run_dir)!r} has no spec.yaml")
    data = parse_spec_bytes(path.read_bytes(), f"{run_dir}/spec.yaml").get("data", {})
    data = data if isinstance(data, dict) else {}
    transform = data.get("transform", "none")
    value = str(data.get("value_unit", ""))
    return str(data.get("time_unit", "")), value if transform == "none" else \
        f"{transform}({value})"


def _same_report(a: Path, b: Path, ra: dict[str, Any], rb: dict[str, Any]) -> None:
    """Refuse to compare runs of different reports, time units or value units."""
    problems = []
    ida, idb = ra["run"].get("report_id"), rb["run"].get("report_id")
    if ida != idb:
        problems.append(f"report ids {ida!r} and {idb!r}")
    (ta, va), (tb, vb) = _units(a), _units(b)
    if ta != tb:
        problems.append(f"time units {ta!r} and {tb!r}")
    if va != vb:
        problems.append(f"value units {va!r} and {vb!r}")
    if problems:
        raise RecordError("these runs belong to different reports and cannot be compared: "
                          + "; ".join(problems) + ". Compare versions of one report.")


def compare_runs(a: Path, b: Path, gates: dict[str, Any]) -> list[Finding]:
    """What changed from run ``a`` to run ``b``; ``crossed`` marks a gate that fails."""
    ra, rb = load_record(a), load_record(b)
    _same_report(a, b, ra, rb)
    out: list[Finding] = []
    ia = {i["path"]: i["sha256"] for i in ra["inputs"]}
    ib = {i["path"]: i["sha256"] for i in rb["inputs"]}
    for path in sorted(set(ia) | set(ib)):
        same = ia.get(path) == ib.get(path)
        out.append(Finding(f"input {path}", (ia.get(path) or "absent")[:12],
                           (ib.get(path) or "absent")[:12] + ("" if same else " (changed)")))
    out.append(Finding("spec", ra["spec"]["sha256"][:12], rb["spec"]["sha256"][:12]))
    sa, sb = (_table(r, "scores", ["subject", "n_obs"]) for r in (a, b))
    added = sorted(set(sb.subject) - set(sa.subject))
    removed = sorted(set(sa.subject) - set(sb.subject))
    out.append(Finding("subjects", str(len(sa)), f"{len(sb)} (+{len(added)} / -{len(removed)})"))
    out.append(Finding("readings", str(int(sa.n_obs.sum())), str(int(sb.n_obs.sum()))))
    seta, setb = ra["spec"]["settings"], rb["spec"]["settings"]
    for key in ("mean_bandwidth", "covariance_bandwidth"):
        out.append(Finding(key, f"{seta[key]['value']:.4g}", f"{setb[key]['value']:.4g}"))
    ka, kb = seta["n_components"], setb["n_components"]
    out.append(Finding("components", str(ka), str(kb),
                       bool(gates["same_components"]) and ka != kb))
    ca, cb = _table(a, "components"), _table(b, "components")
    for k in range(min(ka, kb)):
        la, lb = ca.eigenvalue[k], cb.eigenvalue[k]
        rel = abs(lb - la) / abs(la)
        out.append(Finding(f"eigenvalue {k + 1}", f"{la:.4g}", f"{lb:.4g} ({rel:+.1%})",
                           rel > gates["max_eigenvalue_change"]))
        out.append(Finding(f"FVE {k + 1}", f"{ca.fve[k]:.3f}", f"{cb.fve[k]:.3f}"))
    va, vb = seta["error_variance"], setb["error_variance"]
    rel = abs(vb - va) / abs(va)
    out.append(Finding("error variance", f"{va:.4g}", f"{vb:.4g} ({rel:+.1%})",
                       rel > gates["max_error_variance_change"]))
    ma, mb = _table(a, "mean"), _table(b, "mean")
    grid = ma.time.to_numpy()
    mb_on_a = np.interp(grid, mb.time.to_numpy(), mb["mean"].to_numpy())
    span = float(np.ptp(ma["mean"])) or 1.0
    change = float(np.max(np.abs(mb_on_a - ma["mean"].to_numpy())))
    out.append(Finding("largest mean change", "", f"{change:.4g} ({change / span:.1%} of range)",
                       change / span > gates["max_mean_change"]))
    ea, eb = _table(a, "eigenfunctions"), _table(b, "eigenfunctions")
    w = trapezoid_weights(grid)
    for k in range(min(ka, kb)):
        fb = np.interp(grid, eb.time.to_numpy(), eb[f"phi_{k + 1}"].to_numpy())
        sim = float(abs(np.sum(w * ea[f"phi_{k + 1}"].to_numpy() * fb)))
        out.append(Finding(f"eigenfunction {k + 1} similarity", "", f"{sim:.3f}",
                           sim < gates["min_eigenfunction_similarity"]))
    return out
