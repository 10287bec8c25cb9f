#!/bin/sh
# Side-by-side timing of attain's EM against pomegranate 0.14.8 (Debian
# python3-pomegranate): the same synthetic data, the same start, the same
# number of Baum-Welch updates, one core each (taskset -c 0, GOMAXPROCS=1,
# n_jobs=1). Checks that the final log-likelihoods agree (relative 1e-6)
# and prints both times and their ratio.
#
#   testdata/sidebyside/run.sh            # 2000 learners x 30 answers, 20 updates
#   LEARNERS=5000 ANSWERS=40 ITERATIONS=50 REPEATS=5 testdata/sidebyside/run.sh
#
# Each side reports its best time over repeated runs (pomegranate: REPEATS,
# default 3; attain, whose run is ~100 times shorter and so more easily
# disturbed by a shared machine: ATTAIN_REPEATS, default 20).
set -eu
cd "$(dirname "$0")/../.."
LEARNERS=${LEARNERS:-2000}
ANSWERS=${ANSWERS:-30}
ITERATIONS=${ITERATIONS:-20}
REPEATS=${REPEATS:-3}
ATTAIN_REPEATS=${ATTAIN_REPEATS:-20}
SEED=${SEED:-7}
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
pin="taskset -c 0"
command -v taskset >/dev/null 2>&1 || pin=""

/usr/bin/python3 testdata/sidebyside/pomegranate_side.py gen "$LEARNERS" "$ANSWERS" "$SEED" > "$tmp/data.txt"
go build -o "$tmp/sidebyside" ./testdata/sidebyside
$pin /usr/bin/python3 testdata/sidebyside/pomegranate_side.py fit "$tmp/data.txt" "$ITERATIONS" "$REPEATS" > "$tmp/pomegranate.json"
GOMAXPROCS=1 $pin "$tmp/sidebyside" "$tmp/data.txt" "$ITERATIONS" "$ATTAIN_REPEATS" > "$tmp/attain.json"
/usr/bin/python3 testdata/sidebyside/pomegranate_side.py compare "$tmp/pomegranate.json" "$tmp/attain.json"
