#!/usr/bin/env bash
# compare of two runs of 1,000,000 simulated subjects (data and tables as Parquet parts),
# timed from outside
# with benchmarks/timing.py (median of 5; 3 with --out): the figures in benchmarks/RESULTS.md,
# section 6. The second run is a refresh: 5% of subjects removed, 20% new ones added, one
# reading changed. Run from the repository: benchmarks/compare_time.sh
set -euo pipefail
here="$(cd "$(dirname "$0")/.." && pwd)"
exe="$here/.venv/bin/reportgen"
work="$(mktemp -d)"
[ -n "${KEEP:-}" ] || trap 'rm -rf "$work"' EXIT  # KEEP=1: keep the runs (printed)
cd "$work"
echo "work: $work"
"$here/.venv/bin/python" - "$here" <<'PY'
import sys
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, sys.argv[1])
from benchmarks.run import simulate

subj, t, y = simulate(1_000_000, seed=3, max_readings=8)
first = pd.DataFrame({"unit": subj, "t": t, "y": y})
def parts(frame, folder):  # a folder of four Parquet files: the tables come as Parquet parts
    Path(folder).mkdir()
    for k in range(4):
        frame[frame.unit % 4 == k].to_parquet(f"{folder}/part-{k}.parquet", index=False)


parts(first, "first")
new_subj, new_t, new_y = simulate(200_000, seed=4, max_readings=8)
added = pd.DataFrame({"unit": np.asarray(new_subj) + 10_000_000, "t": new_t, "y": new_y})
kept = first[first.unit % 20 != 0].copy()  # 5% removed
kept.iloc[0, kept.columns.get_loc("y")] += 1.0  # one reading changed
parts(pd.concat([kept, added], ignore_index=True), "second")
Path("big.yaml").write_text(
    "report: {id: big, title: 'Benchmark: simulated readings'}\n"
    "data: {file: big, subject: unit, time: t, value: y}\n"
    "subjects: {tables: parquet}\n"
)
PY
cp -r first big
"$exe" run big.yaml --out runs --quiet >/dev/null
rm -rf big && cp -r second big
"$exe" run big.yaml --out runs --quiet >/dev/null
[ -z "${RUNS_ONLY:-}" ] || exit 0  # RUNS_ONLY=1 (with KEEP=1): the two runs for profiling
"$here/.venv/bin/python" "$here/benchmarks/timing.py" -n 5 -- "$exe" compare runs/big/v001 runs/big/v002 || true
"$here/.venv/bin/python" "$here/benchmarks/timing.py" -n 3 -- "$exe" compare runs/big/v001 runs/big/v002 --json || true
"$here/.venv/bin/python" "$here/benchmarks/timing.py" -n 3 -- bash -c "rm -rf change && $exe compare runs/big/v001 runs/big/v002 --out change" || true
"$exe" compare runs/big/v001 runs/big/v002 | tail -n 8
