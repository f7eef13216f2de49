#!/usr/bin/env bash
# How the pins of tests/qmc_demo.rs fare under other seeds: runs the Monte Carlo demo
# (examples/model-sweep-qmc.yaml) with the campaign seeds given (default 1 2 3 4 5) instead of
# the demo's, and prints for every pinned value z = (window average − long-run value)/σ
# against output/qmc_long_run.txt (reference/qmc_long_run.sh), with the test's
# σ = √(max(σ_window, sigma6)² + σ_long²), and the same with the reported σ_window alone.
# The test demands |z| < 4 (with sigma6) at the demo's own seed.
#
# Usage: bash reference/qmc_pin_seeds.sh [SEED ...]   (builds the release binaries; about
# a minute per seed on 2 cores). Output as committed in output/qmc_pin_seeds.txt.
set -euo pipefail
repo="$(cd "$(dirname "$0")/.." && pwd)"
seeds=("$@")
[ ${#seeds[@]} -gt 0 ] || seeds=(1 2 3 4 5)
cd "$repo"
cargo build --release --workspace -q
export PATH="${CARGO_TARGET_DIR:-$repo/target}/release:$PATH"
work="$(mktemp -d)"
echo "commit: $(git -C "$repo" rev-parse HEAD)$(git -C "$repo" diff --quiet HEAD -- examples numerics || echo ' (with uncommitted changes in examples/ or numerics/)')"
for seed in "${seeds[@]}"; do
    d="$work/seed-$seed"
    mkdir -p "$d/start"
    cp examples/start/density.json examples/start/sigma.npy "$d/start/"
    sed "s/^seed: [0-9]*$/seed: $seed/" examples/model-sweep-qmc.yaml > "$d/q.yaml"
    grep -q "^seed: $seed$" "$d/q.yaml" || { echo "qmc_pin_seeds: no seed line in the demo" >&2; exit 1; }
    (cd "$d" && rondo run q.yaml --max-running 2 -q && rondo status q.yaml --json > status.json)
done
python3 - "$repo/reference/output/qmc_long_run.txt" "$work" "${seeds[@]}" <<'PY'
import json, statistics, sys
pins = {}
for line in open(sys.argv[1]):
    if line.startswith("p0"):
        r = line.split()
        pins[(float(r[1]), r[2])] = (float(r[3]), float(r[4]), float(r[5]))
z_test, z_reported = [], []
for seed in sys.argv[3:]:
    s = json.load(open(f"{sys.argv[2]}/seed-{seed}/status.json"))
    zs = []
    for p in s["points"]:
        v = p["values"]["volume"]
        for (vol, m), (pin, err, sigma6) in sorted(pins.items()):
            if vol == v:
                a = p["averages"][m]
                d = a["value"] - pin
                zs.append(d / (max(a["error"], sigma6) ** 2 + err ** 2) ** 0.5)
                z_reported.append(d / (a["error"] ** 2 + err ** 2) ** 0.5)
    z_test += zs
    print(f"seed {seed}: states {sorted({p['state'] for p in s['points']})}, "
          f"z = {' '.join(f'{z:+.2f}' for z in zs)}")
for name, z in (("test's sigma (with sigma6)", z_test), ("reported window errors alone", z_reported)):
    print(f"{name}: {len(z)} values, mean z {statistics.mean(z):+.3f}, "
          f"std {statistics.pstdev(z):.3f}, max |z| {max(map(abs, z)):.2f}, "
          f"|z| > 2: {sum(abs(x) > 2 for x in z)}, |z| > 4: {sum(abs(x) > 4 for x in z)}")
PY
