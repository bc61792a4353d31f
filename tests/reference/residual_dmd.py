"""Reference: PyDMD eigenvalues for exact DMD and DMD with control.

stdin:  {"cases": [case, ...]}, each case
        {"kind": "dmd" | "dmdc_known" | "dmdc_unknown",
         "snapshots": [[row], ...] (n x T), "inputs": [[row], ...] (l x (T-1)),
         "b": [[row], ...] (n x l), "svd_rank": int, "svd_rank_omega": int}
stdout: {"results": [{"eigenvalues": [[re, im], ...] sorted by (re, im),
                      "b": full-space input matrix (dmdc_unknown only)}, ...]}
Several cases share one run because importing PyDMD takes seconds.
"""
import json
import sys

import numpy as np
from pydmd import DMD, DMDc


def run(case):
    x = np.asarray(case["snapshots"], dtype=float)
    kind = case["kind"]
    if kind == "dmd":
        model = DMD(svd_rank=case["svd_rank"], exact=True)
        model.fit(x)
    elif kind == "dmdc_known":
        u = np.asarray(case["inputs"], dtype=float)
        b = np.asarray(case["b"], dtype=float)
        model = DMDc(svd_rank=case["svd_rank"])
        model.fit(x, u, B=b)
    elif kind == "dmdc_unknown":
        u = np.asarray(case["inputs"], dtype=float)
        model = DMDc(svd_rank=case["svd_rank"], svd_rank_omega=case["svd_rank_omega"])
        model.fit(x, u)
    else:
        raise SystemExit(f"unknown kind {kind}")
    eig = sorted(model.eigs, key=lambda z: (z.real, z.imag))
    out = {"eigenvalues": [[float(z.real), float(z.imag)] for z in eig]}
    if kind == "dmdc_unknown":
        # the full-space input matrix U Btilde (PyDMD keeps it as .B)
        out["b"] = np.asarray(model.B).real.tolist()
    return out


data = json.load(sys.stdin)
json.dump({"results": [run(case) for case in data["cases"]]}, sys.stdout)
