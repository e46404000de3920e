"""Times an ONNX file in onnxruntime and merges the figures into a headline JSON: batched
rows per second over all the rows (`threads` intra-op threads, the count `score`'s batches
used) and the median single-row latency (2,000 rows, one at a time, one thread as `score`'s
single row), beside `score`'s f32
figures of the same model (the headline's fmnist_hadamard). Adds onnx_batch_rows_per_s,
onnx_single_us_p50, onnx_vs_native_batch (onnxruntime / score throughput) and
onnx_vs_native_single (score latency / onnxruntime latency): 1.0 means as fast as score.
Usage: onnx_time.py HEADLINE.json"""
import json
import sys
import time

import numpy as np
import onnxruntime as ort

path = sys.argv[1]
res = json.load(open(path))
x = np.load(res["onnx_rows"]).astype(np.float32)
o = ort.SessionOptions()
o.intra_op_num_threads = int(res["threads"])
o.inter_op_num_threads = 1
s = ort.InferenceSession(res["onnx_model"], o, providers=["CPUExecutionProvider"])
name = s.get_inputs()[0].name
s.run(None, {name: x[:256]})
t, n = time.perf_counter(), 0
while time.perf_counter() - t < 3.0:
    s.run(None, {name: x})
    n += len(x)
batch = n / (time.perf_counter() - t)
o1 = ort.SessionOptions()
o1.intra_op_num_threads = 1
o1.inter_op_num_threads = 1
s1 = ort.InferenceSession(res["onnx_model"], o1, providers=["CPUExecutionProvider"])
s1.run(None, {name: x[:1]})
ts = []
for i in range(2000):
    a = time.perf_counter()
    s1.run(None, {name: x[i : i + 1]})
    ts.append(time.perf_counter() - a)
single = float(np.median(ts)) * 1e6
h = res["fmnist_hadamard"]
res["onnx_batch_rows_per_s"] = batch
res["onnx_single_us_p50"] = single
res["onnx_vs_native_batch"] = batch / h["throughput_rows_per_s_compiled_f32"]
res["onnx_vs_native_single"] = h["latency_us_compiled_f32_p50"] / single
json.dump(res, open(path, "w"), indent=2)
print(
    f"onnxruntime: {batch:,.0f} rows/s ({res['threads']} threads), single {single:.1f} µs (1 thread); "
    f"vs score f32: batch {res['onnx_vs_native_batch']:.3f}, single {res['onnx_vs_native_single']:.3f}"
)
