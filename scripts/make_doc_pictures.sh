#!/usr/bin/env bash
# Regenerates the README's pictures from the current code: runs the demo (the default
# cohort, about a minute on 2 cores after the build) in a temporary folder, copies the QC
# sheet of pair subject_00__subject_01 to docs/images/qc_sheet.png and takes a headless
# Chromium screenshot of the cohort report as docs/images/cohort_report.png.
# SINEW=path uses that binary instead of building target/release/sinew.
set -euo pipefail
repo="$(cd "$(dirname "$0")/.." && pwd)"
sinew="${SINEW:-${CARGO_TARGET_DIR:-$repo/target}/release/sinew}"
if [ -z "${SINEW:-}" ]; then
    (cd "$repo" && cargo build --release -p sinew-cli)
fi
browser="${SINEW_CHROMIUM:-$(command -v chromium || command -v chromium-browser || true)}"
if [ -z "$browser" ]; then
    echo "make_doc_pictures: chromium is needed for the report screenshot (scripts/setup-test-env.sh installs it)" >&2
    exit 1
fi
work="$(mktemp -d)"
trap 'rm -rf "$work"' EXIT
# Run inside the temporary folder with the README's folder name, so the report names
# demo-data/results as the README does.
(cd "$work" && "$sinew" demo --out demo-data --quiet)
cp "$work/demo-data/results/pairs/subject_00__subject_01/qc.png" "$repo/docs/images/qc_sheet.png"
"$browser" --headless --no-sandbox --disable-gpu --no-first-run --disable-background-networking \
    --user-data-dir="$work/profile" --window-size=1300,2600 --hide-scrollbars \
    --screenshot="$repo/docs/images/cohort_report.png" "file://$work/demo-data/results/report.html" 2>/dev/null
echo "make_doc_pictures: wrote docs/images/qc_sheet.png and docs/images/cohort_report.png"
grep -h '"folding_fraction"' "$work/demo-data/results/pairs/subject_00__subject_01/report.json" | head -1 | sed 's/^ */  qc sheet pair folding_fraction: /'
