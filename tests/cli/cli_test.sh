#!/usr/bin/env bash
# End-to-end checks of the lobit binary: outputs, JSON shapes, exit statuses.
# Usage: cli_test.sh path/to/lobit
set -uo pipefail
LOBIT="$1"
pass=0
fail=0
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT

ok()   { pass=$((pass + 1)); }
bad()  { fail=$((fail + 1)); echo "FAIL: $*"; }

# expect_exit STATUS CMD...: runs lobit with arguments; checks the status.
expect_exit() {
  local want=$1; shift
  "$LOBIT" "$@" >"$tmp/out" 2>"$tmp/err"
  local got=$?
  if [ "$got" -eq "$want" ]; then ok; else bad "lobit $* exited $got, wanted $want; stderr: $(cat "$tmp/err")"; fi
}
# expect_error CMD...: exit 2, one-line error on stderr, nothing on stdout.
expect_error() {
  expect_exit 2 "$@"
  if [ -s "$tmp/out" ]; then bad "lobit $*: printed on stdout: $(head -c 200 "$tmp/out")"; else ok; fi
  if [ "$(wc -l <"$tmp/err")" -eq 1 ] && grep -q '^lobit: error: ' "$tmp/err"; then ok; else bad "lobit $*: stderr not one error line: $(cat "$tmp/err")"; fi
}
# py EXPR: evaluates a Python expression over the JSON in $tmp/out (as j); must be true.
py() {
  if python3 -c "import json,sys; j=json.load(open('$tmp/out')); sys.exit(0 if ($1) else 1)"; then ok; else bad "json check failed: $1"; fi
}

expect_exit 0 --version
grep -Eq '^lobit [0-9]+\.[0-9]+\.[0-9]+ \(git [0-9a-f]+(-dirty)?|unknown\)' "$tmp/out" && ok || bad "--version: $(cat "$tmp/out")"

expect_exit 0 formats
for p in e4m3 e5m2 e3m2 e2m3 e2m1 e8m0 fp16 bf16 fp32 int2 int8 uint2 uint8 nf4; do
  grep -Eq "^  $p +[0-9]" "$tmp/out" && ok || bad "formats does not list $p"
done
expect_exit 0 formats --json
py "len(j) >= 28 and all('summary' in p and 'source' in p for p in j)"

# inspect --json: the keys the docs promise. OCP OFP8 E4M3: max 448, min normal 2^-6, min subnormal 2^-9 (from memory)
expect_exit 0 inspect e4m3 --json
py "j['format'] == 'float+exp=4+man=3+bias=7+special=top-nan' and j['bits'] == 8"
py "j['max'] == 448 and j['min_normal'] == 2**-6 and j['min_subnormal'] == 2**-9 and j['distinct_finite'] == 253"
py "len(j['codes']) == 256 and j['codes'][0x7f]['value'] == 'nan' and j['codes'][0x7f]['class'] == 'nan'"
py "j['codes'][0x80]['value'] == 0 and str(j['codes'][0x80]['value']) == '-0.0'"
py "all(set(c) >= {'code','hex','value','class'} for c in j['codes'])"
grep -q '"value": -0.0' "$tmp/out" && ok || bad "negative zero not printed as -0.0"

expect_exit 0 inspect int4 --json
py "j['min_normal'] is None and j['min_subnormal'] is None and j['max'] == 7 and j['lowest'] == -8"
expect_exit 0 inspect fp32 --json
py "j['codes'] is None and j['max'] == 3.4028234663852886e+38 and j['min_subnormal'] == 2**-149"
expect_exit 0 inspect e5m2 --json
py "j['codes'][0x7c]['value'] == 'inf' and j['codes'][0xfc]['value'] == '-inf'"
py "j['nearest_overflow_threshold']['value'] == 61440 and j['nearest_overflow_threshold']['tie_overflows']"

expect_exit 0 inspect e2m1
grep -Eq '^0x7 +0\.11\.1 +normal +6\.0 +\(5\.0, \+inf\)' "$tmp/out" && ok || bad "inspect e2m1 table row"
grep -q '^max finite        6.0' "$tmp/out" && ok || bad "inspect e2m1 max"

# encode: the IEEE overflow points from the issue (e5m2 from 61440, fp16 from 65520), E4M3 464 -> 448.
expect_exit 0 encode e5m2 61440 61439.99 --json
py "j[0]['value'] == 'inf' and j[1]['value'] == 57344"
expect_exit 0 encode fp16 65520 65519.99 --json
py "j[0]['value'] == 'inf' and j[1]['value'] == 65504"
expect_exit 0 encode e4m3 464 -1.3 --json
py "j[0]['code'] == 0x7e and j[0]['value'] == 448 and j[1]['value'] == -1.25 and set(j[0]) >= {'input','code','value'}"
expect_exit 0 encode e4m3 500 --overflow special --json
py "j[0]['value'] == 'nan'"
for mode in nearest-even nearest-away toward-zero up down stochastic; do
  expect_exit 0 encode int4 2.5 -2.5 --round "$mode" --json
done
expect_exit 0 encode int4 2.5 --round nearest-away --json
py "j[0]['value'] == 3"
expect_exit 0 encode e2m1 1.25 1.25 1.25 1.25 --round stochastic --seed 9 --json
cp "$tmp/out" "$tmp/sr1"
expect_exit 0 encode e2m1 1.25 1.25 1.25 1.25 --round stochastic --seed 9 --json
cmp -s "$tmp/out" "$tmp/sr1" && ok || bad "stochastic rounding is not reproducible with a seed"
expect_exit 0 encode e4m3 0x3c00 --from fp16 --json
py "j[0]['input'] == 1.0 and j[0]['code'] == 0x38"

expect_exit 0 decode e4m3 0x7e 126 0b01111110 --json
py "all(e['value'] == 448 for e in j)"
expect_exit 0 decode int8-frac6 0x80 --json
py "j[0]['class'] == 'unused' and j[0]['value'] is None"

# Bad input: exit 2, a one-line error, nothing on stdout.
expect_error inspect e4m4x
grep -q 'did you mean' "$tmp/err" && ok || bad "no suggestion for an unknown format"
expect_error inspect "e4m3+bias=1100"
expect_error inspect "int+bits=20"
expect_error encode e4m3 1.2.3
expect_error encode e4m3 1 --round sideways
expect_error encode e2m1 nan
expect_error encode e4m3 1e999
expect_error decode e4m3 0x100
expect_error decode e4m3 zz
expect_error decode int4 16
expect_error inspect
expect_error frobnicate
expect_error encode e4m3 0x1ffff --from fp16

# inspect of a block-scaled format: its composition, then its element.
expect_exit 0 inspect nf4-block64-dq --json --no-codes
py "j['scaled']['nominal_bits_per_element'] == 4 + 8/64 + 32/(64*256) and j['scaled']['block'] == 64 and j['bits'] == 4"
expect_exit 0 inspect "e2m1@32:e8m0"
grep -q '^bits per element  4.25' "$tmp/out" && ok || bad "inspect e2m1@32:e8m0 bits per element"

# score: the JSON keys the docs promise; OCP MX FP4 costs 4.25 bits per element (OCP MX v1.0, section 5; from memory).
expect_exit 0 score mxfp4 e2m1 --source gauss --samples 8192 --exact --json
py "len(j) == 2 and all(set(r) >= {'format','source','bits_per_element','mse','sqnr_db','mse_exact'} for r in j)"
py "[r['bits_per_element'] for r in j] == [4.0, 4.25]"
py "j[0]['mse_exact'] is not None and j[1]['mse_exact'] is None"
py "abs(j[0]['mse'] - j[0]['mse_exact']) < 5 * j[0]['mse_stderr']"
expect_exit 0 score int4@32:fp16 --source laplace --samples 4096 --csv
head -1 "$tmp/out" | grep -q '^format,source,rows,cols' && ok || bad "score --csv header"
expect_exit 0 score int4@32:fp16 --source laplace --samples 4096 --md
grep -q '^| `int4@32:fp16` | 4.5 |' "$tmp/out" && ok || bad "score --md row"
grep -q 'validate accuracy on your own model' "$tmp/out" && ok || bad "score --md caution"
expect_exit 0 score e2m1 --source gauss --samples 4096 --threads 1 --json
cp "$tmp/out" "$tmp/t1"
expect_exit 0 score e2m1 --source gauss --samples 4096 --threads 2 --json
cmp -s "$tmp/out" "$tmp/t1" && ok || bad "score differs between 1 and 2 threads"
expect_exit 0 score e2m1 --source gauss --samples 4096 --exact
grep -q 'Error figures are estimates' "$tmp/out" && ok || bad "score caution line"
expect_error score e2m1@1:e8m0 --source gauss
expect_error score e2m1@32:e8m0 --source gauss --samples 0
expect_error score e2m1@32:e8m0 --source student-t+nu=0
expect_error score e2m1@32:e8m0 --source nowhere
expect_error score e2m1@32:e8m0,ragged=refuse --source gauss --shape 4x100
expect_error score e2m1@32:e8m0 --source gauss --axis 2
expect_error score e2m1@32:fp16,rule=mx --source gauss

# design: Lloyd-Max for the unit Gaussian, 4 levels: 0.4528, 1.510 (Max 1960, Table I; from memory).
expect_exit 0 design lloyd-max --levels 4 --density gauss --json
py "abs(j['levels'][3] - 1.510) < 0.001 and abs(j['levels'][2] - 0.4528) < 0.0001"
expect_exit 0 design lloyd-max --levels 4 --density gauss --out "$tmp/lm.toml"
expect_exit 0 inspect "codebook+file=$tmp/lm.toml" --json
py "len(j['codes']) == 4 and j['codes'][3]['value'] > 1.5"
expect_error design lloyd-max --levels 4 --density gauss --out "$tmp/no/such/dir/x.toml"
ls "$tmp/no/such/dir" >/dev/null 2>&1 && bad "design --out left something behind" || ok
expect_error design lloyd-max --levels 4
expect_error design scale e2m1 --density cauchy
expect_exit 0 design scale e2m1 --density gauss --json
py "0.4 < j['scale'] < 0.6 and j['mse'] > 0"

# lut: kernel headers. Deterministic bytes; --out writes the same bytes whole; refusals exit 2 with one line.
expect_exit 0 lut e2m1 --lang c
cp "$tmp/out" "$tmp/lut1"
grep -q 'static inline uint8_t lobit_e2m1_encode(float x)' "$tmp/out" && ok || bad "lut e2m1: no encoder"
grep -q '^ \*   lobit lut e2m1 --lang c --decode-type f32$' "$tmp/out" && ok || bad "lut e2m1: command not recorded"
expect_exit 0 lut e2m1 --lang c
cmp -s "$tmp/out" "$tmp/lut1" && ok || bad "lut output differs between two runs"
expect_exit 0 lut e2m1 --out "$tmp/e2m1.h"
cmp -s "$tmp/e2m1.h" "$tmp/lut1" && ok || bad "lut --out differs from stdout"
[ -s "$tmp/out" ] && bad "lut --out also printed on stdout" || ok
expect_exit 0 lut e4m3 --lang cpp --namespace kernels::fp8
grep -q '^namespace kernels::fp8 {' "$tmp/out" && ok || bad "lut --namespace"
expect_exit 0 lut e2m1 --lang cuda --pack hi-first
grep -q '__constant__' "$tmp/out" && grep -q 'ifndef __CUDA_ARCH__\|if !defined(__CUDA_ARCH__)' "$tmp/out" && ok || bad "lut cuda tables"
expect_exit 0 lut fp16 --decode-type f16 --lang csv
[ "$(grep -c '^code,' "$tmp/out")" -eq 65536 ] && ok || bad "lut csv: code rows"
# OCP OFP8 (v1.0): E4M3 has 256 codes, 0x7f is NaN (from memory)
expect_exit 0 lut e4m3 --lang json
py "len(j['codes']) == 256 and j['codes'][0x7f]['class'] == 'nan' and j['nan_input_code'] == 0x7f"
expect_exit 0 lut bf16 --decode-type f16 --allow-inexact
grep -q 'INEXACT' "$tmp/out" && ok || bad "lut --allow-inexact states the error"
expect_error lut fp32
grep -q 'arithmetic encoder' "$tmp/err" && ok || bad "lut fp32: no hint to the arithmetic encoder"
expect_error lut e2m1 --lang rust
expect_error lut e2m1 --decode-type f8
expect_error lut bf16 --decode-type f16
expect_error lut e4m3 --pack lo-first
expect_error lut e2m1 --pack middle-first
expect_error lut e2m1 --lang cpp --namespace 9lives
expect_error lut e2m1 --out "$tmp/no/such/dir/e2m1.h"
ls "$tmp/no/such/dir" >/dev/null 2>&1 && bad "lut --out left something behind" || ok
ls "$tmp"/*.lobit-partial >/dev/null 2>&1 && bad "lut --out left a partial file" || ok

expect_exit 0 lut mxfp4
grep -q 'lobit_mxfp4_dequantize_block' "$tmp/out" && grep -q '} lobit_mxfp4_block;' "$tmp/out" && ok || bad "lut mxfp4: no block layout"
expect_error lut e2m1@16:e4m3,tensor-scale=fp32
expect_error lut e2m1@32:fp32
expect_error lut mxfp4 --lang json
expect_exit 0 lut e2m1 --product int4 --lang cpp
grep -q 'lobit_e2m1_x_int4_product_k_of' "$tmp/out" && ok || bad "lut --product: no integer table"
expect_error lut e4m3 --product e2m1
expect_error lut nf4 --product e2m1
# lut --stochastic: the stochastic encoder is added (C, C++, CUDA; refused for data-only output).
expect_exit 0 lut e2m1 --stochastic
grep -q 'static inline uint8_t lobit_e2m1_encode_stochastic(float x, uint32_t r)' "$tmp/out" && ok || bad "lut --stochastic: no encoder"
grep -q '^ \*   lobit lut e2m1 --lang c --decode-type f32 --stochastic$' "$tmp/out" && ok || bad "lut --stochastic: command not recorded"
expect_exit 0 lut e2m1
grep -q "encode_stochastic" "$tmp/out" && bad "lut without --stochastic emitted it" || ok
expect_error lut e2m1 --stochastic --lang json
# lut --decode-type int: e2m1's smallest step is 0.5 = 2^-1 (OCP MX v1.0, section 5.3.3), so E = -1 and k = 2 * value.
expect_exit 0 lut e2m1 --decode-type int --lang cpp
grep -q '#define LOBIT_E2M1_DECODE_EXPONENT (-1)' "$tmp/out" && ok || bad "lut --decode-type int: no exponent -1"
grep -q 'inline constexpr std::int8_t lobit_e2m1_decode_k\[16\]' "$tmp/out" && ok || bad "lut --decode-type int: no int8 table"
# e5m2 (OCP OFP8 v1.0): 57344 / 2^-16 = 3758096384 does not fit 32 bits.
expect_error lut e5m2 --decode-type int
expect_error lut e2m1 --decode-type int --lang csv
# lut --product as data: e2m1's 6 (code 0x7) times int4's 7 (code 0x7) is 42 (OCP MX v1.0 section 5.3.3; two's complement int4).
expect_exit 0 lut e2m1 --product int4 --lang json
py "len(j['entries']) == 256 and float.fromhex(j['entries'][(7 << 4) | 7]['value']) == 42 and j['entries'][119]['k'] * 2.0 ** j['exponent'] == 42"
expect_exit 0 lut e2m1 --product int4 --lang csv
[ "$(wc -l <"$tmp/out")" -eq 257 ] && grep -q '^119,0x7,0x7,0x1.5p+5,' "$tmp/out" && ok || bad "lut --product --lang csv: rows"
expect_error lut e2m1 --product int4 --stochastic
echo "cli: $pass passed, $fail failed"
[ "$fail" -eq 0 ]
