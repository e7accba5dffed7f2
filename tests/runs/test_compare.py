"""compare: changes are signed (a fall reads as a fall), the gates take their size, and
curves are compared on the runs' common time domain with their components matched."""

from __future__ import annotations

import json
import shutil
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from reportgen.inputs.files import sha256_file
from reportgen.inputs.spec import GatesSection
from reportgen.runs.compare import Curves, compare_runs, curve_findings
from reportgen.runs.integrity import checksum_list, run_files


def _refreshed(run: Path, to: Path, eigenvalue_factor: float, error_factor: float) -> Path:
    """A copy of ``run`` whose first eigenvalue and error variance are scaled, with its
    record and checksum list kept consistent (what a refresh of the data could give)."""
    shutil.copytree(run, to)
    table = to / "tables" / "components.csv"
    components = pd.read_csv(table)
    components.loc[0, "eigenvalue"] *= eigenvalue_factor
    components.to_csv(table, index=False)
    record = json.loads((to / "record.json").read_text())
    record["spec"]["settings"]["error_variance"] *= error_factor
    record["outputs"]["tables/components.csv"] = sha256_file(table)
    (to / "record.json").write_text(json.dumps(record, indent=2) + "\n")
    names = [n for n in run_files(to) if n != "SHA256SUMS"]
    (to / "SHA256SUMS").write_bytes(checksum_list({n: sha256_file(to / n) for n in names}))
    return to


def test_a_fall_is_signed_and_gated_by_its_size(
    regenerated: dict[str, Path], tmp_path: Path
) -> None:
    # arithmetic on known changes (common practice, no source): 9661 -> 5452 is -43.6%
    run = regenerated["clinic_visits"]
    gates = GatesSection(max_eigenvalue_change=0.4, max_error_variance_change=0.1)
    lower = _refreshed(run, tmp_path / "lower", 0.564, 0.9366)
    found = {f.item: f for f in compare_runs(run, lower, gates)}
    assert "(-43.6%)" in found["eigenvalue 1"].b and found["eigenvalue 1"].crossed
    assert "(-6.3%)" in found["error variance"].b and not found["error variance"].crossed
    higher = _refreshed(run, tmp_path / "higher", 1.2, 1.6)
    found = {f.item: f for f in compare_runs(run, higher, gates)}
    assert "(+20.0%)" in found["eigenvalue 1"].b and not found["eigenvalue 1"].crossed
    assert "(+60.0%)" in found["error variance"].b and found["error variance"].crossed


def _curves(lo: float, hi: float, funcs: list, values: list, mean=None) -> Curves:  # type: ignore[no-untyped-def]
    """Invented run curves on [lo, hi] (51 grid points; the functions as given, not
    normalised)."""
    t = np.linspace(lo, hi, 51)
    f = np.column_stack([fn(t) for fn in funcs])
    m = mean(t) if mean is not None else 1.0 + t
    v = np.asarray(values, dtype=float)
    return Curves(t, m, t, f, v, v / v.sum())


def _unit(fn):  # type: ignore[no-untyped-def]
    """fn scaled to unit norm on [0, 1] (numerically, fine grid)."""
    t = np.linspace(0, 1, 20001)
    norm = np.sqrt(np.trapezoid(fn(t) ** 2, t))
    return lambda x: fn(x) / norm


ONE = _unit(lambda t: np.ones_like(t))
TWO = _unit(lambda t: np.cos(np.pi * t))
THREE = _unit(lambda t: np.cos(2 * np.pi * t))


def test_a_shorter_domain_is_compared_on_the_common_part_only() -> None:
    # The same functions and mean, the second run cut at 0.6 (a study cut earlier): on the
    # common domain, renormalised there, every similarity is 1 (Cauchy-Schwarz; the old
    # flat extension gave more than 1) and the mean does not change; the domain change is a
    # finding of its own. Reference: the functions' definitions (no outside source).
    a = _curves(0, 1, [ONE, TWO], [4.0, 1.0])
    b = _curves(0, 0.6, [ONE, TWO], [4.0, 1.0])
    found = {f.item: f for f in curve_findings(a, b, GatesSection())}
    assert found["time domain"].b == "0 to 0.6 (changed; curves compared on 0 to 0.6)"
    for j in (1, 2):
        sim = float(found[f"eigenfunction {j} similarity"].b)
        assert sim == pytest.approx(1.0, abs=1e-3) and sim <= 1.0 + 1e-12
        assert not found[f"eigenfunction {j} similarity"].crossed
    assert found["largest mean change"].b.startswith("0 (0.0% of range)")


def test_a_swapped_pair_is_matched_and_said() -> None:
    # Components 2 and 3 come in the other order in the second run (their eigenvalues too):
    # each is compared with its counterpart, the eigenvalues do not change and the match
    # is named.
    a = _curves(0, 1, [ONE, TWO, THREE], [5.0, 2.0, 1.9])
    b = _curves(0, 1, [ONE, THREE, TWO], [5.0, 1.9, 2.0])
    found = {f.item: f for f in curve_findings(a, b, GatesSection())}
    assert found["eigenfunction 2 similarity"].b.startswith("1.000 (matched to component 3")
    assert found["eigenfunction 3 similarity"].b.startswith("1.000 (matched to component 2")
    assert found["eigenvalue 2"].b.startswith("2 (+0.0%) (matched to component 3")
    assert not any(f.crossed for f in found.values())


def test_a_changed_k_compares_the_common_components_and_a_sign_does_not_matter() -> None:
    # Three components against two (the third gone), the second's sign flipped: two pairs
    # compared, similarity 1; a half-turn mix of 1 and 2 in another run crosses the gate.
    a = _curves(0, 1, [ONE, TWO, THREE], [5.0, 2.0, 1.0])
    b = _curves(0, 1, [ONE, lambda t: -TWO(t)], [5.0, 2.0])
    found = {f.item: f for f in curve_findings(a, b, GatesSection())}
    assert "eigenfunction 3 similarity" not in found
    assert float(found["eigenfunction 2 similarity"].b) == pytest.approx(1.0, abs=1e-3)
    c, s = np.cos(np.pi / 4), np.sin(np.pi / 4)
    mixed = _curves(
        0, 1, [lambda t: c * ONE(t) + s * TWO(t), lambda t: -s * ONE(t) + c * TWO(t)], [5.0, 2.0]
    )
    found = {f.item: f for f in curve_findings(a, mixed, GatesSection())}
    sim = float(found["eigenfunction 1 similarity"].b[:5])
    assert sim == pytest.approx(c, abs=2e-3) and found["eigenfunction 1 similarity"].crossed


def test_subject_moves_follow_their_scores_with_signs_aligned() -> None:
    # Invented runs: the same mean and functions, the second run's phi_2 sign-flipped. A
    # subject whose scores are the same curve (score_2 negated with the function) has not
    # moved; one whose first score rose by 0.5 moved by 0.5 x max|phi_1| (= 0.5, phi_1 the
    # unit constant on [0, 1]); the rule is the newer run's error sd. Reference: the
    # definition of the trajectory, mean + sum score_k phi_k (no outside source).
    from reportgen.runs.compare import _curve_comparison, subject_moves

    a = _curves(0, 1, [ONE, TWO], [4.0, 1.0])
    b = _curves(0, 1, [ONE, lambda t: -TWO(t)], [4.0, 1.0])
    _, matching = _curve_comparison(a, b, GatesSection(), None)
    assert matching is not None and matching.signs == {0: 1.0, 1: -1.0}
    sa = pd.DataFrame(
        {
            "subject": ["s1", "s2", "gone"],
            "n_obs": [3, 4, 2],
            "score_1": [1.0, -2.0, 0.0],
            "score_2": [0.3, 0.1, 0.0],
        }
    )
    sb = pd.DataFrame(
        {
            "subject": ["s1", "s2", "new"],
            "n_obs": [3, 5, 1],
            "score_1": [1.0, -1.5, 0.0],
            "score_2": [-0.3, -0.1, 0.0],
        }
    )
    moves, beyond, rule = subject_moves(sa, sb, a, b, matching, error_variance_b=0.09)
    by = moves.set_index("subject")
    assert list(moves.subject) == ["s2", "s1"]  # the largest first; only subjects in both
    assert by.loc["s1", "largest_move"] == pytest.approx(0.0, abs=1e-12)
    assert by.loc["s2", "largest_move"] == pytest.approx(0.5, rel=1e-3)
    assert by.loc["s2", "score_1_change"] == pytest.approx(0.5)
    assert by.loc["s2", "score_2_change"] == pytest.approx(0.0, abs=1e-12)  # sign aligned
    assert beyond == 1 and "(0.3)" in rule  # 0.5 > sqrt(0.09); 0 is not


def test_noise_verdicts_follow_the_shared_subjects() -> None:
    # The same mean curve moved by 0.1 everywhere. With standard errors of 0.1 in two
    # independent runs of 100 subjects, the difference has sd 0.141: 0.71 sd, within. With
    # the same 100 subjects, sampling cannot move it: beyond. Reference: Overlap's formula,
    # tested against a simulation in tests/runs/test_change_report.py.
    from reportgen.runs.compare import BEYOND, WITHIN, Overlap

    a = replace(_curves(0, 1, [ONE], [1.0]), mean_se=np.full(51, 0.1), multiplier=2.5)
    b = replace(a, mean=a.mean + 0.1)
    independent = {f.item: f for f in curve_findings(a, b, GatesSection(), Overlap(100, 100, 0))}
    said = independent["largest mean change"].noise
    assert said.startswith(WITHIN) and "largest 0.7 sd" in said, said
    same = {f.item: f for f in curve_findings(a, b, GatesSection(), Overlap(100, 100, 100))}
    assert same["largest mean change"].noise.startswith(BEYOND)
