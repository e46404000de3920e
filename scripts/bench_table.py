"""Renders target/fashion/bench.json (from examples/fashion_bench.rs) as a Markdown table.
Usage: python3 scripts/bench_table.py [target/fashion/bench.json]"""
import json
import sys

rows = json.load(open(sys.argv[1] if len(sys.argv) > 1 else "target/fashion/bench.json"))
print("| teacher | method | D | agreement (95% CI) | accuracy exact → compiled | decision RMSE | single-row p50 exact / compiled (µs) | speedup single / batch | bytes exact / compiled | compile (s) |")
print("|---|---|---|---|---|---|---|---|---|---|")
for r in rows:
    lo, hi = r["agreement_ci95"]
    print(
        f"| {r['teacher']} | {r['method']} | {r['features']} | {r['agreement']:.4f} ({lo:.4f}–{hi:.4f}) "
        f"| {r['accuracy_exact']:.4f} → {r['accuracy_compiled']:.4f} | {r['decision_rmse']:.4f} "
        f"| {r['latency_us_exact_p50']:.0f} / {r['latency_us_compiled_p50']:.0f} "
        f"| {r['speedup_single']:.1f}× / {r['speedup_batch']:.1f}× "
        f"| {r['bytes_exact'] / 1e6:.1f} MB / {r['bytes_compiled'] / 1e6:.2f} MB | {r['compile_seconds']:.0f} |"
    )
