#!/usr/bin/env bash
# Runs the README's walkthrough "Score your network's fields against sinew's" exactly as
# written: the shell block between the `<!-- walkthrough -->` and `<!-- /walkthrough -->`
# markers of README.md, in a fresh temporary folder that sees the repository's examples/,
# with the `sinew` of target/release first on PATH (built when missing; SINEW=path overrides).
# Fails when any command fails or the tables lack the network's rows. About 20 s.
set -euo pipefail
repo="$(cd "$(dirname "$0")/.." && pwd)"
sinew="${SINEW:-${CARGO_TARGET_DIR:-$repo/target}/release/sinew}"
if [ ! -x "$sinew" ]; then
    (cd "$repo" && cargo build --release -p sinew-cli)
fi
work="$(mktemp -d)"
trap 'rm -rf "$work"' EXIT
mkdir "$work/bin"
ln -s "$sinew" "$work/bin/sinew"
ln -s "$repo/examples" "$work/examples"
# The fenced block after the opening marker, up to its closing fence.
awk '/<!-- walkthrough -->/ { on = 1; next } /<!-- \/walkthrough -->/ { on = 0 }
     on && /^```/ { if (inside) { inside = 0 } else { inside = 1 }; next }
     on && inside { print }' "$repo/README.md" > "$work/walkthrough.sh"
if [ ! -s "$work/walkthrough.sh" ]; then
    echo "walkthrough_check: no walkthrough block between the markers in README.md" >&2
    exit 1
fi
echo "walkthrough_check: running $(grep -c . "$work/walkthrough.sh") lines from README.md"
(cd "$work" && PATH="$work/bin:$PATH" bash -euxo pipefail walkthrough.sh)
# The table compares both methods on every listed pair.
pairs=$(($(wc -l < "$repo/examples/test_pairs.csv") - 1))
for method in sinew mynet; do
    n=$(awk -F, -v m="$method" 'NR > 1 && $1 == m { print $2 "__" $3 }' "$work/walk/runs/scores.csv" | sort -u | wc -l)
    if [ "$n" != "$pairs" ]; then
        echo "walkthrough_check: scores.csv holds $n pairs of $method, expected $pairs" >&2
        exit 1
    fi
done
grep -q mynet "$work/walk/runs/summary.md"
test -s "$work/walk/runs/report.html"
echo "walkthrough_check: ok ($pairs pairs, sinew and mynet in scores.csv, summary.md and report.html)"
