"""Own exactly-solved simulator: machine wear / overhaul renewal model."""
import numpy as np
import pandas as pd

W = 15
BETA = 0.95
THETA_WEAR = -1.2
THETA_OHC = -4.0
EULER = 0.5772156649015329
T_PERIODS = 10
# wear increment probabilities (0, +1, +2) under "run", by covariate c
INCR = {0: np.array([0.35, 0.45, 0.20]), 1: np.array([0.15, 0.45, 0.40])}


def run_transition(c):
    F = np.zeros((W, W))
    for w in range(W):
        for k, p in enumerate(INCR[c]):
            F[w, min(w + k, W - 1)] += p
    return F


def solve(c, theta_wear=THETA_WEAR, theta_ohc=THETA_OHC, shift_oh=0.0, tol=1e-12):
    F = run_transition(c)
    w_scaled = np.arange(W) / 10.0
    u_run = theta_wear * w_scaled
    u_oh = theta_ohc * 1.0 + shift_oh
    V = np.zeros(W)
    for it in range(100000):
        v_run = u_run + BETA * F @ V
        v_oh = u_oh + BETA * F[0] @ V          # overhaul: next wear as if from 0 under run
        m = np.maximum(v_run, v_oh)
        V_new = m + np.log(np.exp(v_run - m) + np.exp(v_oh - m)) + EULER
        diff = np.max(np.abs(V_new - V))
        V = V_new
        if diff < tol:
            break
    # Newton polishing (policy-evaluation steps of the smoothed Bellman operator)
    for _ in range(3):
        v_run = u_run + BETA * F @ V
        v_oh = u_oh + BETA * F[0] @ V
        P = 1.0 / (1.0 + np.exp(v_run - v_oh))
        Fm = (1 - P)[:, None] * F + P[:, None] * F[0][None, :]
        flow = (1 - P) * (u_run + EULER - np.log1p(-P)) + P * (u_oh + EULER - np.log(P))
        V = np.linalg.solve(np.eye(W) - BETA * Fm, flow)
    v_run = u_run + BETA * F @ V
    v_oh = u_oh + BETA * F[0] @ V * np.ones(W)
    m = np.maximum(v_run, v_oh)
    lse = m + np.log(np.exp(v_run - m) + np.exp(v_oh - m))
    logp_run = v_run - lse
    logp_oh = v_oh - lse
    return dict(V=V, v_run=v_run, v_oh=v_oh, logp_run=logp_run, logp_oh=logp_oh,
                p_oh=np.exp(logp_oh), iters=it + 1, last_diff=diff, F=F)


def simulate_panel(n_units, seed, p_oh_by_c, T=T_PERIODS):
    rng = np.random.default_rng(seed)
    c = (np.arange(n_units) % 2)[rng.permutation(n_units)]   # exactly half each
    noise = rng.standard_normal((n_units, 5))
    wear = rng.integers(0, 5, size=n_units)
    rows = []
    cols = {k: [] for k in ["machine", "period", "action", "wear", "c"]}
    for t in range(T):
        p = np.where(c == 1, p_oh_by_c[1][wear], p_oh_by_c[0][wear])
        oh = rng.random(n_units) < p
        cols["machine"].append(np.arange(n_units)); cols["period"].append(np.full(n_units, t))
        cols["action"].append(np.where(oh, "overhaul", "run")); cols["wear"].append(wear.copy())
        cols["c"].append(c.copy())
        base = np.where(oh, 0, wear)
        u = rng.random(n_units)
        inc = np.empty(n_units, dtype=int)
        for cv in (0, 1):
            cdf = np.cumsum(INCR[cv])
            sel = c == cv
            inc[sel] = np.searchsorted(cdf, u[sel], side="right")
        wear = np.minimum(base + inc, W - 1)
    df = pd.DataFrame({k: np.concatenate(v) for k, v in cols.items()})
    df["w_scaled"] = df["wear"] / 10.0
    df["one"] = 1.0
    for j in range(5):
        df[f"x{j}"] = noise[df["machine"].to_numpy(), j]
    df = df.sort_values(["machine", "period"]).reset_index(drop=True)
    return df[["machine", "period", "action", "wear", "w_scaled", "one", "c"] + [f"x{j}" for j in range(5)]]


def exact_row_average(delta_by_c, T=T_PERIODS):
    """Exact expectation of the row-average of delta(w,c) under the true process."""
    base = solve(0), solve(1)
    total = 0.0
    for cv in (0, 1):
        F = run_transition(cv)
        p_oh = base[cv]["p_oh"]
        d = np.zeros(W); d[:5] = 0.2
        acc = 0.0
        for t in range(T):
            acc += d @ delta_by_c[cv]
            # next-period distribution
            d = (d * (1 - p_oh)) @ F + (d * p_oh).sum() * F[0]
        total += 0.5 * acc / T
    return total
