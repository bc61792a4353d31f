"""Independent reference numbers for tests/suite/mbam.rs (numpy / scipy only).

Input (JSON on stdin):
  two_exp:     {"times": [...], "rates": [k1, k2]}
  geodesics:   [{"start": [θ1, θ2], "velocity": [v1, v2], "tau": τ}, ...]   (two-exponential model)
  oscillation: {"times": [...], "data": [...], "start": [θ...], "bounded_start": [θ...],
                "bounds": [[lo, hi], ...]}

Output (JSON on stdout):
  fisher_eigenvalues   eigenvalues of JᵀJ in log-rates at the given rates (numpy.linalg.eigvalsh)
  k_fold, cost_fold    least-squares fit of y = 2 exp(-k t) to the two-exponential data
  k_drop, cost_drop    least-squares fit of y = exp(-k t) (scipy.optimize.least_squares, "lm")
  geodesics            [{"theta": [...], "velocity": [...]}] at τ (scipy.integrate.solve_ivp, DOP853)
  oscillation_lm       {"cost", "log_params"} scipy.optimize.least_squares(method="lm")
  oscillation_bounded  {"cost", "log_params"} scipy.optimize.least_squares(method="trf", bounds)
"""
import json
import sys

import numpy as np
from scipy.integrate import solve_ivp
from scipy.optimize import least_squares

TIGHT = dict(xtol=1e-15, ftol=1e-15, gtol=1e-15)


def two_exp_jacobian(t, theta):
    p = np.exp(theta)
    return np.stack([-t * p[i] * np.exp(-p[i] * t) for i in range(len(p))], axis=1)


def two_exp_avv(t, theta, v):
    # ∂²/∂θ² exp(-e^θ t) = (-t p + t² p²) exp(-p t); no cross terms
    p = np.exp(theta)
    return sum(v[i] ** 2 * (-t * p[i] + t**2 * p[i] ** 2) * np.exp(-p[i] * t) for i in range(len(p)))


def geodesic_rhs(t):
    def rhs(_tau, y):
        n = len(y) // 2
        theta, v = y[:n], y[n:]
        acc = -np.linalg.lstsq(two_exp_jacobian(t, theta), two_exp_avv(t, theta, v), rcond=None)[0]
        return np.concatenate([v, acc])

    return rhs


def oscillation(t, theta):
    a, d, w, phi, b = np.exp(theta)
    return a * np.exp(-d * t) * np.sin(w * t + phi) + b


def main():
    inp = json.load(sys.stdin)
    out = {}

    t = np.array(inp["two_exp"]["times"], dtype=float)
    rates = np.array(inp["two_exp"]["rates"], dtype=float)
    data = np.exp(-rates[0] * t) + np.exp(-rates[1] * t)
    jac = two_exp_jacobian(t, np.log(rates))
    out["fisher_eigenvalues"] = np.linalg.eigvalsh(jac.T @ jac).tolist()

    for key, amplitude in (("fold", 2.0), ("drop", 1.0)):
        fit = least_squares(
            lambda lk: amplitude * np.exp(-np.exp(lk[0]) * t) - data, [0.0], method="lm", **TIGHT
        )
        out["k_" + key] = float(np.exp(fit.x[0]))
        out["cost_" + key] = float(fit.cost)

    out["geodesics"] = []
    for g in inp["geodesics"]:
        sol = solve_ivp(
            geodesic_rhs(t),
            [0.0, g["tau"]],
            np.concatenate([g["start"], g["velocity"]]),
            method="DOP853",
            rtol=1e-12,
            atol=1e-14,
        )
        y = sol.y[:, -1]
        out["geodesics"].append({"theta": y[:2].tolist(), "velocity": y[2:].tolist()})

    osc = inp["oscillation"]
    t = np.array(osc["times"], dtype=float)
    data = np.array(osc["data"], dtype=float)
    fit = least_squares(lambda th: oscillation(t, th) - data, osc["start"], method="lm", **TIGHT)
    out["oscillation_lm"] = {"cost": float(fit.cost), "log_params": fit.x.tolist()}
    lo = [b[0] for b in osc["bounds"]]
    hi = [b[1] for b in osc["bounds"]]
    fit = least_squares(
        lambda th: oscillation(t, th) - data, osc["bounded_start"], method="trf", bounds=(lo, hi), **TIGHT
    )
    out["oscillation_bounded"] = {"cost": float(fit.cost), "log_params": fit.x.tolist()}

    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
