#!/usr/bin/env bash
# Post the invented demo studies to a running bioparity service and fetch their reports.
# Usage: bash sample_requests/post_demo.sh [BASE_URL]   (default http://127.0.0.1:8000)
# If the archive has API keys, export BIOPARITY_KEY=... first (a key with the submit role).
set -euo pipefail
BASE="${1:-http://127.0.0.1:8000}"
HERE="$(cd "$(dirname "$0")" && pwd)"
AUTH=()
if [[ -n "${BIOPARITY_KEY:-}" ]]; then AUTH=(-H "Authorization: Bearer ${BIOPARITY_KEY}"); fi

post() {  # post CONTENT_TYPE FILE [QUERY] -> prints the record id
  curl -sS --fail-with-body "${AUTH[@]}" -H "Content-Type: $1" --data-binary "@$2" \
    "$BASE/v1/analyses${3:-}" | python3 -c 'import json,sys; r=json.load(sys.stdin); print(r["id"], r["inputs_sha256"])'
}

Q='?title=Vitamin%20D3%20softgel%3A%20new%20encapsulation%20line%20versus%20current%20line%20(demo)&test=NEW&reference=CURRENT&baseline=PLACEBO&replicates=10000&seed=20261202'
echo "JSON request:            $(post application/json "$HERE/vitamin_d3_softgel.json")"
echo "CSV, comma:              $(post text/csv "$HERE/vitamin_d3_softgel.csv" "$Q")"
echo "CSV, semicolon/decimal,: $(post text/csv "$HERE/vitamin_d3_softgel_semicolon.csv" "$Q")"
echo "BX-41 profiles (JSON):   $(post application/json "$HERE/bx41_profiles.json")"
echo "QM-7 replicate, widened: $(post application/json "$HERE/qm7_replicate_widened.json")"
echo "QM-7 replicate, scaled:  $(post application/json "$HERE/qm7_replicate_reference_scaled.json")"
echo
echo "Open a report:  curl -s ${AUTH[*]:-} $BASE/v1/analyses/ID/report -o report.html"
