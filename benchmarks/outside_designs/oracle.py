"""Simulator sanity check: the finite-dependence logit at the EXACT nuisances (true CCPs and
true transitions) should recover the truth on my panels. Own few lines of numpy/scipy."""
import numpy as np, pandas as pd
from scipy.optimize import minimize
import sim

G = sim.GAMMA; b = sim.BETA


def fit(X, off, y):
    # P(y=1) = logistic(X th + off)
    def nll(th):
        s = X @ th + off
        return np.sum(np.logaddexp(0, s) - y * s)
    def grad(th):
        s = X @ th + off
        return X.T @ (1 / (1 + np.exp(-s)) - y)
    r = minimize(nll, np.zeros(X.shape[1]), jac=grad, method="BFGS", options={"gtol": 1e-9})
    s = X @ r.x + off; p = 1 / (1 + np.exp(-s))
    H = (X * (p * (1 - p))[:, None]).T @ X
    return r.x, np.sqrt(np.diag(np.linalg.inv(H)))


def oracle_A(seed, th, N=1000):
    df, sol = sim.a_simulate(seed, N=N, th=th, return_sol=True)
    i = df.shop.values; k = np.abs(df.d.values[:, None] - sim.A_GRID[None, :]).argmin(1)
    y = (df.action == "stay").values.astype(float)
    scrap = sol["scrap"][i]
    EnlP = np.einsum("nl,nl->n", sol["F"][i, k], -np.log(sol["P_close"][i]) + G)
    # w = profit d + c - (1-b) resale scrap + b E[-lnP + G]
    X = np.column_stack([df.d.values, np.ones(len(df)), -(1 - b) * scrap])
    return fit(X, b * EnlP, y)


def oracle_B(seed, th, N=1000):
    df, sol = sim.b_simulate(seed, N=N, th=th, return_sol=True)
    i = df.machine.values; k = np.round(df.h.values * 4).astype(int)
    y = (df.action == "keep").values.astype(float)
    hfun = -np.log(sol["P_rep"][i])  # z_R th part (theta_R) cancels in the difference
    Ek = np.einsum("nl,nl->n", sol["Fk"][i, k], hfun); ER = np.einsum("nl,nl->n", sol["FR"][i, k], hfun)
    X = np.column_stack([df.h.values, df.h.values * df.f0.values, -np.ones(len(df))])
    return fit(X, b * (Ek - ER), y)


if __name__ == "__main__":
    for name, f, th, seeds in (("A", oracle_A, sim.A_TRUE, range(1000, 1010)),
                               ("AH", oracle_A, sim.AH_TRUE, range(3000, 3003)),
                               ("B", oracle_B, sim.B_TRUE, range(2000, 2010))):
        ests = []; cov = []
        for s in seeds:
            e, se = f(s, th); ests.append(e)
            t = np.array(list(th.values())); cov.append(np.abs(e - t) <= 1.96 * se)
            last_se = se
        ests = np.array(ests)
        print(name, "truth", list(th.values()), "mean", ests.mean(0).round(3), "sd", ests.std(0, ddof=1).round(3),
              "last se", last_se.round(3), "cover", np.sum(cov, 0))
