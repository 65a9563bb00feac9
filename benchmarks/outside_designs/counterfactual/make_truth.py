import json, numpy as np
from machine_sim import *

out = {}
sol = {c: solve(c) for c in (0, 1)}
sol_cf = {c: solve(c, shift_oh=1.0) for c in (0, 1)}
# solver checks
for c in (0, 1):
    s = sol[c]
    hm = np.max(np.abs((s["logp_run"] - s["logp_oh"]) - (s["v_run"] - s["v_oh"])))
    # Bellman residual
    F = s["F"]; V = s["V"]
    v_run = THETA_WEAR * np.arange(W) / 10 + BETA * F @ V
    v_oh = THETA_OHC + BETA * F[0] @ V
    bell = np.max(np.abs(np.logaddexp(v_run, v_oh) + EULER - V))
    # Hotz-Miller inversion V = v_oh - ln P_oh + gamma
    inv = np.max(np.abs(s["v_oh"] - s["logp_oh"] + EULER - V))
    # linear-solve cross-check: V = sum_j P_j (u_j + gamma - ln P_j) + beta * sum_j P_j F_j V
    P = s["p_oh"]; Fm = (1 - P)[:, None] * F + P[:, None] * F[0][None, :]
    u = (1 - P) * (THETA_WEAR * np.arange(W) / 10 + EULER - s["logp_run"]) + P * (THETA_OHC + EULER - s["logp_oh"])
    V_lin = np.linalg.solve(np.eye(W) - BETA * Fm, u)
    out[f"c{c}"] = dict(iters=s["iters"], last_diff=s["last_diff"], hotz_miller_max_err=hm,
                        bellman_residual=bell, hm_inversion_err=inv,
                        linear_vs_vi=float(np.max(np.abs(V_lin - V))),
                        p_oh_base=s["p_oh"].round(5).tolist(), p_oh_cf=sol_cf[c]["p_oh"].round(5).tolist())
delta = {c: sol_cf[c]["p_oh"] - sol[c]["p_oh"] for c in (0, 1)}
out["truth_exact_distribution"] = exact_row_average(delta)
big = simulate_panel(50000, seed=999, p_oh_by_c={c: sol[c]["p_oh"] for c in (0, 1)})
w, cc = big["wear"].to_numpy(), big["c"].to_numpy()
d = np.where(cc == 1, delta[1][w], delta[0][w])
out["truth_50k_panel"] = float(d.mean())
out["truth_50k_panel_mc_se"] = float(d.reshape(50000, -1).mean(1).std(ddof=1) / np.sqrt(50000))
out["base_share_50k"] = float((big["action"] == "overhaul").mean())
out["base_share_exact_rows_50k"] = float(np.where(cc == 1, sol[1]["p_oh"][w], sol[0]["p_oh"][w]).mean())
print(json.dumps(out, indent=1, default=float))
json.dump(out, open("truth.json", "w"), indent=1, default=float)
