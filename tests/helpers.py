"""What tests share: the repository's root, the real command line in a subprocess, and the
second example split into Parquet files."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def cli(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess[str]:
    """Run the real entry point in a subprocess."""
    return subprocess.run(
        [sys.executable, "-m", "reportgen.cli", *args],
        cwd=cwd,
        capture_output=True,
        text=True,
        timeout=600,
    )


def pump_folder(base: Path) -> Path:
    """The second example (three depots compared) split by pump into three Parquet files
    in ``base``/pumps, and a spec that names the folder (its path)."""
    import pandas as pd

    data = pd.read_csv(ROOT / "specs" / "pump_service.csv", dtype={"pump": str})
    (base / "pumps").mkdir()
    ids = sorted(data.pump.unique())
    key = data.pump.map({s: i * 3 // len(ids) for i, s in enumerate(ids)})
    for k, part in data.groupby(key):
        part.to_parquet(base / "pumps" / f"part-{k}.parquet", index=False)
    spec = base / "pumps.yaml"
    spec.write_text(
        (ROOT / "specs" / "pump_service.yaml")
        .read_text()
        .replace("file: pump_service.csv", "file: pumps")
        .replace("logo: fleet_logo.svg", "")
    )
    return spec
