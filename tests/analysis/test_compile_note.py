"""The first fit in a fresh checkout compiles the kernels; the run says so, once."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import reportgen.analysis.analyse
from reportgen import fit_sparse_fpca
from reportgen.analysis.analyse import analyse
from reportgen.fpca._kernels import compiled_on_disk
from reportgen.inputs.loader import load_dataset
from reportgen.inputs.spec import load_spec
from tests.helpers import ROOT


def test_cache_locator_sees_the_kernels_after_a_fit() -> None:
    # numba's own cache index files (a private locator, so a numba upgrade that moves them
    # fails here rather than silently never saying anything).
    rng = np.random.default_rng(0)
    subj = np.repeat(np.arange(40), 4)
    t = rng.uniform(0, 1, subj.size)
    y = rng.normal(0, 1, 40)[subj] + rng.normal(0, 0.3, subj.size)
    fit_sparse_fpca(pd.DataFrame({"id": subj, "t": t, "y": y}), subject="id", time="t", value="y")
    assert compiled_on_disk()


@pytest.mark.parametrize("warm", [True, False])
def test_compile_note_only_when_the_cache_is_cold(
    warm: bool, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    for name in ("clinic_visits.yaml", "clinic_visits.csv"):
        shutil.copy(ROOT / "specs" / name, tmp_path / name)
    monkeypatch.setattr(reportgen.analysis.analyse, "compiled_on_disk", lambda: warm)
    said: list[str] = []
    spec = load_spec(tmp_path / "clinic_visits.yaml")
    analyse(spec, load_dataset(spec, for_fit=True), said.append)
    notes = [m for m in said if m.startswith("compiling the numerical kernels")]
    assert len(notes) == (0 if warm else 1)
    if notes:
        assert said.index(notes[0]) < said.index("fit")
