#!/usr/bin/env bash
# The built-in demo scenario (invented for illustration): a team sizing the
# weight path of a battery-powered vision accelerator must pick a 4-bit
# storage format, and an 8-bit one for the layers that cannot take 4 bits.
# Usage: examples/demo.sh path/to/lobit
set -euo pipefail
LOBIT="${1:-build/lobit}"

section() { printf '\n== %s ==\n' "$1"; }

cat <<'TXT'
Scenario (invented): the "Kestrel" vision accelerator stores weights in SRAM
at 4 bits, with an 8-bit fallback for sensitive layers. Before the RTL freeze
the architects compare the candidate element formats exactly: their code
points, range, resolution, special codes and how individual weights round.
TXT

section "4-bit candidates: range, resolution, special codes"
"$LOBIT" compare e2m1 int4 int4+range=symmetric nf4 pow2+exp=3+bias=3 --values

section "8-bit candidates"
"$LOBIT" compare e4m3 e5m2 e4m3-single-nan int8 int8-frac6

section "FP4 (e2m1) code table with the exact input interval of every code"
"$LOBIT" inspect e2m1

section "E4M3 properties and its overflow rule"
"$LOBIT" inspect e4m3 --no-codes

section "Sample weights, scaled so the largest magnitude meets each format's max"
# Normalised weights w / absmax of one output channel (invented), times the
# format's largest value (absmax scaling).
weights="0.012 -0.05 0.21 0.43 -0.87 1.0"
for f in e2m1:6 int4:7 nf4:1; do
  name=${f%%:*}; top=${f##*:}
  scaled=$(for w in $weights; do awk -v w="$w" -v t="$top" 'BEGIN { printf "%.6g ", w * t }'; done)
  # shellcheck disable=SC2086
  "$LOBIT" encode "$name" $scaled
done

section "Error per bit spent on an LLM-like weight matrix (1024 x 4096 of the model's 4096 x 11008 layout)"
"$LOBIT" score int4@tensor:fp32 int4@row:fp16 mxfp4 nf4-block64-dq int4-group128-zero \
  fp4-e4m3-block16-fp32-tensor shared-exp16-sub2-m4 mxfp6-e3m2 mxfp8-e4m3 --source llm --shape 1024x4096

section "The same candidates on Gaussian weights, with the closed form where it exists"
"$LOBIT" score e2m1,scale=0.4871 nf4,scale=2.863 mxfp4 nf4@64:fp16 int4@32:fp16 --source gauss --exact

section "MSE-optimal scale of NF4 for Gaussian weights (exact)"
"$LOBIT" design scale nf4 --density gauss

section "Stochastic rounding is reproducible from a seed"
"$LOBIT" encode e2m1 2.3 2.3 2.3 2.3 2.3 2.3 --round stochastic --seed 42

work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
python3 "$(dirname "$0")/make_doorbell_checkpoint.py" "$work/doorbell.safetensors"

section "A checkpoint file: what the weights of an (invented) doorbell wake-word detector look like"
"$LOBIT" fit "$work/doorbell.safetensors" --min-rank 2 --outliers 3 --axis 'frontend.*=1-3' --axis '*=last'

section "Formats scored on every weight of that checkpoint, worst first, with per-file totals"
"$LOBIT" score mxfp4 mxfp6-e2m3 int4@32:fp16 --source "$work/doorbell.safetensors" --min-rank 2 \
  --axis 'frontend.*=1-3' --axis '*=last'

section "A mixed-precision copy for evaluation in the user's own framework (map: examples/doorbell-map.toml)"
"$LOBIT" quantize "$work/doorbell.safetensors" --map "$(dirname "$0")/doorbell-map.toml" --min-rank 2 \
  --axis 'frontend.*=1-3' --axis '*=last' --out "$work/doorbell-mixed.safetensors"

cat <<'TXT'

Caution: the figures above describe the formats exactly; any error they imply
for a network is an estimate on the values shown. Validate accuracy on your
own model and evaluation before committing a format to hardware.
TXT
