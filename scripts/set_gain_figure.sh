#!/usr/bin/env bash
# The README figure "gain of a set of gases over methane alone": runs the set check on the
# methane, tetrafluoromethane and sulfur hexafluoride kernels at 298.15 K and copies its gain
# figure to docs/set-gain.png; prints the resolved width spans of the set and of each member.
#
#   scripts/set_gain_figure.sh CH4.h5 CF4.h5 SF6.h5 [EXPERIMENTS.toml] [OUTPUT_DIR]
#
# EXPERIMENTS.toml (optional, "" to skip): each member's pressures and noise (see
# `gcmc check --help`). OUTPUT_DIR (default: docs) receives set-gain.png; the full report goes
# to OUTPUT_DIR/set-check/. The README compares the set with methane (the first) alone.
set -euo pipefail
if [ "$#" -lt 3 ]; then
    sed -n '2,10p' "$0" | sed 's/^# \{0,1\}//' >&2
    exit 2
fi
ch4=$1 cf4=$2 sf6=$3
experiments=${4:-}
out=${5:-docs}
for f in "$ch4" "$cf4" "$sf6"; do
    if [ ! -f "$f" ]; then
        echo "set_gain_figure.sh: $f: no such kernel file" >&2
        exit 2
    fi
done
mkdir -p "$out"
args=(check "$ch4" "$cf4" "$sf6" --report "$out/set-check" --json)
if [ -n "$experiments" ]; then
    args+=(--experiments "$experiments")
fi
set +e
python3 -m gcmc.cli "${args[@]}" > "$out/set-check.json"
code=$?
set -e
if [ "$code" -ge 2 ]; then
    echo "set_gain_figure.sh: gcmc check failed (exit $code)" >&2
    exit "$code"
fi
cp "$out/set-check/set-gain.png" "$out/set-gain.png"
python3 - "$out/set-check.json" <<'PY'
import json
import sys

rep = json.load(open(sys.argv[1]))
rp = next(c for c in rep["criteria"] if c["key"] == "set_resolving_power")["data"]
print(f"verdict {rep['verdict']}; resolved span (nm): set {rp['set_resolved_span_nm']:.3g}")
for m in rp["members"]:
    spans = ", ".join(f"{a:.3g}-{b:.3g}" for a, b in m["intervals_w_nm"]) or "none"
    print(f"  {m['member']} alone: {m['resolved_span_nm']:.3g} (w = {spans} nm)")
PY
echo "figure: $out/set-gain.png"
