#!/usr/bin/env bash
# Set up, then run the demo: phase I on day 1, replay of all four days, summary printed.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
out=${1:-out/demo}
.venv/bin/streamguard check config/demo.yaml
.venv/bin/streamguard baseline --config config/demo.yaml --output "$out/limits.yaml" replay_data/quillmere-day1.csv.gz
.venv/bin/streamguard replay --config config/demo.yaml --limits "$out/limits.yaml" --out "$out" \
  --report "$out/review.html" --incidents replay_data/incidents.csv \
  replay_data/quillmere-day1.csv.gz replay_data/quillmere-day2.csv.gz \
  replay_data/quillmere-day3.csv.gz replay_data/quillmere-day4.csv.gz
echo "events: $out/events.jsonl   summary: $out/summary.json   review: $out/review.html"
