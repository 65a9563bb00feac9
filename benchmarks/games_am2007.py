"""Monte Carlo of the games estimators on the design of Aguirregabiria & Mira (2007, section 5).

For each experiment: solve the equilibrium exactly, simulate ``--markets`` markets for
``--periods`` periods (each market starts from the stationary distribution), estimate by
two-step pseudo-likelihood and by NPL (:func:`orthoccp.games.estimate_game`, standard errors
clustered by market), and record per parameter the bias, SD, mean s.e., SD / mean s.e. and the
coverage of the 95% interval over ``--reps`` replications. Writes
``benchmarks/results/games_am2007.json``. Reproduce::

    python benchmarks/games_am2007.py --experiments 2 3 --reps 100
"""

from __future__ import annotations

import argparse
import json
import time
import warnings
from pathlib import Path

import numpy as np

from orthoccp import OrthoCCPWarning, __version__
from orthoccp.games import am2007_game, estimate_game, simulate_markets, solve_equilibrium

RESULTS = Path(__file__).parent / "results"


def run(experiment: int, *, reps: int, markets: int, periods: int) -> dict:
    game = am2007_game(experiment)
    eq = solve_equilibrium(game)
    truth = dict(zip(game.parameters, game.theta.tolist()))
    out: dict = {"experiment": experiment, "name": game.name, "markets": markets,
                 "periods": periods, "reps": reps, "truth": truth,
                 "spectral_radius": eq.spectral_radius, "estimators": {}}
    records: dict[str, list] = {"two-step": [], "npl": []}
    fallbacks = {"two-step": 0, "npl": 0}
    t0 = time.perf_counter()
    for r in range(reps):
        df = simulate_markets(eq, markets=markets, periods=periods, seed=10_000 * experiment + r)
        for est in records:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always", OrthoCCPWarning)
                res = estimate_game(df, discount=game.discount, estimator=est)
            fallbacks[est] += int(res.details.estimator != est)
            records[est].append((res.params.to_numpy(), res.std_errors.to_numpy(),
                                 len(caught)))
    for est, rows in records.items():
        theta = np.array([r[0] for r in rows])
        se = np.array([r[1] for r in rows])
        true = game.theta
        covers = np.abs(theta - true) <= 1.959964 * se
        out["estimators"][est] = {
            "fallbacks": fallbacks[est],
            "parameters": {
                name: {"bias": float(theta[:, k].mean() - true[k]),
                       "sd": float(theta[:, k].std(ddof=1)),
                       "mean_se": float(se[:, k].mean()),
                       "sd_over_se": float(theta[:, k].std(ddof=1) / se[:, k].mean()),
                       "coverage": float(covers[:, k].mean())}
                for k, name in enumerate(game.parameters)},
        }
    out["seconds"] = time.perf_counter() - t0
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    ap.add_argument("--experiments", type=int, nargs="+", default=[2, 3])
    ap.add_argument("--reps", type=int, default=100)
    ap.add_argument("--markets", type=int, default=400)
    ap.add_argument("--periods", type=int, default=3)
    ap.add_argument("--out", type=Path, default=RESULTS / "games_am2007.json")
    a = ap.parse_args()
    doc = {"orthoccp_version": __version__, "experiments": []}
    for e in a.experiments:
        doc["experiments"].append(run(e, reps=a.reps, markets=a.markets, periods=a.periods))
        a.out.write_text(json.dumps(doc, indent=1))
        last = doc["experiments"][-1]
        for est, s in last["estimators"].items():
            print(f"experiment {e} {est}: fallbacks {s['fallbacks']}; " + "; ".join(
                f"{k} cov {v['coverage']:.2f} sd/se {v['sd_over_se']:.2f} bias {v['bias']:+.3f}"
                for k, v in s["parameters"].items()))
    print(f"wrote {a.out}")


if __name__ == "__main__":
    main()
