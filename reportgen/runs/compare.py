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
    va, vb = seta["error_variance"], setb["error_variance"]
    rel = (vb - va) / abs(va)  # signed: a fall is a negative change
    out.append(
        Finding(
            "error variance",
            f"{va:.4g}",
            f"{vb:.4g} ({rel:+.1%})",
            abs(rel) > gates.max_error_variance_change,
        )
    )
    out += curve_findings(
        Curves.of(_table(a, "mean"), _table(a, "eigenfunctions"), _table(a, "components"), ka),
        Curves.of(_table(b, "mean"), _table(b, "eigenfunctions"), _table(b, "components"), kb),
        gates,
    )
    return out


@dataclass(frozen=True)
class Curves:
    """A run's mean and retained eigenfunctions on its grid, its eigenvalues and FVE."""

    mean_time: np.ndarray
    mean: np.ndarray
    time: np.ndarray
    functions: np.ndarray  # (grid, K)
    eigenvalues: np.ndarray
    fve: np.ndarray

    @classmethod
    def of(
        cls, mean: pd.DataFrame, functions: pd.DataFrame, components: pd.DataFrame, k: int
    ) -> Curves:
        return cls(
            mean.time.to_numpy(dtype=float),
            mean["mean"].to_numpy(dtype=float),
            functions.time.to_numpy(dtype=float),
            np.column_stack([functions[f"phi_{j + 1}"].to_numpy(dtype=float) for j in range(k)])
            if k
            else np.zeros((len(functions), 0)),
            components.eigenvalue.to_numpy(dtype=float)[:k],
            components.fve.to_numpy(dtype=float)[:k],
        )


def curve_findings(ca: Curves, cb: Curves, gates: GatesSection) -> list[Finding]:
    """The mean and the components of two runs compared on their common time domain only.

    A run's curves are not extended past its own domain: both are interpolated on the
    common domain (run A's grid points inside it, and its ends), the eigenfunctions
    renormalised there to unit norm and matched by the largest absolute inner product
    (greedily: the most similar pair first, then the most similar of the rest; a component
    that swapped order is compared with its counterpart, and said so); the similarity is
    then at most 1 (Cauchy-Schwarz) and does not depend on the sign. Eigenvalues are
    compared between matched components.
    """
    out: list[Finding] = []
    lo = max(float(ca.time[0]), float(cb.time[0]))
    hi = min(float(ca.time[-1]), float(cb.time[-1]))
    if not hi > lo:
        out.append(
            Finding(
                "time domain",
                f"{ca.time[0]:.4g} to {ca.time[-1]:.4g}",
                f"{cb.time[0]:.4g} to {cb.time[-1]:.4g} (no common part: curves not compared)",
                True,
            )
        )
        return out
    if (ca.time[0], ca.time[-1]) != (cb.time[0], cb.time[-1]):
        out.append(
            Finding(
                "time domain",
                f"{ca.time[0]:.4g} to {ca.time[-1]:.4g}",
                f"{cb.time[0]:.4g} to {cb.time[-1]:.4g} (changed; curves compared on "
                f"{lo:.4g} to {hi:.4g})",
            )
        )
    inside = ca.time[(ca.time > lo) & (ca.time < hi)]
    grid = np.concatenate([[lo], inside, [hi]])
    mean_a = np.interp(grid, ca.mean_time, ca.mean)
    mean_b = np.interp(grid, cb.mean_time, cb.mean)
    span = float(np.ptp(mean_a)) or 1.0
    change = float(np.max(np.abs(mean_b - mean_a)))
    out.append(
        Finding(
            "largest mean change",
            "",
            f"{change:.4g} ({change / span:.1%} of range)",
            change / span > gates.max_mean_change,
        )
    )
    w = trapezoid_weights(grid)

    def on_common(c: Curves) -> np.ndarray:
        f = (
            np.column_stack(
                [np.interp(grid, c.time, c.functions[:, j]) for j in range(c.functions.shape[1])]
            )
            if c.functions.shape[1]
            else np.zeros((grid.size, 0))
        )
        norms = np.sqrt(np.maximum(w @ f**2, 1e-300))
        return np.asarray(f / norms)

    fa, fb = on_common(ca), on_common(cb)
    sim = np.abs(fa.T @ (w[:, None] * fb))  # (Ka, Kb)
    for j, k in _matched(sim):
        which = "" if j == k else f" (matched to component {k + 1} of the second run)"
        la, lb = ca.eigenvalues[j], cb.eigenvalues[k]
        rel = (lb - la) / abs(la)  # signed: a fall is a negative change
        out.append(
            Finding(
                f"eigenvalue {j + 1}",
                f"{la:.4g}",
                f"{lb:.4g} ({rel:+.1%}){which}",
                abs(rel) > gates.max_eigenvalue_change,
            )
        )
        out.append(Finding(f"FVE {j + 1}", f"{ca.fve[j]:.3f}", f"{cb.fve[k]:.3f}{which}"))
        out.append(
            Finding(
                f"eigenfunction {j + 1} similarity",
                "",
                f"{sim[j, k]:.3f}{which}",
                sim[j, k] < gates.min_eigenfunction_similarity,
            )
        )
    return out


def _matched(sim: np.ndarray) -> list[tuple[int, int]]:
    """Pairs (row, column) of ``sim``, the largest entry first, each row and column used
    once; sorted by row. (scipy's assignment solver would load scipy into a command that
    needs no numerical library.)"""
    left = sim.astype(float).copy()
    pairs = []
    for _ in range(min(left.shape)):
        j, k = np.unravel_index(int(np.argmax(left)), left.shape)
        pairs.append((int(j), int(k)))
        left[j, :] = -np.inf
        left[:, k] = -np.inf
    return sorted(pairs)
