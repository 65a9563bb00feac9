#!/usr/bin/env python
"""Runner (written by a developer who had not read the estimator): simulate designs C and D (own exact solver in sim.py), run `orthoccp estimate` with
default options on each panel, collect results.

usage: python run_all.py VENV_PATH [--seeds 10] [--designs C,D] [--out results.csv]
"""
import argparse, json, os, subprocess, sys, time
from pathlib import Path
import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
import sim  # noqa: E402

ap = argparse.ArgumentParser()
ap.add_argument('venv')
ap.add_argument('--seeds', type=int, default=10)
ap.add_argument('--first-seed', type=int, default=0)
ap.add_argument('--designs', default='C,D')
ap.add_argument('--out', default=str(HERE / 'results.csv'))
a = ap.parse_args()
exe = str(Path(a.venv) / 'bin' / 'orthoccp')
runs = HERE / 'runs'; runs.mkdir(exist_ok=True)
env = dict(os.environ, OMP_NUM_THREADS='1')

rows, checks = [], []
for design in a.designs.split(','):
    for seed in range(a.first_seed, a.first_seed + a.seeds):
        tag = f'{design}_s{seed}'
        if design == 'C':
            df, sol = sim.c_simulate(seed)
            truth = sim.C['theta']
            spec = sim.C_SPEC.format(truth=json.dumps(truth), path=f'{tag}.csv',
                                     xs=', '.join(f'"x{k}"' for k in range(10)))
        else:
            df, sol = sim.d_simulate(seed)
            truth = sim.D['theta']
            spec = sim.D_SPEC.format(truth=json.dumps(truth), path=f'{tag}.csv',
                                     zs=', '.join(f'"z{k}"' for k in range(15)))
        shares = df['action'].value_counts(normalize=True).round(4).to_dict()
        checks.append(dict(design=design, seed=seed, hm_err=sol['hm_err'], fd_err=sol['fd_err'],
                           bellman_last_diff=sol['bellman_diff'], vi_iters=sol['iters'],
                           n_rows=len(df), shares=json.dumps(shares)))
        df.to_csv(runs / f'{tag}.csv', index=False)
        (runs / f'{tag}.toml').write_text(spec)
        cmd = [exe, 'estimate', str(runs / f'{tag}.csv'), '--spec', str(runs / f'{tag}.toml'),
               '--json', str(runs / f'{tag}.json')]
        t0 = time.time()
        p = subprocess.run(cmd, capture_output=True, text=True, env=env)
        dt = time.time() - t0
        (runs / f'{tag}.stdout').write_text(p.stdout); (runs / f'{tag}.stderr').write_text(p.stderr)
        warn = ' | '.join(l.strip() for l in p.stderr.splitlines() if l.strip())
        base = dict(design=design, seed=seed, exit_code=p.returncode, runtime_s=round(dt, 1),
                    stderr=warn, hm_err=sol['hm_err'], shares=json.dumps(shares))
        print(tag, 'rc', p.returncode, f'{dt:.1f}s', warn[:300], flush=True)
        if p.returncode != 0 or not (runs / f'{tag}.json').exists():
            for k, v in truth.items():
                rows.append(dict(base, param=k, truth=v))
            continue
        j = json.loads((runs / f'{tag}.json').read_text())
        sol_s = j.get('solution', {})
        for prm in j['params']:
            k = prm['name']; ic = j.get('interval_check', {}).get(k, {})
            est, se = prm['estimate'], prm['std_error']
            lo, hi = prm['ci_lower'], prm['ci_upper']
            rows.append(dict(base, param=k, truth=truth[k], estimate=est, std_error=se,
                             ci_lower=lo, ci_upper=hi,
                             covers=(lo is not None and hi is not None and lo <= truth[k] <= hi),
                             plugin=j.get('plugin_params', {}).get(k),
                             solution_routes=';'.join(sol_s.get('routes', [])),
                             solution_summary=sol_s.get('summary'),
                             solution_notes=';'.join(n for n in sol_s.get('notes', []) if n),
                             moments=j.get('moments'),
                             flagged=ic.get('flagged'), flag_reason=ic.get('reason'),
                             linearity_gap=ic.get('linearity_gap'),
                             correction_shift=ic.get('correction_shift'),
                             identification=ic.get('identification'),
                             top_unit_share=ic.get('top_unit_share'),
                             effective_units=ic.get('effective_units'),
                             n_moment_rows=j.get('n_moment_rows'),
                             total_s=j.get('timings', {}).get('total_s')))
        pd.DataFrame(rows).to_csv(a.out, index=False)
        pd.DataFrame(checks).to_csv(Path(a.out).with_name(Path(a.out).stem + '_identity_checks.csv'), index=False)
pd.DataFrame(rows).to_csv(a.out, index=False)
pd.DataFrame(checks).to_csv(Path(a.out).with_name(Path(a.out).stem + '_identity_checks.csv'), index=False)
print('wrote', a.out)
