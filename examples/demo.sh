#!/usr/bin/env bash
# The pump-monitoring demo, end to end, with the same commands a user would type.
# Everything lands under ./demo-out/. The data is synthetic and invented for the demo.
set -euo pipefail
cd "$(dirname "$0")/.."
OUT=demo-out
WS=$OUT/workspace
DATA=$OUT/data
rm -rf "$OUT"
mkdir -p "$OUT"

echo "== 1. synthetic vibration spectra for three tasks"
python examples/pump_data.py --out "$DATA"

echo "== 2. a workspace from the spec"
colonnade new specs/pump_spectra.yaml -o "$WS"

echo "== 3. grow one task at a time and seal it; earlier columns stay frozen"
# @grow-and-seal: each task is grown, then sealed (seal lines are added by the seal step)
colonnade grow "$WS" --task pump_a_faults --train "$DATA/pump_a_faults.npz" --quiet
colonnade seal "$WS" --task pump_a_faults --probe "$DATA/pump_a_faults_probe.npz"
colonnade grow "$WS" --task pump_b_faults --train "$DATA/pump_b_faults.npz" --quiet
colonnade seal "$WS" --task pump_b_faults --probe "$DATA/pump_b_faults_probe.npz"
colonnade grow "$WS" --task pump_a_cavitation --train "$DATA/pump_a_cavitation.npz" --quiet
colonnade seal "$WS" --task pump_a_cavitation --probe "$DATA/pump_a_cavitation_probe.npz"

echo "== 4. what the network holds"
colonnade show "$WS"

echo "== 5. predictions of the first task on its probe set"
colonnade predict "$WS" --task pump_a_faults --data "$DATA/pump_a_faults_probe.npz" -o "$OUT/pump_a_faults_pred.npz"

# @later-steps: checks, costs, diagrams and the report go below
echo "== last: every seal checked, bit for bit (exits non-zero if any task moved)"
# Keep this the last step: the demo ends with every sealed task checking exact.
colonnade check "$WS"

echo "== done: everything is under $OUT/"
