"""The CSV tables of a run, in canonical form (fixed float format, fixed column order).

The canonical bytes are what ``results_sha256`` digests: floats are written with 10
significant digits so that the digest does not depend on the last bits of a BLAS.
"""

from __future__ import annotations

import hashlib
from dataclasses import asdict

import numpy as np
import pandas as pd

from ..analysis.adequacy import adequacy_tables
from ..analysis.analyse import AnalysisResult
from ..analysis.subjects import every_subject_frames, shown_trajectories
from ..analysis.views import other_functions

FLOAT_FORMAT = "%.10g"


def to_csv_bytes(frame: pd.DataFrame) -> bytes:
    """The canonical CSV bytes of ``frame``: what ``frame.to_csv(index=False,
    float_format="%.10g", lineterminator="\n")`` writes, built column by column.

    pandas formats every cell through its own per-value machinery; formatting each column
    with one list comprehension and joining the rows once takes less than half the time
    (CHOICES.md). Rows go in blocks of ``CSV_BLOCK_ROWS``, so that the cells' Python
    strings never all exist at once. Columns of other kinds (dates, categories) go through pandas.
    ``tests/report/test_tables.py`` holds the two byte for byte against each other.
    """
    header = ",".join(_quoted(str(c)) for c in frame.columns)
    if header == "" and len(frame.columns) == 1:
        header = '""'
    parts = [(header + "\n").encode("utf-8")]
    for start in range(0, len(frame), CSV_BLOCK_ROWS):
        block = frame.iloc[start : start + CSV_BLOCK_ROWS]
        maybe = [_column_text(block[c]) for c in block.columns]
        columns = [col for col in maybe if col is not None]
        if len(columns) < len(maybe):
            text = frame.to_csv(index=False, float_format=FLOAT_FORMAT, lineterminator="\n")
            return text.encode("utf-8")
        if len(columns) == 1:  # the csv module writes a lone empty field as "" (not a blank line)
            columns = [[v if v else '""' for v in columns[0]]]
        rows = map(",".join, zip(*columns, strict=True)) if columns else iter(())
        parts.append(("\n".join(rows) + "\n").encode("utf-8"))
    return b"".join(parts)


CSV_BLOCK_ROWS = 100_000


def _quoted(text: str) -> str:
    """A field as the csv module's QUOTE_MINIMAL writes it with the line terminator "\n"
    (the delimiter, the quote character or the terminator make it quoted)."""
    if any(ch in text for ch in ',"\n'):
        return '"' + text.replace('"', '""') + '"'
    return text


def _column_text(series: pd.Series) -> list[str] | None:
    """The column's cells as pandas writes them; None for kinds left to pandas."""
    dtype = series.dtype
    if isinstance(dtype, np.dtype) and dtype.kind == "b":
        return ["True" if v else "False" for v in series.tolist()]
    if isinstance(dtype, np.dtype) and dtype.kind == "f":
        values = series.to_numpy(dtype=np.float64)
        text = [FLOAT_FORMAT % v for v in values.tolist()]
        for i in np.flatnonzero(np.isnan(values)).tolist():
            text[i] = ""
        return text
    if isinstance(dtype, np.dtype) and dtype.kind in "iu":
        return [str(v) for v in series.tolist()]
    if (isinstance(dtype, np.dtype) and dtype.kind == "O") or isinstance(dtype, pd.StringDtype):
        cells = series.tolist()
        if not all(
            isinstance(v, str) or v is None or (isinstance(v, float) and v != v) or v is pd.NA
            for v in cells
        ):
            return None
        text = ["" if not isinstance(v, str) else v for v in cells]
        joined = "\x00".join(text)  # one scan for the characters that need quoting
        if not any(ch in joined for ch in ',"\n'):
            return text
        return [_quoted(v) for v in text]
    return None


def build_tables(result: AnalysisResult) -> dict[str, pd.DataFrame]:
    fit = result.fit
    k = fit.n_components
    tables: dict[str, pd.DataFrame] = {}
    z, zs = fit.band_multiplier(), fit.mean_simultaneous_multiplier
    tables["mean"] = pd.DataFrame(
        {
            "time": fit.grid,
            "mean": fit.mean,
            "band_centre": fit.mean_band_centre,
            "standard_error": fit.mean_se,
            "lower": fit.mean_band_centre - z * fit.mean_se,
            "upper": fit.mean_band_centre + z * fit.mean_se,
            "lower_simultaneous": fit.mean_band_centre - zs * fit.mean_se,
            "upper_simultaneous": fit.mean_band_centre + zs * fit.mean_se,
            "degrees_of_freedom": fit.mean_degrees_of_freedom,
        }
    )
    n_all = fit.all_eigenvalues.size
    tables["components"] = pd.DataFrame(
        {
            "component": np.arange(1, n_all + 1),
            "eigenvalue": fit.all_eigenvalues,
            "fve": fit.fve,
            "cumulative_fve": fit.cumulative_fve,
            "retained": np.arange(n_all) < k,
            "refined": np.arange(n_all) < fit.likelihood.eigenvalues.size,
            "surface_eigenvalue": fit.surface_eigenvalues,
        }
    )
    ef = pd.DataFrame({"time": fit.grid})
    for j in range(k):
        ef[f"phi_{j + 1}"] = fit.eigenfunctions[:, j]
    other = other_functions(fit)
    if other is not None:  # the estimate not used, matched to the used components
        name = "smoothing" if fit.functions.used == "likelihood" else "likelihood"
        for j in range(k):
            ef[f"{name}_phi_{j + 1}"] = other[:, j]
    tables["eigenfunctions"] = ef
    src = fit.functions
    tables["eigenfunction_source"] = pd.DataFrame(
        [
            {
                "used": src.used,
                "asked": src.asked,
                "reason": src.reason,
                "held_out_loglik_smoothing": src.held_out_smoothing,
                "held_out_loglik_likelihood": src.held_out_likelihood,
                "folds": src.folds,
                "spline_basis": src.n_basis,
                "subjects": src.subjects,
            }
        ]
    )
    if result.spec.subjects.tables == "csv":
        tables.update(every_subject_frames(result))
    if result.groups is not None:
        tables.update(group_tables(result))
    tables["trajectories"] = shown_trajectories(result)
    tables["checks"] = pd.DataFrame(
        [(c.name, c.status, c.detail) for c in result.dataset.checks],
        columns=["check", "status", "detail"],
    )
    sel = fit.selection
    tables["bandwidths"] = pd.DataFrame(
        [
            (what, h, c, h == choice.value)
            for what, choice in (
                ("mean", fit.mean_bandwidth_choice),
                ("covariance", fit.covariance_bandwidth_choice),
                ("diagonal", fit.diagonal_bandwidth_choice),
            )
            for h, c in zip(
                choice.candidates or (choice.value,), choice.criterion or (np.nan,), strict=True
            )
        ],
        columns=["smoother", "bandwidth", "criterion", "chosen"],
    )
    tables["selection"] = pd.DataFrame(
        {
            "components": sel.k,
            "cumulative_fve": sel.cumulative_fve,
            "aic": sel.aic,
            "bic": sel.bic,
            "cv_error": sel.cv,
            "chosen": sel.k == sel.chosen,
        }
    )
    rows = []
    for run in result.sensitivity:
        row: dict[str, object] = {
            "factor": run.factor,
            "mean_bandwidth": run.mean_bandwidth,
            "covariance_bandwidth": run.covariance_bandwidth,
            "diagonal_bandwidth": run.diagonal_bandwidth,
        }
        if run.fit is None:
            row.update({"n_components": np.nan, "error_variance": np.nan, "note": run.error})
        else:
            row.update(
                {
                    "n_components": run.fit.rule_picks(result.spec.options.component_rule),
                    "error_variance": run.fit.error_variance,
                    "note": "",
                }
            )
        for j in range(k):
            ev = (
                run.fit.all_eigenvalues[j]
                if run.fit is not None and j < run.fit.all_eigenvalues.size
                else np.nan
            )
            row[f"eigenvalue_{j + 1}"] = ev
            row[f"similarity_{j + 1}"] = run.similarity[j] if run.similarity else np.nan
        rows.append(row)
    tables["sensitivity"] = pd.DataFrame(rows)
    if result.adequacy is not None:
        tables.update(adequacy_tables(result.adequacy))
    tables["model"] = fit.predictor.to_frame()
    tables["band"] = pd.DataFrame([asdict(fit.band)])
    if fit.replicates:  # a corrected band: predictions from the run need its resamples
        tables["model_resamples"] = pd.concat(
            [
                rep.to_frame().assign(resample=b + 1)[
                    ["resample", "quantity", "component", "time", "value"]
                ]
                for b, rep in enumerate(fit.replicates)
            ],
            ignore_index=True,
        )
    tables["units"] = pd.DataFrame(
        sorted(result.spec.units().items()), columns=["quantity", "unit"]
    )
    return tables


def group_tables(result: AnalysisResult) -> dict[str, pd.DataFrame]:
    """groups.csv (sizes, average scores, the test) and group_means.csv (curves, bands)."""
    g, fit = result.groups, result.fit
    assert g is not None
    z = fit.band_multiplier()
    summary = pd.DataFrame({"group": list(g.labels), "n_subjects": g.n_subjects})
    for j in range(g.score_means.shape[1]):
        summary[f"mean_score_{j + 1}"] = g.score_means[:, j]
    summary["pillai_trace"] = g.statistic
    summary["p_value"] = g.p_value
    summary["permutations"] = g.permutations
    summary["seed"] = g.seed
    n_grid = fit.grid.size
    means = pd.DataFrame(
        {
            "group": np.repeat(list(g.labels), n_grid),
            "time": np.tile(fit.grid, len(g.labels)),
            "mean": g.means.ravel(),
            "band_centre": g.band_centres.ravel(),
            "standard_error": g.mean_se.ravel(),
            "lower": (g.band_centres - z * g.mean_se).ravel(),
            "upper": (g.band_centres + z * g.mean_se).ravel(),
        }
    )
    return {"groups": summary, "group_means": means}


# A text cell that starts with one of these is run as a formula by a spreadsheet that opens
# the CSV; it is written with a leading apostrophe, which spreadsheets show as text
# (common practice, no source).
FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def neutralised(frame: pd.DataFrame) -> pd.DataFrame:
    """``frame`` with every text cell that a spreadsheet would run as a formula prefixed
    with an apostrophe (numbers, even negative ones, are not text and stay as they are)."""
    out = frame
    for column in frame.columns:
        series = frame[column]
        if not (pd.api.types.is_object_dtype(series) or pd.api.types.is_string_dtype(series)):
            continue
        text = series.astype("string")
        risky = text.str.startswith(FORMULA_START).fillna(False).to_numpy(dtype=bool)
        if risky.any():
            if out is frame:
                out = frame.copy()
            out[column] = series.where(~risky, "'" + text)
    return out


def canonical_bytes(tables: dict[str, pd.DataFrame]) -> dict[str, bytes]:
    return {
        f"tables/{name}.csv": to_csv_bytes(neutralised(frame))
        for name, frame in sorted(tables.items())
    }


def results_digest(
    canonical: dict[str, bytes], parts: dict[str, tuple[int, str]] | None = None
) -> str:
    """SHA-256 over the canonical tables: name, length and bytes of each, in name order.
    A table written in parts (``parts``: each part's run-relative name -> the length and
    SHA-256 of its canonical CSV) enters as each part's name, length and SHA-256 (hex)."""
    h = hashlib.sha256()
    held = parts or {}
    for name in sorted({*canonical, *held}):
        if name in canonical:
            data = canonical[name]
            h.update(f"{name}\n{len(data)}\n".encode())
            h.update(data)
        else:
            size, sha = held[name]
            h.update(f"{name}\n{size}\n{sha}".encode())
    return h.hexdigest()
