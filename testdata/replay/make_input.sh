#!/bin/sh
# Regenerates answers.jsonl, the small replay input of the tests: a
# simulated Harbour Lane cohort (40 learners × 3 skills × 12 opportunities,
# seed 11) with hand-written cases spliced in: lines that do not decode, an
# answer dated before the learner's others (late), repeated ids inside and
# outside the 32-id window, the same id for another learner, items tagged
# with several skills (one naming a skill twice), a skill with no entry in
# params-a.json, tied times, a time with an offset, and a learner id and an
# answer id that need CSV quoting.
# Run from the repository root: sh testdata/replay/make_input.sh
set -eu
dir=testdata/replay
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
go run ./cmd/attain simulate --out "$tmp/base.jsonl" --truth "$tmp/truth.json" \
	--learners 40 --opportunities 12 --skills journal-entries,trial-balance,payroll-deductions --seed 11 >/dev/null
{
	head -n 720 "$tmp/base.jsonl"
	cat "$dir/extras-middle.jsonl"
	tail -n +721 "$tmp/base.jsonl"
	cat "$dir/extras-end.jsonl"
} >"$dir/answers.jsonl"
