"""CSV files written by Python's csv module (RFC 4180 quoting) and its own reading of them.

  csv_quoting.py write DIR     writes DIR/minimal.csv (QUOTE_MINIMAL), DIR/all.csv
                               (QUOTE_ALL) and DIR/want.json (the rows as csv.reader reads them)
  csv_quoting.py read FILE     prints FILE as csv.reader reads it, as JSON (header, rows)"""
import csv
import json
import os
import sys

LABELS = ["a,b", "a_b", 'say "hi"', "two\nlines"]


def write(out):
    header = ["x1", "label", "x2"]
    rows = []
    for i in range(40):
        rows.append([repr(0.25 * i - 3.0), LABELS[i % 4], repr((i % 7) * 0.5 + (i % 4))])
    for name, q in (("minimal", csv.QUOTE_MINIMAL), ("all", csv.QUOTE_ALL)):
        with open(os.path.join(out, name + ".csv"), "w", newline="") as f:
            w = csv.writer(f, quoting=q, lineterminator="\n")
            w.writerow(header)
            w.writerows(rows)
    with open(os.path.join(out, "minimal.csv"), newline="") as f:
        got = list(csv.reader(f))
    with open(os.path.join(out, "want.json"), "w") as f:
        json.dump(got, f)
    print(len(rows))


def read(path):
    with open(path, newline="") as f:
        got = list(csv.reader(f))
    print(json.dumps({"header": got[0], "rows": got[1:]}))


if __name__ == "__main__":
    {"write": write, "read": read}[sys.argv[1]](sys.argv[2])
