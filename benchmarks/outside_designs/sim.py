"""Own exact-solution simulators for two designs (numpy only), written from the model's
description by a developer who had not read orthoccp's estimation code: an outside check.

Design A (terminal): shops, demand d on a grid, stay/close; close pays resale*exp(0.4*c1).
Design B (renewal): machines, hours h on a grid, keep/replace; keep pays th_h*h + th_hf*h*f0.

Usage: python sim.py OUTDIR [--check]
"""
import sys, os, json
import numpy as np
import pandas as pd

GAMMA = 0.5772156649015329
BETA = 0.95

# ---------------------------------------------------------------- design A
A_TRUE = {"profit": 0.3, "stay_const": -0.5, "resale": 5.0}
# harsher variant: bigger utility scale, exit probabilities down to 1e-13 in visited states
AH_TRUE = {"profit": 1.0, "stay_const": -0.6, "resale": 12.0}
A_K = 15
A_GRID = np.linspace(0.0, 2.0, A_K)


def a_transitions(c):
    """Per-unit Tauchen-style transition matrices, shape (N, K, K).
    Unit mean mu depends on c2, c3 non-linearly; persistence on c4."""
    mu = 0.9 + 0.35 * np.tanh(1.5 * c[:, 1]) + 0.25 * (c[:, 2] ** 2 - 1) * 0.5
    rho = 0.5 + 0.3 / (1 + np.exp(-2 * c[:, 3]))
    sd = 0.28
    mean = mu[:, None] + rho[:, None] * (A_GRID[None, :] - mu[:, None])  # N,K
    # discretise N(mean, sd) on the grid by midpoints
    edges = np.concatenate([[-np.inf], (A_GRID[1:] + A_GRID[:-1]) / 2, [np.inf]])
    from scipy.stats import norm
    cdf = norm.cdf((edges[None, None, :] - mean[:, :, None]) / sd)
    F = np.diff(cdf, axis=2)
    F /= F.sum(axis=2, keepdims=True)
    return F, mu


def a_solve(c, th=A_TRUE, tol=1e-13):
    F, _ = a_transitions(c)
    N = c.shape[0]
    scrap = np.exp(0.4 * c[:, 0])
    u_stay = th["profit"] * A_GRID[None, :] + th["stay_const"]          # N? broadcast
    u_stay = np.broadcast_to(u_stay, (N, A_K))
    v_close = np.broadcast_to((th["resale"] * scrap)[:, None], (N, A_K))
    V = np.zeros((N, A_K))
    for it in range(100000):
        v_stay = u_stay + BETA * np.einsum("nkl,nl->nk", F, V)
        m = np.maximum(v_stay, v_close)
        Vn = m + np.log(np.exp(v_stay - m) + np.exp(v_close - m)) + GAMMA
        diff = np.abs(Vn - V).max()
        V = Vn
        if diff < tol:
            break
    v_stay = u_stay + BETA * np.einsum("nkl,nl->nk", F, V)
    m = np.maximum(v_stay, v_close)
    lse = m + np.log(np.exp(v_stay - m) + np.exp(v_close - m))
    P_close = np.exp(v_close - lse)
    return dict(F=F, V=V, v_stay=v_stay, v_close=v_close, P_close=P_close, iters=it,
                scrap=scrap, u_stay=u_stay)


def a_check(sol):
    V, F = sol["V"], sol["F"]
    lnPR = np.log(sol["P_close"])
    # Hotz-Miller with terminal anchor: V = v_R - ln P_R + gamma, v_R = z_R'theta (no continuation)
    hm = np.abs(V - (sol["v_close"] - lnPR + GAMMA)).max()
    # Bellman residual
    v_stay = sol["u_stay"] + BETA * np.einsum("nkl,nl->nk", F, V)
    bell = np.abs(v_stay - sol["v_stay"]).max()
    # finite dependence: w = v_stay - v_R = (z_stay - z_R)th + beta E[z_R th - lnP_R + gamma | stay]
    h = sol["v_close"] - lnPR + GAMMA
    w_fd = sol["u_stay"] - sol["v_close"] + BETA * np.einsum("nkl,nl->nk", F, h)
    fd = np.abs(w_fd - (sol["v_stay"] - sol["v_close"])).max()
    return {"A_hotz_miller_maxabs": float(hm), "A_bellman_maxabs": float(bell),
            "A_finite_dependence_maxabs": float(fd), "A_value_iterations": int(sol["iters"])}


def a_simulate(seed, N=1000, T=12, th=A_TRUE, return_sol=False):
    rng = np.random.default_rng(seed)
    c = rng.standard_normal((N, 20))
    sol = a_solve(c, th)
    F, P = sol["F"], sol["P_close"]
    _, mu = a_transitions(c)
    # initial demand: near the unit's mean
    d0 = mu + 0.35 * rng.standard_normal(N)
    k = np.abs(d0[:, None] - A_GRID[None, :]).argmin(axis=1)
    rows = []
    alive = np.ones(N, bool)
    for t in range(T):
        idx = np.where(alive)[0]
        pc = P[idx, k[idx]]
        close = rng.random(idx.size) < pc
        for j, i in enumerate(idx):
            rows.append((i, t, "close" if close[j] else "stay", A_GRID[k[i]]))
        alive[idx[close]] = False
        # transition for stayers
        st = idx[~close]
        cum = np.cumsum(F[st, k[st], :], axis=1)
        u = rng.random(st.size)
        k[st] = np.minimum((u[:, None] > cum).sum(axis=1), A_K - 1)
    df = pd.DataFrame(rows, columns=["shop", "year", "action", "d"])
    cdf = pd.DataFrame(c, columns=[f"c{j}" for j in range(1, 21)])
    cdf["shop"] = np.arange(N)
    df = df.merge(cdf, on="shop").sort_values(["shop", "year"]).reset_index(drop=True)
    df["scrap"] = np.exp(0.4 * df["c1"])
    if return_sol:
        return df, sol
    return df


def a_spec(csvname, th=A_TRUE, label="A"):
    states = ", ".join(['"d"'] + [f'"c{j}"' for j in range(1, 21)])
    return f"""# Design {label} (terminal). True parameters: profit = {th['profit']}, stay_const = {th['stay_const']}, resale = {th['resale']}
[data]
unit = "shop"
period = "year"
choice = "action"
states = [{states}]
path = "{csvname}"

[model]
kind = "terminal"
anchor = "close"
discount = {BETA}

[utility.stay]
profit = "d"
stay_const = "1"

[utility.close]
resale = "scrap"
"""


# ---------------------------------------------------------------- design B
B_TRUE = {"theta_h": -1.0, "theta_hf": 0.25, "theta_R": -5.0}
B_H = 20
B_GRID = np.arange(B_H) / 4.0  # hours 0 .. 4.75


def b_incprobs(f):
    """Increment pmf over {0,1,2,3} per unit; wear rate depends on f1,f2,f3 non-linearly."""
    lam = 0.4 + 0.5 / (1 + np.exp(-2.0 * f[:, 1])) + 0.3 * np.abs(f[:, 2]) * (f[:, 3] > 0) + 0.15 * np.sin(2 * f[:, 3])
    lam = np.clip(lam, 0.15, 2.5)
    from scipy.stats import poisson
    p = np.stack([poisson.pmf(j, lam) for j in range(3)], axis=1)
    p = np.concatenate([p, 1 - p.sum(axis=1, keepdims=True)], axis=1)
    return p  # N,4


def b_transitions(f):
    p = b_incprobs(f)
    N = f.shape[0]
    Fk = np.zeros((N, B_H, B_H))
    for k in range(B_H):
        for j in range(4):
            Fk[:, k, min(k + j, B_H - 1)] += p[:, j]
    FR = np.broadcast_to(Fk[:, 0:1, :], (N, B_H, B_H)).copy()  # after replacement: like from h=0
    return Fk, FR


def b_solve(f, th=B_TRUE, tol=1e-13):
    Fk, FR = b_transitions(f)
    N = f.shape[0]
    u_keep = th["theta_h"] * B_GRID[None, :] + th["theta_hf"] * B_GRID[None, :] * f[:, [0]]
    u_rep = np.full((N, B_H), th["theta_R"])
    V = np.zeros((N, B_H))
    for it in range(100000):
        vk = u_keep + BETA * np.einsum("nkl,nl->nk", Fk, V)
        vr = u_rep + BETA * np.einsum("nkl,nl->nk", FR, V)
        m = np.maximum(vk, vr)
        Vn = m + np.log(np.exp(vk - m) + np.exp(vr - m)) + GAMMA
        diff = np.abs(Vn - V).max()
        V = Vn
        if diff < tol:
            break
    vk = u_keep + BETA * np.einsum("nkl,nl->nk", Fk, V)
    vr = u_rep + BETA * np.einsum("nkl,nl->nk", FR, V)
    m = np.maximum(vk, vr)
    lse = m + np.log(np.exp(vk - m) + np.exp(vr - m))
    return dict(Fk=Fk, FR=FR, V=V, v_keep=vk, v_rep=vr, P_rep=np.exp(vr - lse), iters=it,
                u_keep=u_keep, u_rep=u_rep)


def b_check(sol):
    V = sol["V"]
    lnPR = np.log(sol["P_rep"])
    hm = np.abs(V - (sol["v_rep"] - lnPR + GAMMA)).max()
    # renewal finite dependence: w = (z_j - z_R)th + beta(E[h|x,j] - E[h|x,R]), h = z_R th - ln P_R
    hfun = sol["u_rep"] - lnPR
    w_fd = sol["u_keep"] - sol["u_rep"] + BETA * (np.einsum("nkl,nl->nk", sol["Fk"], hfun)
                                                  - np.einsum("nkl,nl->nk", sol["FR"], hfun))
    fd = np.abs(w_fd - (sol["v_keep"] - sol["v_rep"])).max()
    return {"B_hotz_miller_maxabs": float(hm), "B_finite_dependence_maxabs": float(fd),
            "B_value_iterations": int(sol["iters"])}


def b_simulate(seed, N=1000, T=12, th=B_TRUE, return_sol=False):
    rng = np.random.default_rng(seed)
    f = rng.standard_normal((N, 30))
    sol = b_solve(f, th)
    Fk, P = sol["Fk"], sol["P_rep"]
    # initial hours: uniform over lower part of the grid (machines of various ages)
    k = rng.integers(0, 12, size=N)
    H = np.zeros((N, T), int)
    A = np.zeros((N, T), bool)
    for t in range(T):
        H[:, t] = k
        rep = rng.random(N) < P[np.arange(N), k]
        A[:, t] = rep
        src = np.where(rep, 0, k)
        cum = np.cumsum(Fk[np.arange(N), src, :], axis=1)
        u = rng.random(N)
        k = np.minimum((u[:, None] > cum).sum(axis=1), B_H - 1)
    df = pd.DataFrame({"machine": np.repeat(np.arange(N), T), "season": np.tile(np.arange(T), N),
                       "action": np.where(A.ravel(), "replace", "keep"), "h": B_GRID[H.ravel()]})
    for j in range(30):
        df[f"f{j}"] = np.repeat(f[:, j], T)
    df["h_f0"] = df["h"] * df["f0"]
    if return_sol:
        return df, sol
    return df


def b_spec(csvname):
    fs = [f'"f{j}"' for j in range(30)]
    return f"""# Design B (renewal). True parameters: theta_h = {B_TRUE['theta_h']}, theta_hf = {B_TRUE['theta_hf']}, theta_R = {B_TRUE['theta_R']}
[data]
unit = "machine"
period = "season"
choice = "action"
states = ["h", {", ".join(fs)}]
path = "{csvname}"

[model]
kind = "renewal"
anchor = "replace"
discount = {BETA}
persistent = [{", ".join(fs)}]

[utility.keep]
theta_h = "h"
theta_hf = "h_f0"

[utility.replace]
theta_R = "1"
"""


def main():
    out = sys.argv[1] if len(sys.argv) > 1 else os.path.join(os.path.dirname(os.path.abspath(__file__)), "data")
    os.makedirs(out, exist_ok=True)
    checks = {}
    stats = []
    for r in range(10):
        df, sol = a_simulate(1000 + r, return_sol=True)
        if r == 0:
            checks.update(a_check(sol))
        name = f"A_{r}.csv"
        df.to_csv(os.path.join(out, name), index=False)
        open(os.path.join(out, f"A_{r}.toml"), "w").write(a_spec(name))
        stats.append(dict(design="A", rep=r, rows=len(df), units=df.shop.nunique(),
                          anchor_share=float((df.action == "close").mean()),
                          min_P=float(sol["P_close"].min()), max_P=float(sol["P_close"].max())))
        df, sol = b_simulate(2000 + r, return_sol=True)
        if r == 0:
            checks.update(b_check(sol))
        name = f"B_{r}.csv"
        df.to_csv(os.path.join(out, name), index=False)
        open(os.path.join(out, f"B_{r}.toml"), "w").write(b_spec(name))
        stats.append(dict(design="B", rep=r, rows=len(df), units=df.machine.nunique(),
                          anchor_share=float((df.action == "replace").mean()),
                          min_P=float(sol["P_rep"].min()), max_P=float(sol["P_rep"].max())))
    for r in range(3):
        df, sol = a_simulate(3000 + r, th=AH_TRUE, return_sol=True)
        name = f"AH_{r}.csv"
        df.to_csv(os.path.join(out, name), index=False)
        open(os.path.join(out, f"AH_{r}.toml"), "w").write(a_spec(name, AH_TRUE, "AH"))
        stats.append(dict(design="AH", rep=r, rows=len(df), units=df.shop.nunique(),
                          anchor_share=float((df.action == "close").mean()),
                          min_P=float(sol["P_close"].min()), max_P=float(sol["P_close"].max())))
    st = pd.DataFrame(stats)
    print(json.dumps(checks, indent=1))
    print(st.to_string())
    json.dump({"checks": checks, "truth": {"A": A_TRUE, "AH": AH_TRUE, "B": B_TRUE}, "stats": stats},
              open(os.path.join(out, "sim_info.json"), "w"), indent=1)


if __name__ == "__main__":
    main()
