"""Writes the same 3 × 4 float64 array as .npy files whose headers are spelt in every way the
format allows (a Python dict literal: either quote style, any spacing, keys in any order, a
trailing comma or none, Python 2 'L' integers; C and Fortran order), each checked to load in
numpy itself (numpy.load) to the same array, and the array as CSV.

  npy_spellings.py DIR   writes DIR/vNN.npy, DIR/want.csv; prints the file count."""
import os
import sys

import numpy as np

out = sys.argv[1]
a = np.arange(12, dtype=np.float64).reshape(3, 4) * 0.5 - 1.25
headers_c = [
    "{'descr': '<f8', 'fortran_order': False, 'shape': (3, 4), }",
    "{'descr':'<f8','fortran_order':False,'shape':(3,4)}",
    '{"descr": "<f8", "fortran_order": False, "shape": (3, 4)}',
    "{'shape': (3, 4), 'descr': '<f8', 'fortran_order': False}",
    "{ 'fortran_order' : False , 'shape' : ( 3 , 4 , ) , 'descr' : '<f8' , }",
]
headers_f = [h.replace("False", "True") for h in headers_c]
n = 0
for version in (1, 2):
    for fortran, headers in ((False, headers_c), (True, headers_f)):
        body = (a.T if fortran else a).astype("<f8").tobytes(order="C")
        for h in headers:
            pre = 12 if version == 2 else 10
            total = pre + len(h) + 1
            h = h + " " * ((64 - total % 64) % 64) + "\n"
            head = b"\x93NUMPY" + bytes([version, 0])
            head += (len(h).to_bytes(4, "little") if version == 2 else len(h).to_bytes(2, "little"))
            path = os.path.join(out, f"v{n:02d}.npy")
            with open(path, "wb") as f:
                f.write(head + h.encode("latin1") + body)
            got = np.load(path)
            assert got.shape == (3, 4) and np.array_equal(got, a), (path, h)
            n += 1
np.savetxt(os.path.join(out, "want.csv"), a, delimiter=",", fmt="%.17g")
print(n)
