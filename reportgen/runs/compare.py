"""What changed from one run of a report to another (``reportgen compare``), under the gates
of the newer run's spec: each finding with its gate and, where the runs carry their
uncertainty, whether the change is beyond it; the subjects added, removed and moved."""

from __future__ import annotations

from dataclasses import dataclass, replace
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
    noise: str = ""  # the change against the runs' uncertainty, where they carry it

    def as_dict(self) -> dict[str, Any]:
        return {
            "item": self.item,
            "a": self.a,
            "b": self.b,
            "gate_crossed": self.crossed,
            "against_uncertainty": self.noise,
        }


WITHIN, BEYOND = "within the runs' uncertainty", "beyond the runs' uncertainty"


@dataclass(frozen=True)
class Overlap:
    """How many subjects each run has and how many they share.

    An estimate is taken as an average over subjects (common practice, no source: the
    first-order view of a smooth estimator), of variance ``s2 / n``; two runs that share
    ``common`` subjects then differ with variance ``s2 (1/n_a + 1/n_b - 2 common / (n_a
    n_b))``: a refresh that adds a fifth of new subjects moves an estimate far less than two
    independent studies would, and the same subjects move it only through changed readings
    or settings (variance 0: any change is beyond sampling noise)."""

    n_a: int
    n_b: int
    common: int

    def difference_variance(self, var_a: np.ndarray, var_b: np.ndarray) -> np.ndarray:
        s2 = (np.asarray(var_a) * self.n_a + np.asarray(var_b) * self.n_b) / 2.0
        share = 1.0 / self.n_a + 1.0 / self.n_b - 2.0 * self.common / (self.n_a * self.n_b)
        return np.asarray(s2 * max(share, 0.0))

    @property
    def words(self) -> str:
        return (
            f"{self.common} subjects in both runs ({self.n_a} and {self.n_b} in all); the "
            "uncertainty of a difference counts the shared subjects once (estimates taken "
            "as averages over subjects)"
        )


def against(change: float, variance: float, multiplier: float = 2.0) -> str:
    """``change`` against ``multiplier`` standard deviations of the difference."""
    if not np.isfinite(variance) or not np.isfinite(change):
        return ""
    sd = float(np.sqrt(max(variance, 0.0)))
    if sd == 0.0:
        return (
            BEYOND + " (same subjects: a change comes from changed readings or settings)"
            if (change != 0)
            else WITHIN
        )
    z = abs(change) / sd
    return f"{WITHIN if z <= multiplier else BEYOND} ({z:.1f} sd of the difference)"


def _table(run_dir: Path, name: str, columns: list[str] | None = None) -> pd.DataFrame:
    """A run's table: tables/NAME.csv, or the parts listed in tables/NAME/parts.json."""
    path = run_dir / "tables" / f"{name}.csv"
    if path.is_file():
        # pyarrow's reader (threaded): a million-row scores table in a fraction of the time
        return pd.read_csv(path, dtype={"subject": str}, usecols=columns, engine="pyarrow")
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


def _units(run_dir: Path) -> tuple[str, str, str]:
    """(time unit, value unit, transform) from a run's spec.yaml; empty when not stated."""
    from ..inputs.spec import parse_spec_bytes

    path = run_dir / "spec.yaml"
    if not path.is_file():
        raise RecordError(f"{str(run_dir)!r} has no spec.yaml")
    data = parse_spec_bytes(path.read_bytes(), f"{run_dir}/spec.yaml").get("data", {})
    data = data if isinstance(data, dict) else {}
    return (
        str(data.get("time_unit", "")),
        str(data.get("value_unit", "")),
        str(data.get("transform", "none")),
    )


def _same_report(a: Path, b: Path, ra: dict[str, Any], rb: dict[str, Any]) -> tuple[str, str]:
    """Refuse to compare runs of different reports, time units, value units or transforms
    (each said in words); the (time, value) units of the analysed values."""
    from ..inputs.spec import value_unit

    problems = []
    ida, idb = ra["run"].get("report_id"), rb["run"].get("report_id")
    if ida != idb:
        problems.append(f"report ids {ida!r} and {idb!r}")
    (ta, va, xa), (tb, vb, xb) = _units(a), _units(b)
    if ta != tb:
        problems.append(f"time units {ta!r} and {tb!r}")
    if va != vb:
        problems.append(f"value units {va!r} and {vb!r}")
    if xa != xb:
        problems.append(
            f"transforms {xa!r} and {xb!r} (the values are analysed on different scales)"
        )
    if problems:
        raise RecordError(
            "these runs cannot be compared: they differ in "
            + "; ".join(problems)
            + ". Compare versions of one report, with the same units and transform."
        )
    return ta, value_unit(vb, xb)


MOVES_SHOWN = 20  # subjects listed in the table of the largest moves


@dataclass(frozen=True)
class Comparison:
    """Everything ``compare`` found: the findings (with gates and the noise verdicts), the
    two runs' identities, the subjects' changes and the curves behind them."""

    findings: list[Finding]
    identities: list[tuple[str, str, str]]  # (item, run A, run B)
    added: pd.Index  # sorted ids (an Index: a million ids are not a Python list)
    removed: pd.Index
    moves: pd.DataFrame  # the largest trajectory moves of subjects in both runs
    moved_beyond: int
    move_rule: str
    overlap: Overlap
    curves: tuple[Curves, Curves]
    inputs_changed: list[str]
    matching: Matching | None = None
    units: tuple[str, str] = ("", "")  # time, analysed values

    @property
    def crossed(self) -> list[str]:
        return [f.item for f in self.findings if f.crossed]

    def as_dict(self) -> dict[str, Any]:
        """The findings for machines (``compare --json``)."""
        return {
            "runs": [{"item": i, "a": a, "b": b} for i, a, b in self.identities],
            "findings": [f.as_dict() for f in self.findings],
            "gates_crossed": self.crossed,
            "subjects": {
                "in_both": self.overlap.common,
                "added": len(self.added),
                "removed": len(self.removed),
                "moved_beyond_rule": self.moved_beyond,
                "rule": self.move_rule,
                "largest_moves": self.moves.to_dict(orient="records"),
            },
            "uncertainty": self.overlap.words,
            "inputs_changed": self.inputs_changed,
        }


def compare_runs(a: Path, b: Path, gates: GatesSection) -> list[Finding]:
    """What changed from run ``a`` to run ``b``; ``crossed`` marks a gate that fails."""
    return compare(a, b, gates).findings


def _resampled(run_dir: Path) -> pd.DataFrame | None:
    """A run's resampled model parts (a corrected band's), or None (a plug-in band)."""
    try:
        return _table(run_dir, "model_resamples", ["resample", "quantity", "component", "value"])
    except RecordError:
        return None


def _resample_sd(frame: pd.DataFrame | None, quantity: str, component: int) -> float:
    if frame is None:
        return float("nan")
    values = frame.value[(frame.quantity == quantity) & (frame.component == component)]
    return float(np.std(values.to_numpy(dtype=float), ddof=1)) if len(values) > 1 else np.nan


def compare(a: Path, b: Path, gates: GatesSection) -> Comparison:
    """Compare run ``a`` (the earlier) with run ``b`` under ``gates``."""
    ra, rb = load_record(a), load_record(b)
    for run, record in ((a, ra), (b, rb)):
        _, findings = integrity_findings(run, record["outputs"])
        if findings:
            listed = "; ".join(f"{f.name}: {f.kind} ({f.detail})" for f in findings[:5])
            raise RecordError(
                f"the run {str(run)!r} fails its integrity check ({listed}); a comparison "
                "with it would not be one with the recorded analysis"
            )
    units = _same_report(a, b, ra, rb)
    out: list[Finding] = []
    ia = {i["path"]: i["sha256"] for i in ra["inputs"]}
    ib = {i["path"]: i["sha256"] for i in rb["inputs"]}
    changed = []
    for path in sorted(set(ia) | set(ib)):
        same = ia.get(path) == ib.get(path)
        if not same:
            changed.append(str(path))
        out.append(
            Finding(
                f"input {path}",
                (ia.get(path) or "absent")[:12],
                (ib.get(path) or "absent")[:12] + ("" if same else " (changed)"),
            )
        )
    out.append(Finding("spec", ra["spec"]["sha256"][:12], rb["spec"]["sha256"][:12]))
    seta, setb = ra["spec"]["settings"], rb["spec"]["settings"]
    ka, kb = seta["n_components"], setb["n_components"]
    sa = _table(a, "scores", ["subject", "n_obs"] + [f"score_{j + 1}" for j in range(ka)])
    sb = _table(b, "scores", ["subject", "n_obs"] + [f"score_{k + 1}" for k in range(kb)])
    ids_a, ids_b = pd.Index(sa.subject), pd.Index(sb.subject)
    in_b = ids_b.get_indexer(ids_a)  # each of A's subjects in B, -1 where gone
    common = int(np.count_nonzero(in_b >= 0))
    overlap = Overlap(len(sa), len(sb), common)
    added = ids_b.difference(ids_a, sort=True)
    removed = ids_a[in_b < 0].sort_values()
    out.append(
        Finding(
            "subjects",
            str(len(sa)),
            f"{len(sb)} (+{len(added)} / -{len(removed)}; {common} in both)",
        )
    )
    out.append(Finding("readings", str(int(sa.n_obs.sum())), str(int(sb.n_obs.sum()))))
    for key in ("mean_bandwidth", "covariance_bandwidth"):
        out.append(Finding(key, f"{seta[key]['value']:.4g}", f"{setb[key]['value']:.4g}"))
    out.append(Finding("components", str(ka), str(kb), bool(gates.same_components) and ka != kb))
    pa, pb = _resampled(a), _resampled(b)
    va, vb = seta["error_variance"], setb["error_variance"]
    rel = (vb - va) / abs(va)  # signed: a fall is a negative change
    noise_var = overlap.difference_variance(
        np.array(_resample_sd(pa, "error_variance", 0) ** 2),
        np.array(_resample_sd(pb, "error_variance", 0) ** 2),
    )
    out.append(
        Finding(
            "error variance",
            f"{va:.4g}",
            f"{vb:.4g} ({rel:+.1%})",
            abs(rel) > gates.max_error_variance_change,
            against(vb - va, float(noise_var)),
        )
    )
    ca = Curves.of(_table(a, "mean"), _table(a, "eigenfunctions"), _table(a, "components"), ka, pa)
    cb = Curves.of(_table(b, "mean"), _table(b, "eigenfunctions"), _table(b, "components"), kb, pb)
    found, matching = _curve_comparison(ca, cb, gates, overlap)
    ha, hb = seta["mean_bandwidth"]["value"], setb["mean_bandwidth"]["value"]
    if abs(hb - ha) > 0.1 * ha:  # a re-chosen bandwidth moves the mean as data would
        found = [
            replace(
                f,
                noise=f.noise
                + f"; the mean's bandwidth changed ({ha:.4g} -> {hb:.4g}): part of the "
                "change is smoothing, not data",
            )
            if f.item == "largest mean change" and f.noise
            else f
            for f in found
        ]
    out += found
    moves, beyond, rule = subject_moves(sa, sb, ca, cb, matching, float(vb), in_b)
    out.append(Finding("subjects moved beyond the rule", "", f"{beyond} of {common}"))
    identities = [
        ("run", str(a), str(b)),
        ("report id", str(ra["run"].get("report_id")), str(rb["run"].get("report_id"))),
        ("version", str(ra["run"].get("version")), str(rb["run"].get("version"))),
        ("started (UTC)", str(ra["run"].get("started")), str(rb["run"].get("started"))),
        ("finished (UTC)", str(ra["run"].get("finished")), str(rb["run"].get("finished"))),
        ("tool", str(ra["tool"].get("version")), str(rb["tool"].get("version"))),
        ("spec sha256", ra["spec"]["sha256"], rb["spec"]["sha256"]),
        ("results sha256", str(ra.get("results_sha256", "")), str(rb.get("results_sha256", ""))),
    ]
    return Comparison(
        out,
        identities,
        added,
        removed,
        moves,
        beyond,
        rule,
        overlap,
        (ca, cb),
        changed,
        matching,
        units,
    )


@dataclass(frozen=True)
class Curves:
    """A run's mean (with its standard error and simultaneous multiplier) and retained
    eigenfunctions on its grid, its eigenvalues, FVE and their resampling spread."""

    mean_time: np.ndarray
    mean: np.ndarray
    time: np.ndarray
    functions: np.ndarray  # (grid, K)
    eigenvalues: np.ndarray
    fve: np.ndarray
    mean_se: np.ndarray | None = None  # nan where the run draws no band
    multiplier: float = float("nan")  # the mean's simultaneous band over its pointwise se
    eigenvalue_sd: np.ndarray | None = None  # over the corrected band's resamples
    mean_band: tuple[np.ndarray, np.ndarray] | None = None  # the simultaneous band

    @classmethod
    def of(
        cls,
        mean: pd.DataFrame,
        functions: pd.DataFrame,
        components: pd.DataFrame,
        k: int,
        resampled: pd.DataFrame | None = None,
    ) -> Curves:
        se = mean.standard_error.to_numpy(dtype=float) if "standard_error" in mean else None
        multiplier = float("nan")
        if se is not None and "upper_simultaneous" in mean and np.any(se > 0):
            ratio = (mean.upper_simultaneous - mean.band_centre).to_numpy(dtype=float) / se
            ratio = ratio[np.isfinite(ratio)]
            multiplier = float(np.median(ratio)) if ratio.size else multiplier
        return cls(
            mean.time.to_numpy(dtype=float),
            mean["mean"].to_numpy(dtype=float),
            functions.time.to_numpy(dtype=float),
            np.column_stack([functions[f"phi_{j + 1}"].to_numpy(dtype=float) for j in range(k)])
            if k
            else np.zeros((len(functions), 0)),
            components.eigenvalue.to_numpy(dtype=float)[:k],
            components.fve.to_numpy(dtype=float)[:k],
            se,
            multiplier,
            np.array([_resample_sd(resampled, "eigenvalue", j + 1) for j in range(k)]),
            (
                mean.lower_simultaneous.to_numpy(dtype=float),
                mean.upper_simultaneous.to_numpy(dtype=float),
            )
            if "lower_simultaneous" in mean
            else None,
        )


@dataclass(frozen=True)
class Matching:
    """Component j of run A matched to component k of run B, with the sign that aligns
    B's function with A's, on the common grid."""

    grid: np.ndarray
    pairs: list[tuple[int, int]]
    signs: dict[int, float]  # A's component -> sign of B's counterpart
    similarity: np.ndarray  # (Ka, Kb), sign-free


def curve_findings(
    ca: Curves, cb: Curves, gates: GatesSection, overlap: Overlap | None = None
) -> list[Finding]:
    """The mean and the components of two runs compared on their common time domain only
    (``_curve_comparison``)."""
    return _curve_comparison(ca, cb, gates, overlap)[0]


def _curve_comparison(
    ca: Curves, cb: Curves, gates: GatesSection, overlap: Overlap | None
) -> tuple[list[Finding], Matching | None]:
    """The mean and the components of two runs compared on their common time domain only.

    A run's curves are not extended past its own domain: both are interpolated on the
    common domain (run A's grid points inside it, and its ends), the eigenfunctions
    renormalised there to unit norm and matched by the largest absolute inner product
    (greedily: the most similar pair first, then the most similar of the rest; a component
    that swapped order is compared with its counterpart, and said so); the similarity is
    then at most 1 (Cauchy-Schwarz) and does not depend on the sign. Eigenvalues are
    compared between matched components. With ``overlap`` and the runs' uncertainty (the
    mean's standard error, the eigenvalues' resampling spread), each change is set against
    the uncertainty of the difference (``Overlap``): the mean's largest standardized
    change against the runs' simultaneous multiplier, an eigenvalue's against 2.
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
        return out, None
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
    noise = ""
    if overlap is not None and ca.mean_se is not None and cb.mean_se is not None:
        var = overlap.difference_variance(
            np.interp(grid, ca.mean_time, ca.mean_se) ** 2,
            np.interp(grid, cb.mean_time, cb.mean_se) ** 2,
        )
        banded = np.isfinite(var)
        multiplier = np.nanmax([ca.multiplier, cb.multiplier])
        if np.any(banded) and np.isfinite(multiplier):
            if np.all(var[banded] == 0):
                noise = against(change, 0.0)
            else:
                with np.errstate(divide="ignore", invalid="ignore"):
                    z = np.abs(mean_b - mean_a)[banded] / np.sqrt(var[banded])
                z = np.where(np.isfinite(z), z, 0.0)
                top = float(np.max(z))
                noise = (
                    f"{WITHIN if top <= multiplier else BEYOND} (largest {top:.1f} sd of the "
                    f"difference; simultaneous {multiplier:.2f})"
                )
    out.append(
        Finding(
            "largest mean change",
            "",
            f"{change:.4g} ({change / span:.1%} of range)",
            change / span > gates.max_mean_change,
            noise,
        )
    )
    w = trapezoid_weights(grid)

    def on_common(c: Curves) -> np.ndarray:
        f = _functions_on(c, grid)
        norms = np.sqrt(np.maximum(w @ f**2, 1e-300))
        return np.asarray(f / norms)

    fa, fb = on_common(ca), on_common(cb)
    inner = fa.T @ (w[:, None] * fb)  # (Ka, Kb)
    sim = np.abs(inner)
    pairs = _matched(sim)
    for j, k in pairs:
        which = "" if j == k else f" (matched to component {k + 1} of the second run)"
        la, lb = ca.eigenvalues[j], cb.eigenvalues[k]
        rel = (lb - la) / abs(la)  # signed: a fall is a negative change
        noise = ""
        if overlap is not None and ca.eigenvalue_sd is not None and cb.eigenvalue_sd is not None:
            var = overlap.difference_variance(
                np.array(ca.eigenvalue_sd[j] ** 2), np.array(cb.eigenvalue_sd[k] ** 2)
            )
            noise = against(lb - la, float(var))
        out.append(
            Finding(
                f"eigenvalue {j + 1}",
                f"{la:.4g}",
                f"{lb:.4g} ({rel:+.1%}){which}",
                abs(rel) > gates.max_eigenvalue_change,
                noise,
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
    signs = {j: (1.0 if inner[j, k] >= 0 else -1.0) for j, k in pairs}
    return out, Matching(grid, pairs, signs, sim)


def _functions_on(c: Curves, grid: np.ndarray) -> np.ndarray:
    """A run's eigenfunctions interpolated on ``grid`` (not renormalised)."""
    if not c.functions.shape[1]:
        return np.zeros((grid.size, 0))
    return np.column_stack(
        [np.interp(grid, c.time, c.functions[:, j]) for j in range(c.functions.shape[1])]
    )


def subject_moves(
    sa: pd.DataFrame,
    sb: pd.DataFrame,
    ca: Curves,
    cb: Curves,
    matching: Matching | None,
    error_variance_b: float,
    in_b: np.ndarray | None = None,
    chunk: int = 100_000,
) -> tuple[pd.DataFrame, int, str]:
    """For subjects in both runs: the largest move of the recovered trajectory over the
    common domain (each run's mean plus its retained components times the subject's
    scores) and each matched score's change (B's sign aligned with A's). A subject moved
    beyond the rule when its trajectory moved by more than the newer run's error standard
    deviation somewhere: more than a reading's own noise. Returns the ``MOVES_SHOWN``
    largest (a table; ties in subject order), the count beyond the rule, and the rule in
    words. ``in_b``: the row in ``sb`` of each row of ``sa`` (-1 where gone). Vectorised
    over subjects in chunks of ``chunk`` (a grid row each)."""
    sd = float(np.sqrt(max(error_variance_b, 0.0)))
    rule = (
        f"a trajectory moved by more than the newer run's error standard deviation "
        f"({sd:.4g}) at some time of the common domain"
    )
    if in_b is None:
        in_b = pd.Index(sb.subject).get_indexer(pd.Index(sa.subject))
    rows_a = np.flatnonzero(in_b >= 0)
    rows_b = in_b[rows_a]
    ka, kb = ca.functions.shape[1], cb.functions.shape[1]
    if matching is None or rows_a.size == 0:
        return pd.DataFrame(columns=["subject", "n_obs_a", "n_obs_b", "largest_move"]), 0, rule
    grid = matching.grid
    mean_a = np.interp(grid, ca.mean_time, ca.mean)
    mean_b = np.interp(grid, cb.mean_time, cb.mean)
    fa, fb = _functions_on(ca, grid), _functions_on(cb, grid)
    columns_a = [f"score_{j + 1}" for j in range(ka)]
    columns_b = [f"score_{k + 1}" for k in range(kb)]
    score_a = sa[columns_a].to_numpy(dtype=float).reshape(len(sa), ka)[rows_a]
    score_b = sb[columns_b].to_numpy(dtype=float).reshape(len(sb), kb)[rows_b]
    # curve_b - curve_a = (mean_b - mean_a) + [score_b, score_a] @ [fb, -fa]': one product
    both = np.hstack([score_b, score_a])
    functions = np.hstack([fb, -fa]).T
    shift = mean_b - mean_a
    largest = np.empty(rows_a.size)
    for start in range(0, rows_a.size, chunk):
        part = slice(start, start + chunk)
        moved = both[part] @ functions
        moved += shift
        largest[part] = np.max(np.abs(moved, out=moved), axis=1)
    beyond = int(np.count_nonzero(largest > sd))
    # the largest MOVES_SHOWN, ties broken by subject id: every subject tied with the last
    # one shown is a candidate, then sorted (no sort of a million rows)
    if largest.size > MOVES_SHOWN:
        cut = np.partition(largest, largest.size - MOVES_SHOWN)[largest.size - MOVES_SHOWN]
        pick = np.flatnonzero(largest >= cut)
    else:
        pick = np.arange(largest.size)
    frame = pd.DataFrame(
        {
            "subject": sa.subject.to_numpy()[rows_a[pick]],
            "n_obs_a": sa.n_obs.to_numpy()[rows_a[pick]],
            "n_obs_b": sb.n_obs.to_numpy()[rows_b[pick]],
            "largest_move": largest[pick],
        }
    )
    for j, k in matching.pairs:
        frame[f"score_{j + 1}_change"] = matching.signs[j] * score_b[pick, k] - score_a[pick, j]
    top = frame.sort_values(["largest_move", "subject"], ascending=[False, True], kind="stable")
    return top.head(MOVES_SHOWN).reset_index(drop=True), beyond, rule


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
