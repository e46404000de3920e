#!/usr/bin/env bash
# The guarded C export against an all-exact one, on the shipped demo, in one run: compiles
# the demo SVM to Hadamard 512 (or --features D) guarded at --guard-agreement 0.995 (rows rule) and the same
# map with --guard-rate 1 (every row goes to the exact expansion, and the export then skips
# the compiled stage: the C export of the exact model), exports both as C, builds
# each with the system's `cc -O2`, and times scoring every row of models/pump_test.csv
# (3,000 rows, repeated) single-threaded. Writes one JSON object: rows per second of both,
# their ratio, the share of rows the guard sends to the exact model, and the machine.
# About a minute on a 2-core machine.
#
# Usage: bash benches/guarded_export.sh [--out FILE.json] [--features D]
set -euo pipefail
cd "$(dirname "$0")/.."
OUT=target/bench/guarded_export.json
FEATURES=512
while [ $# -gt 0 ]; do
  case "$1" in
    --out) OUT="$2"; shift 2 ;;
    --features) FEATURES="$2"; shift 2 ;;
    *) echo "usage: bash benches/guarded_export.sh [--out FILE.json]" >&2; exit 2 ;;
  esac
done
cargo build --release --quiet
K="$PWD/target/release/kernelpress"
W=$(mktemp -d)
trap 'rm -rf "$W"' EXIT
for mode in guarded:--guard-agreement=0.995 exact:--guard-rate=1; do
  name=${mode%%:*}
  flag=${mode#*:}
  "$K" compile models/pump_svm.safetensors --calib models/pump_calib.csv --target condition \
    --method hadamard --features "$FEATURES" --seed 1 --guard-rule row "${flag%%=*}" "${flag#*=}" \
    --eval models/pump_test.csv --no-timing --out "$W/$name.safetensors" > "$W/$name.txt" 2>&1
  "$K" export "$W/$name.safetensors" --format c --out "$W/c_$name" > /dev/null
  cat > "$W/c_$name/main.c" <<'EOF'
#include <stdio.h>
#include <stdlib.h>
#include <time.h>
#include "kp_model.h"
int main(int argc, char **argv) {
    int reps = atoi(argv[1]);
    int d = kp_input_dim(), k = kp_output_dim();
    static float x[4000 * 64];
    float out[64];
    char line[4096];
    FILE *f = fopen(argv[2], "r");
    int n = 0;
    if (!f || !fgets(line, sizeof line, f)) return 1; /* header */
    while (n < 4000 && fgets(line, sizeof line, f)) {
        char *p = line;
        for (int j = 0; j < d; j++) x[n * d + j] = strtof(p, &p), p++;
        n++;
    }
    long exact = 0;
    for (int i = 0; i < n; i++) exact += kp_decision_stage(&x[i * d], out) != 0;
    struct timespec a, b;
    double sink = 0;
    clock_gettime(CLOCK_MONOTONIC, &a);
    for (int r = 0; r < reps; r++)
        for (int i = 0; i < n; i++) { kp_decision(&x[i * d], out); sink += out[k - 1]; }
    clock_gettime(CLOCK_MONOTONIC, &b);
    double s = (b.tv_sec - a.tv_sec) + 1e-9 * (b.tv_nsec - a.tv_nsec);
    printf("%.1f %.4f %g\n", reps * (double)n / s, exact / (double)n, sink > 0 ? 0.0 : 1.0);
    return 0;
}
EOF
  cc -std=c99 -D_POSIX_C_SOURCE=199309L -O2 -o "$W/c_$name/bench" "$W/c_$name/main.c" "$W/c_$name/kp_model.c" -lm
done
read -r G_RPS G_SHARE _ < <("$W/c_guarded/bench" 20 models/pump_test.csv)
read -r E_RPS E_SHARE _ < <("$W/c_exact/bench" 3 models/pump_test.csv)
CPU=$(grep -m1 'model name' /proc/cpuinfo | cut -d: -f2- | sed 's/^ *//')
mkdir -p "$(dirname "$OUT")"
cat > "$OUT" <<EOF
{
  "machine": "$(nproc) cores, $CPU",
  "rows": 3000,
  "features": $FEATURES,
  "guarded_c_rows_per_s": $G_RPS,
  "all_exact_c_rows_per_s": $E_RPS,
  "guarded_vs_exact_c": $(awk -v a="$G_RPS" -v b="$E_RPS" 'BEGIN { printf "%.2f", a / b }'),
  "guarded_fallback_share": $G_SHARE,
  "all_exact_fallback_share": $E_SHARE
}
EOF
cat "$OUT"
