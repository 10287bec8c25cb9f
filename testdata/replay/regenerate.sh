#!/bin/sh
# Regenerates the replay reference fixture: replays answers.jsonl under
# params-a.json with the what-if grid of the test, keeps the predictions.csv
# it wrote, and computes expected.json from it with Debian's
# python3-sklearn 1.2.1 and numpy (make_fixtures.py, which
# testdata/regenerate.sh runs on its own from the committed predictions.csv).
# Run from the repository root: sh testdata/replay/regenerate.sh
# (sh testdata/replay/make_input.sh first, to rebuild answers.jsonl itself.)
set -eu
dir=testdata/replay
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
go run ./cmd/attain replay --from "$dir/answers.jsonl" --params "$dir/params-a.json" \
	--threshold 0.95 --threshold 0.9 --stuck-after 10 --stuck-after 5 --out "$tmp/out" >/dev/null
cp "$tmp/out/predictions.csv" "$dir/predictions.csv"
/usr/bin/python3 "$dir/make_fixtures.py"
echo "wrote $dir/predictions.csv and $dir/expected.json"
