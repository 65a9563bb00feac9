from machine_sim import *
sol = {c: solve(c) for c in (0, 1)}
for r in range(1, 9):
    df = simulate_panel(800, seed=1000 + r, p_oh_by_c={c: sol[c]["p_oh"] for c in (0, 1)})
    df.to_csv(f"panel_{r}.csv", index=False)
    print(r, len(df), round((df.action == "overhaul").mean(), 4), df.groupby("machine").action.apply(lambda a: (a=="overhaul").sum()>=2).mean())
