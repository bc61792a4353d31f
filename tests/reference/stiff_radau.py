"""Reference solutions of stiff test problems by scipy.integrate.solve_ivp(method="Radau").

Problems from Hairer & Wanner, Solving Ordinary Differential Equations II (2nd ed.), §IV.1 and
§IV.10: the Robertson chemical kinetics (k1 = 0.04, k2 = 3e7, k3 = 1e4) and van der Pol with
mu = 1000 (y'' - mu (1 - y^2) y' + y = 0 as y1' = y2, y2' = mu (1 - y1^2) y2 - y1).

stdin:  {"problem": "robertson" | "van_der_pol", "y0": [...], "t_eval": [...],
         "rtol": r, "atol": [a_1, ...], "mu": 1000 (van der Pol only)}
stdout: {"t": [...], "y": [[y_1 ... y_n] per time], "nfev": N, "status": s, "solver": "..."}
"""

import json
import sys

import numpy as np
import scipy
from scipy.integrate import solve_ivp


def robertson():
    def f(_t, y):
        return [
            -0.04 * y[0] + 1e4 * y[1] * y[2],
            0.04 * y[0] - 1e4 * y[1] * y[2] - 3e7 * y[1] ** 2,
            3e7 * y[1] ** 2,
        ]

    def jac(_t, y):
        return [
            [-0.04, 1e4 * y[2], 1e4 * y[1]],
            [0.04, -1e4 * y[2] - 6e7 * y[1], -1e4 * y[1]],
            [0.0, 6e7 * y[1], 0.0],
        ]

    return f, jac


def van_der_pol(mu):
    def f(_t, y):
        return [y[1], mu * (1.0 - y[0] ** 2) * y[1] - y[0]]

    def jac(_t, y):
        return [[0.0, 1.0], [-2.0 * mu * y[0] * y[1] - 1.0, mu * (1.0 - y[0] ** 2)]]

    return f, jac


def main():
    req = json.load(sys.stdin)
    if req["problem"] == "robertson":
        f, jac = robertson()
    elif req["problem"] == "van_der_pol":
        f, jac = van_der_pol(float(req["mu"]))
    else:
        raise SystemExit(f"unknown problem {req['problem']}")
    t_eval = np.asarray(req["t_eval"], dtype=float)
    sol = solve_ivp(
        f,
        (0.0, float(t_eval[-1])),
        np.asarray(req["y0"], dtype=float),
        method="Radau",
        t_eval=t_eval,
        rtol=float(req["rtol"]),
        atol=np.asarray(req["atol"], dtype=float),
        jac=jac,
    )
    if not sol.success:
        raise SystemExit(f"solve_ivp failed: {sol.message}")
    json.dump(
        {
            "t": sol.t.tolist(),
            "y": sol.y.T.tolist(),
            "nfev": int(sol.nfev),
            "status": int(sol.status),
            "solver": f"scipy {scipy.__version__} solve_ivp Radau",
        },
        sys.stdout,
    )


if __name__ == "__main__":
    main()
