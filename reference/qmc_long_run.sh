#!/usr/bin/env bash
# Long run of the Monte Carlo demo loop (examples/model-sweep-qmc.yaml): the values that
# tests/qmc_demo.rs pins the demo's final-window averages to.
#
# The campaign is the demo's with three changes, made by the Python below on a copy (it
# refuses to run if the demo's file no longer has the blocks it replaces):
#   - 320 000 sweeps in every iteration (the demo's schedule ends there before it stops),
#   - a stop rule that holds at iteration 10 whatever the values (a burn-in of 10),
#   - a final window of 128 iterations (11–138), whose averages and binning error bars
#     (Flyvbjerg–Petersen, J. Chem. Phys. 91, 461 (1989), which rondo applies from 64 values
#     on) `rondo status` reports,
# and another campaign seed (20270101) than the demo, so that the pin is a statistical
# statement and not a copy of the demo's random numbers.
#
# Usage: bash reference/qmc_long_run.sh [DIR]   (builds the release binaries; about 15–25
# minutes on 2 cores; run again on the same DIR it resumes or, when finished, only reports).
# Writes the workspace into DIR (default: a temporary folder) and prints `rondo status
# --json`'s averages per point and sigma6 (below), as committed in output/qmc_long_run.txt.
set -euo pipefail
repo="$(cd "$(dirname "$0")/.." && pwd)"
dir="${1:-$(mktemp -d)}"
mkdir -p "$dir/start"
cp "$repo/examples/start/density.json" "$repo/examples/start/sigma.npy" "$dir/start/"
python3 - "$repo/examples/model-sweep-qmc.yaml" "$dir/long.yaml" <<'PY'
import re, sys
src, dst = sys.argv[1], sys.argv[2]
text = open(src).read()
def sub(pattern, repl, flags=re.M):
    global text
    text, n = re.subn(pattern, repl, text, count=1, flags=flags)
    if n != 1:
        sys.exit(f"qmc_long_run: {src} has no block matching {pattern!r}; update this script")
sub(r"^campaign: model-sweep-qmc$", "campaign: model-sweep-qmc-long")
sub(r"^seed: \d+$", "seed: 20270101")
sub(r"^schedules:\n(?:[ #].*\n)*", "")
sub(r"^parameters:\n", "parameters:\n  sweeps: 320000\n")
sub(r"^stop:\n.*\Z",
    "stop:\n"
    "  when:\n"
    "    # holds at iteration 10 whatever the values: a burn-in of 10 iterations\n"
    "    - { metric: solve.n_f, change-below: 1.0e9, for: 9 }\n"
    "  max-iterations: 200\n"
    "  final-window: 128\n", re.M | re.S)
open(dst, "w").write(text)
PY
cd "$repo"
cargo build --release --workspace -q
bin="${CARGO_TARGET_DIR:-$repo/target}/release"
export PATH="$bin:$PATH"
cd "$dir"
rondo run long.yaml --max-running 2 -q || test $? -eq 3
echo "commit: $(git -C "$repo" rev-parse HEAD)$(git -C "$repo" diff --quiet HEAD -- examples numerics || echo ' (with uncommitted changes in examples/ or numerics/)')"
# The demo averages a final window of only 6 iterations, too few for a binning analysis,
# and consecutive iterations are correlated (each one's input carries the previous one's
# noise), so its reported window error can be too small. sigma6 below is the scatter of the
# means of 6 consecutive iterations of this long run (the 21 non-overlapping blocks of the
# 128-iteration window, standard deviation with n − 1): what a 6-iteration average of the
# settled loop really scatters by. Read from the workspace's database (tables points,
# attempts, metrics of orchestrator/migrations).
grep -q "^  final-window: 6 " "$repo/examples/model-sweep-qmc.yaml" \
    || { echo "qmc_long_run: the demo's final window is no longer 6: update sigma6" >&2; exit 1; }
rondo status long.yaml --json > status.json
python3 - status.json long.rondo/rondo.db <<'PY'
import json, sqlite3, statistics, sys
s = json.load(open(sys.argv[1]))
db = sqlite3.connect(sys.argv[2])
print("point volume metric value error sigma6 iterations state")
for p in s["points"]:
    v = p["values"]["volume"]
    for m in ("solve.n_f", "solve.docc", "update.n_f", "update.energy"):
        a = p["averages"][m]
        its = a["iterations"]
        x = [r[0] for r in db.execute(
            "SELECT m.value FROM metrics m JOIN attempts a ON a.id = m.attempt_id "
            "WHERE a.point = ? AND m.name = ? AND a.state = 'succeeded' "
            "AND a.iteration BETWEEN ? AND ? ORDER BY a.iteration", (p["id"], m, its[0], its[-1]))]
        assert len(x) == len(its), (p["id"], m, len(x))
        blocks = [statistics.mean(x[i:i + 6]) for i in range(0, len(x) - 5, 6)]
        print(p["id"], v, m, repr(a["value"]), repr(a["error"]), repr(statistics.stdev(blocks)),
              f"{its[0]}-{its[-1]}", p["state"])
PY
