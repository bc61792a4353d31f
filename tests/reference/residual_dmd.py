"""Reference: PyDMD eigenvalues for exact DMD and DMD with control.

stdin:  {"kind": "dmd" | "dmdc_known" | "dmdc_unknown",
         "snapshots": [[row], ...] (n x T), "inputs": [[row], ...] (l x (T-1)),
         "b": [[row], ...] (n x l), "svd_rank": int, "svd_rank_omega": int}
stdout: {"eigenvalues": [[re, im], ...]} sorted by (re, im)
"""
import json
import sys

import numpy as np
from pydmd import DMD, DMDc

data = json.load(sys.stdin)
x = np.asarray(data["snapshots"], dtype=float)
kind = data["kind"]
if kind == "dmd":
    model = DMD(svd_rank=data["svd_rank"], exact=True)
    model.fit(x)
elif kind == "dmdc_known":
    u = np.asarray(data["inputs"], dtype=float)
    b = np.asarray(data["b"], dtype=float)
    model = DMDc(svd_rank=data["svd_rank"])
    model.fit(x, u, B=b)
elif kind == "dmdc_unknown":
    u = np.asarray(data["inputs"], dtype=float)
    model = DMDc(svd_rank=data["svd_rank"], svd_rank_omega=data["svd_rank_omega"])
    model.fit(x, u)
else:
    raise SystemExit(f"unknown kind {kind}")
eig = sorted(model.eigs, key=lambda z: (z.real, z.imag))
out = {"eigenvalues": [[float(z.real), float(z.imag)] for z in eig]}
if kind == "dmdc_unknown":
    # the full-space input matrix U Btilde (PyDMD keeps it as .B)
    out["b"] = np.asarray(model.B).real.tolist()
json.dump(out, sys.stdout)
