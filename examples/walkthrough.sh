#!/usr/bin/env bash
# The README's curl walkthrough, runnable against a started server:
#   grovekeeper serve --port 8000 &   then   bash examples/walkthrough.sh
# GROVEKEEPER_URL picks another server; GROVEKEEPER_API_KEY is sent when set.
set -euo pipefail
BASE="${GROVEKEEPER_URL:-http://localhost:8000}"
PY="${PYTHON:-python3}"
DIR="$(mktemp -d)"
trap 'rm -rf "$DIR"' EXIT
AUTH=()
if [ -n "${GROVEKEEPER_API_KEY:-}" ]; then AUTH=(-H "Authorization: Bearer $GROVEKEEPER_API_KEY"); fi
field() { "$PY" -c "import json,sys; print(json.load(sys.stdin)$1)"; }
call() { curl -sS --fail-with-body "${AUTH[@]}" "$@"; }

"$PY" -m examples.demo_data "$DIR" >/dev/null

echo "1. upload kilns.csv"
DATASET=$(call --data-binary @"$DIR/kilns.csv" -H 'Content-Type: text/csv' \
  "$BASE/v1/datasets?name=kilns" | field '["id"]')
echo "   dataset $DATASET"

echo "2. queue a tuning job"
JOB=$(call -H 'Content-Type: application/json' "$BASE/v1/jobs" \
  -d "{\"dataset_id\": \"$DATASET\", \"target\": \"defect\", \"budget\": {\"trials\": ${TRIALS:-12}}}" \
  | field '["id"]')
echo "   job $JOB"

echo "3. wait for it"
while true; do
  STATUS=$(call "$BASE/v1/jobs/$JOB" | field '["status"]')
  case "$STATUS" in succeeded) break ;; failed|cancelled) echo "job $STATUS"; exit 1 ;; esac
  sleep 1
done

echo "4. leaderboard (CSV)"
call -H 'Accept: text/csv' "$BASE/v1/jobs/$JOB/leaderboard?limit=5"

MODEL=$(call "$BASE/v1/jobs/$JOB" | field '["model_id"]')
echo "5. model $MODEL: hold-out scores"
call "$BASE/v1/models/$MODEL" | field '["holdout"]'
call -o "$DIR/model.txt" "$BASE/v1/models/$MODEL/file"

echo "6. predictions"
call -H 'Content-Type: application/json' "$BASE/v1/models/$MODEL/predictions" \
  -d '{"rows": [{"kiln": "north", "clay_body": "raku", "peak_temp_c": 1240, "ramp_rate_c_per_h": 150, "hold_minutes": 20, "cooling_rate_c_per_h": 120, "humidity_pct": 55, "glaze_thickness_mm": 0.8, "load_fraction": 0.7, "shelf_position": "middle", "fired_on": "2026-03-14"}]}'
echo
head -n 4 "$DIR/kilns.csv" | call --data-binary @- -H 'Content-Type: text/csv' \
  "$BASE/v1/models/$MODEL/predictions"

echo "7. the job's story as Server-Sent Events (ends with the final status)"
call -N "$BASE/v1/jobs/$JOB/watch" | grep '^event:' | sort | uniq -c

echo "8. lists as CSV, and Prometheus metrics"
call -H 'Accept: text/csv' "$BASE/v1/jobs?limit=3"
call "$BASE/metrics" | grep -E '^grovekeeper_(jobs|queue_depth|trials_total)'

echo "9. the model bundle, predicting with lightgbm and pandas alone"
call -o "$DIR/bundle.zip" "$BASE/v1/models/$MODEL/bundle"
(cd "$DIR" && "$PY" -m zipfile -e bundle.zip . && head -n 4 kilns.csv > rows.csv \
  && "$PY" "$MODEL/predict.py" rows.csv)
echo "walkthrough finished"
