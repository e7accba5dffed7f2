#!/usr/bin/env bash
# verify on the clinic example, timed from outside with benchmarks/timing.py (median of 5; 3 with
# --render): the figures in benchmarks/VERIFY.md. Run from the repository: benchmarks/verify_time.sh
set -euo pipefail
here="$(cd "$(dirname "$0")/.." && pwd)"
exe="$here/.venv/bin/reportgen"
work="$(mktemp -d)"
trap 'rm -rf "$work"' EXIT
cd "$work"
cp "$here"/specs/clinic_visits.yaml "$here"/specs/clinic_visits.csv .
ssh-keygen -q -t ed25519 -N "" -C analyst@example.org -f key
echo "analyst@example.org $(cut -d' ' -f1,2 key.pub)" > allowed_signers
"$exe" run clinic_visits.yaml --out runs --quiet --sign key >/dev/null
run=runs/clinic-visits/v001
"$here/.venv/bin/python" "$here/benchmarks/timing.py" -n 5 -- "$exe" verify "$run"
"$here/.venv/bin/python" "$here/benchmarks/timing.py" -n 5 -- "$exe" verify "$run" --allowed-signers allowed_signers
"$here/.venv/bin/python" "$here/benchmarks/timing.py" -n 3 -- "$exe" verify "$run" --render
