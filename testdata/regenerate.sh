#!/usr/bin/env bash
# Regenerates every reference fixture under testdata/ with the script that
# produced it, using Debian's reference libraries (python3-pomegranate 0.14.8,
# python3-sklearn 1.2.1). Run from anywhere; CI runs it and then checks that
# git sees no change, so the committed fixtures are exactly what the scripts
# make.
set -euo pipefail
cd "$(dirname "$0")/.."
py=/usr/bin/python3
$py testdata/pomegranate/make_fixtures.py
$py testdata/sklearn/make_fixtures.py > testdata/sklearn/fixtures.json
if [ -f testdata/replay/make_fixtures.py ]; then
  $py testdata/replay/make_fixtures.py
fi
echo "fixtures regenerated"
