"""Reference: scikit-learn OrthogonalMatchingPursuit and Lasso on the same sensing problem.

stdin:  {"a": [[row], ...] (m x n), "b": [...], "k": int, "lambda": float}
stdout: {"omp": [...], "lasso": [...]}

Lasso minimises (1/(2m))||b - A x||^2 + alpha ||x||_1, so alpha = lambda / m gives the same
minimiser as 1/2 ||A x - b||^2 + lambda ||x||_1.
"""
import json
import sys

import numpy as np
from sklearn.linear_model import Lasso, OrthogonalMatchingPursuit

data = json.load(sys.stdin)
a = np.asarray(data["a"], dtype=float)
b = np.asarray(data["b"], dtype=float)
m = a.shape[0]

omp = OrthogonalMatchingPursuit(n_nonzero_coefs=data["k"], fit_intercept=False)
omp.fit(a, b)

lasso = Lasso(alpha=data["lambda"] / m, fit_intercept=False, tol=1e-14, max_iter=1_000_000)
lasso.fit(a, b)

json.dump({"omp": omp.coef_.tolist(), "lasso": lasso.coef_.tolist()}, sys.stdout)
