#!/usr/bin/env bash
# Regenerates the reference values the numerical tests compare against.
# Usage: bash reference/run_all.sh   (a few minutes; needs PyPI for numpy, scipy, mpmath)
set -euo pipefail
cd "$(dirname "$0")"
VENV=${VENV:-${TMPDIR:-/tmp}/rondo-reference-venv}
[ -x "$VENV/bin/python" ] || { python3 -m venv "$VENV"; "$VENV/bin/pip" install -q -r requirements.txt; }
mkdir -p output
for f in free_level legendre atomic_limit bethe simple_cubic mixing eos binning ed_bath hubbard_i_bath; do
  extra=""; [ "$f" = simple_cubic ] && extra="--extra"
  echo "== $f"; "$VENV/bin/python" "$f.py" $extra > "output/$f.txt" 2>&1
done
echo "outputs in $(pwd)/output"
