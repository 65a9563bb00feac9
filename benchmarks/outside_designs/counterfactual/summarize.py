import json, numpy as np
truth = json.load(open("truth.json"))
T_EX, T_50 = truth["truth_exact_distribution"], truth["truth_50k_panel"]
TRUE = {"wear_cost": -1.2, "overhaul_cost": -4.0}
recs = []
for r in range(1, 9):
    cf = json.load(open(f"out/cf_{r}.json")); est = json.load(open(f"out/est_{r}.json"))
    row = [x for x in cf["rows"] if x["statistic"] == "share[overhaul]" and x["scenario"] == "difference"][0]
    base = [x for x in cf["rows"] if x["statistic"] == "share[overhaul]" and x["scenario"] == "baseline"][0]
    p = {q["name"]: q for q in est["params"]}
    recs.append((r, row, base, p, est.get("details", est)["interval_check"]))
print("draw | cf diff est | s.e. | 95% CI | covers exact | covers 50k | base share est | wear_cost (se) cov | overhaul_cost (se) cov | flagged")
for r, row, base, p, ic in recs:
    cov_ex = row["ci_lower"] <= T_EX <= row["ci_upper"]; cov_50 = row["ci_lower"] <= T_50 <= row["ci_upper"]
    s = f"{r} | {row['estimate']:.4f} | {row['std_error']:.4f} | [{row['ci_lower']:.4f}, {row['ci_upper']:.4f}] | {cov_ex} | {cov_50} | {base['estimate']:.4f}"
    for k in ("wear_cost", "overhaul_cost"):
        q = p[k]; s += f" | {q['estimate']:.3f} ({q['std_error']:.3f}) [{q['ci_lower']:.2f},{q['ci_upper']:.2f}] {q['ci_lower'] <= TRUE[k] <= q['ci_upper']}"
    s += " | " + ",".join(k for k in ic if ic[k]["flagged"])
    print(s)
e = np.array([x[1]["estimate"] for x in recs]); se = np.array([x[1]["std_error"] for x in recs])
print(f"truth exact {T_EX:.5f}, 50k {T_50:.5f}")
print(f"mean est {e.mean():.5f}, mean se {se.mean():.5f}, SD est {e.std(ddof=1):.5f}, SD/meanSE {e.std(ddof=1)/se.mean():.2f}")
bias = e.mean() - T_EX
print(f"bias {bias:.5f} = {100*bias/T_EX:.1f}% of truth = {bias/se.mean():.2f} mean s.e.; MC s.e. of mean {e.std(ddof=1)/np.sqrt(len(e)):.5f}; t={bias/(e.std(ddof=1)/np.sqrt(len(e))):.2f}")
print("coverage exact", sum(x[1]['ci_lower'] <= T_EX <= x[1]['ci_upper'] for x in recs), "/8")
for k in TRUE:
    est = np.array([x[3][k]["estimate"] for x in recs]); s = np.array([x[3][k]["std_error"] for x in recs])
    cov = sum(x[3][k]["ci_lower"] <= TRUE[k] <= x[3][k]["ci_upper"] for x in recs)
    print(f"{k}: mean {est.mean():.4f} bias {est.mean()-TRUE[k]:.4f} SD {est.std(ddof=1):.4f} mean se {s.mean():.4f} coverage {cov}/8")
bs = np.array([x[2]["estimate"] for x in recs]); print("baseline share mean", bs.mean().round(4), "truth (rows, exact P)", truth["base_share_exact_rows_50k"])
