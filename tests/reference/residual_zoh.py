"""Reference: zero-order-hold discretisation by scipy.signal.cont2discrete(method="zoh").

stdin:  {"a": [[row], ...], "b": [[row], ...], "dt": float}
stdout: {"a": [[row], ...], "b": [[row], ...]}
"""
import json
import sys

import numpy as np
from scipy.signal import cont2discrete

data = json.load(sys.stdin)
a = np.asarray(data["a"], dtype=float)
b = np.asarray(data["b"], dtype=float)
n = a.shape[0]
ad, bd, _, _, _ = cont2discrete((a, b, np.eye(n), np.zeros((n, b.shape[1]))), data["dt"], method="zoh")
json.dump({"a": ad.tolist(), "b": bd.tolist()}, sys.stdout)
