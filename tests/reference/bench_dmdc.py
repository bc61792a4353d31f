"""Timing reference for the DMD-with-control benchmark: PyDMD's DMDc (PyPI `pydmd`) on the same
data as the Rust fit, same ranks.

stdin:  {"snapshots": [[row], ...], "inputs": [[row], ...], "svd_rank": r, "repeats": n}
stdout: {"seconds": median fit time (s), "eigenvalues_abs_max": float}
"""
import json
import sys
import time

import numpy as np
from pydmd import DMDc

data = json.load(sys.stdin)
x = np.asarray(data["snapshots"], dtype=float)
u = np.asarray(data["inputs"], dtype=float)[:, : x.shape[1] - 1]
times = []
dmd = None
for _ in range(int(data.get("repeats", 5))):
    start = time.perf_counter()
    dmd = DMDc(svd_rank=int(data["svd_rank"]), svd_rank_omega=-1)
    dmd.fit(x, u)
    times.append(time.perf_counter() - start)
json.dump(
    {"seconds": float(np.median(times)), "eigenvalues_abs_max": float(np.max(np.abs(dmd.eigs)))},
    sys.stdout,
)
