"""Scores and trajectories for subjects that were not in a run, from the run's stored fit.

``load_fit(RUN)`` checks the run's integrity (every file against SHA256SUMS) before it
reads anything, then returns a :class:`StoredFit`: the run's spec (so new data are read
exactly as the run read its own: columns, row selection, time origin, transform, checks)
and its :class:`~reportgen.fpca.predictor.Predictor` (``tables/model.csv``).
"""

from __future__ import annotations

import io
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from ..errors import DataError, EstimationError, OutputError, RecordError
from ..fpca.design import Sample
from ..fpca.frame import arrays_from_frame
from ..fpca.predictor import Predictor, without_bands
from ..inputs.files import read_path
from ..inputs.loader import load_file, require_passed
from ..inputs.spec import Spec, spec_from_bytes
from ..report.tables import neutralised
from .integrity import integrity_findings
from .record import load_record

OUTPUT_SUFFIXES = (".csv", ".parquet")


@dataclass(frozen=True)
class StoredFit:
    """A run's fit, read back for prediction."""

    run: Path
    spec: Spec
    predictor: Predictor
    replicates: tuple[Predictor, ...] = ()  # a corrected band's resamples
    band_unavailable: bool = False

    def predict(self, frame: pd.DataFrame) -> pd.DataFrame:
        """Predictions for the readings in ``frame`` (columns subject, time, value, already
        on the run's scale: times counted as the run counts them, values transformed).

        Returns one row per subject and grid time: subject, n_obs, score_1..K, time,
        fitted, lower, upper, lower_simultaneous, upper_simultaneous, lower_new_reading,
        upper_new_reading: the bands of the run (corrected by its stored resamples, or
        plug-in; empty where the run's corrected band was unavailable), at the run's level;
        the same numbers as the run's fit predicting in memory.
        """
        codes, t, y, labels = arrays_from_frame(frame, "subject", "time", "value")
        out = self.predictor.predict(Sample.from_arrays(codes, t, y), labels, self.replicates)
        if self.band_unavailable:
            out = without_bands(out)
        if "group" in frame:
            per = frame.drop_duplicates("subject").set_index("subject")["group"]
            out.insert(1, "group", per.reindex(out.subject).to_numpy())
        return out

    def predict_file(self, data: str | Path) -> pd.DataFrame:
        """Read a data file as the run read its own (same spec) and predict its subjects.

        Raises DataError when the file fails the run's data checks or has readings
        outside the run's time domain.
        """
        path = Path(data)
        raw = read_path(path, str(data), "the data file")
        ds = load_file(self.spec, path, path.name, for_fit=True, design=False, raw=raw)
        require_passed(ds)
        assert ds.readings is not None  # no check failed
        try:
            return self.predict(ds.readings.frame())
        except EstimationError as e:
            raise DataError(f"{path.name}: {e}") from e


def load_fit(run_dir: str | Path) -> StoredFit:
    """The fit stored in a run directory, after checking every file against SHA256SUMS.

    Raises RecordError when the run is incomplete or any of its files changed.
    """
    run = Path(run_dir)
    record = load_record(run)
    _, findings = integrity_findings(run, record["outputs"])
    if findings:
        listed = "; ".join(
            f"{f.name}: {f.kind}" + (f" ({f.detail})" if f.detail else "") for f in findings[:5]
        )
        raise RecordError(
            f"the run {str(run)!r} fails its integrity check ({listed}); "
            "predictions from it would not be those of the recorded analysis"
        )
    model = run / "tables" / "model.csv"
    if not model.is_file():
        raise RecordError(
            f"the run {str(run)!r} has no tables/model.csv (made by an earlier "
            "version of reportgen); re-run its spec to predict from it"
        )
    spec = spec_from_bytes((run / "spec.yaml").read_bytes(), run / "spec.yaml")
    try:
        predictor = Predictor.from_frame(pd.read_csv(model))
        resamples = run / "tables" / "model_resamples.csv"
        replicates = (
            tuple(
                Predictor.from_frame(part.drop(columns="resample"))
                for _, part in pd.read_csv(resamples).groupby("resample", sort=True)
            )
            if resamples.is_file()
            else ()
        )
        band = run / "tables" / "band.csv"
        unavailable = band.is_file() and pd.read_csv(band).kind.iloc[0] == "unavailable"
    except (EstimationError, KeyError, AttributeError, IndexError, ValueError) as e:
        raise RecordError(f"{model.parent}: a stored model table is damaged ({e})") from e
    return StoredFit(run, spec, predictor, replicates, bool(unavailable))


def write_table(frame: pd.DataFrame, out: str | Path) -> Path:
    """Write CSV or Parquet by the suffix, atomically (a temporary file renamed); refuses to
    replace an existing file."""
    path = Path(out)
    suffix = path.suffix.lower()
    if suffix not in OUTPUT_SUFFIXES:
        raise OutputError(f"--out {str(out)!r} must end in .csv or .parquet")
    if path.exists():
        raise OutputError(f"{str(out)!r} exists already; choose another name")
    if suffix == ".csv":
        data = (
            neutralised(frame)
            .to_csv(index=False, float_format="%.10g", lineterminator="\n")
            .encode()
        )
    else:
        buf = io.BytesIO()
        frame.to_parquet(buf, index=False)
        data = buf.getvalue()
    folder = path.parent if str(path.parent) else Path(".")
    tmp = ""
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=folder)
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.replace(tmp, path)
    except OSError as e:
        if tmp:
            Path(tmp).unlink(missing_ok=True)
        raise OutputError(f"cannot write {str(out)!r}: {e.strerror}") from e
    return path


def prediction_size(frame: pd.DataFrame) -> tuple[int, int]:
    """(subjects, rows) of a prediction table."""
    return int(pd.unique(frame.subject).size), len(frame)
