"""What changed from one run of a report to another (``reportgen compare``), under the gates
of the newer run's spec."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..errors import RecordError
from ..fpca.smoothing import trapezoid_weights
from ..inputs.spec import GatesSection
from .integrity import integrity_findings
from .record import load_record


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
    from ..report.subject_parts import part_list_file, read_part_list

    if (run_dir / part_list_file(name)).is_file():
        import pyarrow.parquet as pq

        try:
            files = [run_dir / e.file for e in read_part_list(run_dir, name)]
            frame: pd.DataFrame = pd.concat(
                [pq.read_table(f, columns=columns).to_pandas() for f in files], ignore_index=True
            )
        except (ValueError, OSError) as e:
            raise RecordError(f"{str(run_dir)!r}: tables/{name} cannot be read: {e}") from e
        return frame
    raise RecordError(f"{str(run_dir)!r} has no tables/{name}.csv")


def _units(run_dir: Path) -> tuple[str, str]:
    """(time unit, value unit) from a run's spec.yaml; empty when not stated."""
    from ..inputs.spec import parse_spec_bytes, value_unit

    path = run_dir / "spec.yaml"
    if not path.is_file():
        raise RecordError(f"{str(run_dir)!r} has no spec.yaml")
    data = parse_spec_bytes(path.read_bytes(), f"{run_dir}/spec.yaml").get("data", {})
    data = data if isinstance(data, dict) else {}
    return str(data.get("time_unit", "")), value_unit(
        str(data.get("value_unit", "")), str(data.get("transform", "none"))
    )


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
        raise RecordError(
            "these runs belong to different reports and cannot be compared: "
            + "; ".join(problems)
            + ". Compare versions of one report."
        )


def compare_runs(a: Path, b: Path, gates: GatesSection) -> list[Finding]:
    """What changed from run ``a`` to run ``b``; ``crossed`` marks a gate that fails."""
    ra, rb = load_record(a), load_record(b)
    for run, record in ((a, ra), (b, rb)):
        _, findings = integrity_findings(run, record["outputs"])
        if findings:
            listed = "; ".join(f"{f.name}: {f.kind} ({f.detail})" for f in findings[:5])
            raise RecordError(
                f"the run {str(run)!r} fails its integrity check ({listed}); a comparison "
                "with it would not be one with the recorded analysis"
            )
    _same_report(a, b, ra, rb)
    out: list[Finding] = []
    ia = {i["path"]: i["sha256"] for i in ra["inputs"]}
    ib = {i["path"]: i["sha256"] for i in rb["inputs"]}
    for path in sorted(set(ia) | set(ib)):
        same = ia.get(path) == ib.get(path)
        out.append(
            Finding(
                f"input {path}",
                (ia.get(path) or "absent")[:12],
                (ib.get(path) or "absent")[:12] + ("" if same else " (changed)"),
            )
        )
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
    out.append(Finding("components", str(ka), str(kb), bool(gates.same_components) and ka != kb))
    ca, cb = _table(a, "components"), _table(b, "components")
    for k in range(min(ka, kb)):
        la, lb = ca.eigenvalue[k], cb.eigenvalue[k]
        rel = (lb - la) / abs(la)  # signed: a fall is a negative change
        out.append(
            Finding(
                f"eigenvalue {k + 1}",
                f"{la:.4g}",
                f"{lb:.4g} ({rel:+.1%})",
                abs(rel) > gates.max_eigenvalue_change,
            )
        )
        out.append(Finding(f"FVE {k + 1}", f"{ca.fve[k]:.3f}", f"{cb.fve[k]:.3f}"))
    va, vb = seta["error_variance"], setb["error_variance"]
    rel = (vb - va) / abs(va)
    out.append(
        Finding(
            "error variance",
            f"{va:.4g}",
            f"{vb:.4g} ({rel:+.1%})",
            abs(rel) > gates.max_error_variance_change,
        )
    )
    ma, mb = _table(a, "mean"), _table(b, "mean")
    grid = ma.time.to_numpy()
    mb_on_a = np.interp(grid, mb.time.to_numpy(), mb["mean"].to_numpy())
    span = float(np.ptp(ma["mean"])) or 1.0
    change = float(np.max(np.abs(mb_on_a - ma["mean"].to_numpy())))
    out.append(
        Finding(
            "largest mean change",
            "",
            f"{change:.4g} ({change / span:.1%} of range)",
            change / span > gates.max_mean_change,
        )
    )
    ea, eb = _table(a, "eigenfunctions"), _table(b, "eigenfunctions")
    w = trapezoid_weights(grid)
    for k in range(min(ka, kb)):
        fb = np.interp(grid, eb.time.to_numpy(), eb[f"phi_{k + 1}"].to_numpy())
        sim = float(abs(np.sum(w * ea[f"phi_{k + 1}"].to_numpy() * fb)))
        out.append(
            Finding(
                f"eigenfunction {k + 1} similarity",
                "",
                f"{sim:.3f}",
                sim < gates.min_eigenfunction_similarity,
            )
        )
    return out
