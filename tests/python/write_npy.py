"""Array logs written by NumPy itself (np.save, numpy.lib.format), for the
reader's cross-check: the wine data set (scikit-learn's copy of the UCI wine
recognition data, 178 x 13) in every form plumb reads, in forms it refuses,
and as a CSV with every value printed to round-trip.

stdin: {"dir": "/path/to/empty/folder"}
stdout: {"rows": 178, "columns": 13, "csv": ..., "csv_f4": ..., "read": {name: path},
         "refused": {name: path}}
"""
import json
import os
import sys

import numpy as np
from sklearn import datasets

req = json.load(sys.stdin)
out = req["dir"]
X = np.ascontiguousarray(datasets.load_wine().data, dtype=np.float64)
names = [f"w{j:02d}" for j in range(X.shape[1])]
header = ",".join(names)


def path(name):
    return os.path.join(out, name)


def with_header(stem, arr):
    np.save(path(stem + ".npy"), arr)
    with open(path(stem + ".header"), "w") as f:
        f.write(header + "\n")
    return path(stem + ".npy")


def csv(name, arr, fmt):
    with open(path(name), "w") as f:
        f.write(header + "\n")
        np.savetxt(f, arr, fmt=fmt, delimiter=",")
    return path(name)


X4 = X.astype(np.float32)
read = {
    "plain_f8": with_header("plain_f8", X),
    "plain_f4": with_header("plain_f4", X4),
}
# Structured arrays carry their names as fields.
for stem, dt in [("struct_f8", "<f8"), ("struct_f4", "<f4")]:
    rec = np.zeros(X.shape[0], dtype=[(n, dt) for n in names])
    for j, n in enumerate(names):
        rec[n] = X[:, j]
    np.save(path(stem + ".npy"), rec)
    read[stem] = path(stem + ".npy")
# Format version 2.0 (a 4-byte header length).
with open(path("v2_f8.npy"), "wb") as f:
    np.lib.format.write_array(f, X, version=(2, 0))
with open(path("v2_f8.header"), "w") as f:
    f.write(header + "\n")
read["v2_f8"] = path("v2_f8.npy")

refused = {
    "fortran": with_header("fortran", np.asfortranarray(X)),
    "big_endian": with_header("big_endian", X.astype(">f8")),
    "integers": with_header("integers", X.astype(np.int64)),
    "three_d": with_header("three_d", X.reshape(2, 89, 13)),
}
json.dump(
    {
        "rows": X.shape[0],
        "columns": X.shape[1],
        "csv": csv("wine.csv", X, "%.17g"),
        "csv_f4": csv("wine_f4.csv", X4.astype(np.float64), "%.17g"),
        "read": read,
        "refused": refused,
    },
    sys.stdout,
)
