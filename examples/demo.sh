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

echo "== 1. synthetic vibration spectra for three tasks (also as class folders of .npy files)"
python examples/pump_data.py --out "$DATA" --folders

echo "== 2. a signing key for the record, and a workspace from the spec"
# The private key stays here (mode 0600); demo.pub goes to whoever checks the workspace.
colonnade key new -o "$OUT/demo"
export COLONNADE_SIGN_KEY="$OUT/demo.key"  # every writing step below signs its history entries
colonnade new specs/pump_spectra.yaml -o "$WS" --by "demo engineer"

echo "== 3. grow one task at a time and seal it; earlier columns stay frozen"
# @grow-and-seal: each task is grown, then sealed (seal lines are added by the seal step)
# The first task reads class folders: its class names are the folder names.
colonnade grow "$WS" --task pump_a_faults --train "$DATA/pump_a_faults" --quiet
colonnade seal "$WS" --task pump_a_faults --probe "$DATA/pump_a_faults_probe"
colonnade grow "$WS" --task pump_b_faults --train "$DATA/pump_b_faults.npz" --quiet
colonnade seal "$WS" --task pump_b_faults --probe "$DATA/pump_b_faults_probe.npz"
# A copy as the workspace stood before its last task, for the closing 'diff'.
rm -rf "$OUT/workspace_before_last_task" && cp -r "$WS" "$OUT/workspace_before_last_task"
colonnade grow "$WS" --task pump_a_cavitation --train "$DATA/pump_a_cavitation.npz" --quiet
# Before sealing it: how much does the new task use each lateral adapter? Trim what it can
# do without, at most 0.5 accuracy points lost on a separate draw of the same pumps.
python examples/pump_data.py --out "$DATA/check" --seed 1 --train 400 --probe 4 >/dev/null
colonnade usage "$WS" --task pump_a_cavitation --data "$DATA/check/pump_a_cavitation.npz" --plot "$OUT/usage_pump_a_cavitation.png"
colonnade trim "$WS" --task pump_a_cavitation --data "$DATA/check/pump_a_cavitation.npz" --quiet \
  --reason "drop lateral adapters the task barely uses"
colonnade seal "$WS" --task pump_a_cavitation --probe "$DATA/pump_a_cavitation_probe.npz"

echo "== 4. what the network holds"
colonnade show "$WS"

echo "== 5. predictions of the first task on its probe set"
colonnade predict "$WS" --task pump_a_faults --data "$DATA/pump_a_faults_probe" -o "$OUT/pump_a_faults_pred.csv"
head -3 "$OUT/pump_a_faults_pred.csv" | cut -c1-120

# @later-steps: checks, costs, diagrams and the report go below
echo "== 6. what each task costs, and whether ten more fit a microcontroller-class sensor module"
colonnade cost "$WS" --hardware vibe-node --project 10

echo "== 7. the architecture diagram: columns, heads, lateral adapters, seals"
if command -v dot >/dev/null 2>&1; then
  colonnade draw "$WS" -o "$OUT/architecture.svg"
  colonnade draw "$WS" -o "$OUT/architecture.png"
  colonnade draw "$WS" -o "$OUT/architecture_compact.svg" --compact
  colonnade draw "$WS" -o "$OUT/architecture_focus.svg" --task pump_a_cavitation
else  # without graphviz's dot only the DOT source can be written
  colonnade draw "$WS" -o "$OUT/architecture.dot"
  echo "note: install graphviz (Debian: apt-get install graphviz) to render the diagrams"
fi

echo "== 8. the review pack: evidence first, as markdown, self-contained HTML, PDF and JSON"
colonnade report "$WS" -o "$OUT/report" --hardware vibe-node --project 10

echo "== 9. every task in one pass (each column once), and one task shipped alone"
colonnade predict "$WS" --all --data "$DATA/pump_a_faults_probe" -o "$OUT/all_tasks_pred.npz"
colonnade export "$WS" --task pump_a_cavitation -o "$OUT/pump_a_cavitation.pt"
colonnade export "$WS" --task pump_a_cavitation -o "$OUT/pump_a_cavitation.onnx"

echo "== 10. the pump tasks shipped as one int8 artifact, measured against float, and checked"
# Calibrated on the validation data the workspace keeps; refused if a sealed task lost
# more than 1 accuracy point. The export is recorded in the history with its outputs.
colonnade export "$WS" --all --int8 -o "$OUT/pumps_int8.onnx"
colonnade check "$WS" --artifact "$OUT/pumps_int8.onnx"

echo "== a second scenario: a camera inspection station adopts its certified defect classifier"
# Invented: the station's classifier (ok / scratch / dent) is already certified and runs
# in onnxruntime. It is adopted unchanged as column 0, proven bit-identical on a probe and
# sealed; an oil-stain check grows beside it, reading the classifier's taps.
INS=$OUT/inspection
python examples/inspection_data.py --out "$INS/data"
colonnade adopt "$INS/data/station_classifier.onnx" -o "$INS/workspace" --task defects \
  --taps "$(cat "$INS/data/taps.txt")" --spec specs/inspection_station.yaml \
  --probe "$INS/data/defects_probe.npz" --seal
colonnade grow "$INS/workspace" --task oil_stain --train "$INS/data/oil_stain.npz" --quiet
colonnade seal "$INS/workspace" --task oil_stain --probe "$INS/data/oil_stain_probe.npz"
colonnade cost "$INS/workspace" --no-latency
if command -v dot >/dev/null 2>&1; then
  colonnade draw "$INS/workspace" -o "$INS/architecture.svg"
fi
# Both tasks ship as one ONNX file: the classifier's own graph, node for node, with the
# oil-stain column reading its taps; the certified task stays bit-identical to the
# classifier run alone, and the file is checked like any artifact.
colonnade export "$INS/workspace" --all -o "$INS/station.onnx"
colonnade check "$INS/workspace" --artifact "$INS/station.onnx"
colonnade check "$INS/workspace"

echo "== what changed with the last task (exits non-zero if a task sealed before it moved)"
colonnade diff "$OUT/workspace_before_last_task" "$WS"

echo "== last: the record and every seal checked, bit for bit, against the demo's public key"
# Keep this the last step: the demo ends with every sealed task checking exact and every
# history entry signed by a trusted key (exits non-zero otherwise).
colonnade check "$WS" --trust "$OUT/demo.pub"

echo "== done: everything is under $OUT/"
