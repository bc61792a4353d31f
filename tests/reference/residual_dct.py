"""Reference: orthonormal DCT-II / DCT-III by scipy.fft.dct / scipy.fft.idct (norm="ortho").

stdin:  {"vectors": [[...], ...]}
stdout: {"dct": [[...], ...], "idct": [[...], ...]}
"""
import json
import sys

import numpy as np
import scipy.fft

data = json.load(sys.stdin)
out = {"dct": [], "idct": []}
for v in data["vectors"]:
    x = np.asarray(v, dtype=float)
    out["dct"].append(scipy.fft.dct(x, type=2, norm="ortho").tolist())
    out["idct"].append(scipy.fft.idct(x, type=2, norm="ortho").tolist())
json.dump(out, sys.stdout)
