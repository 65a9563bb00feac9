#!/bin/bash
. /work/main/.venv/bin/activate
cd /work/outside_cf
for r in 1 2 3 4 5 6 7 8; do
  nice -n 10 orthoccp estimate panel_$r.csv --spec machines_const1.toml --json out/est_$r.json > out/est_$r.txt 2> out/est_$r.err; echo "est $r rc=$?" >> out/log.txt
  nice -n 10 orthoccp counterfactual panel_$r.csv --spec machines_const1.toml --results out/est_$r.json --shift overhaul=1 --json out/cf_$r.json > out/cf_$r.txt 2> out/cf_$r.err; echo "cf $r rc=$?" >> out/log.txt
done
