#!/usr/bin/env python3
"""The chosen model against the generic baseline per product and frequency
pair, over seeds (BENCHMARKS.md, "The goal read per product and pair").

Reads the tables `zoo_bench --quick` (or `--held-out`) wrote, one file per
seed, and prints per (product, pair) the geometric mean over the seeds of
the chosen model's validation SEP divided by the baseline's, in range, on
the readings the device does not mark, 10 C hotter and at twice the salt,
with how many seeds were at or below 1; and the one-sided Wilcoxon
signed-rank p-value (scipy.stats.wilcoxon on the log ratios) that the
chosen model is worse in range, with Holm's correction over the groups.

    for s in $(seq 1 16); do
      FRINGE_SEED=$s target/release/examples/zoo_bench --quick > zb/zb-quick-$s.txt
    done
    target/fringe-venv/bin/python calibration/examples/zoo_groups.py zb 1 16

(scipy from the test environment, tests/python/requirements.txt.)
"""
import sys, collections, math
from scipy.stats import wilcoxon
d=sys.argv[1]; s0=int(sys.argv[2]); s1=int(sys.argv[3]); pat=sys.argv[4] if len(sys.argv)>4 else 'zb-quick-{s}.txt'
modes=['all','unmarked','hot','salt']
by=collections.defaultdict(lambda: collections.defaultdict(list)); order=[]
for s in range(s0,s1+1):
    for l in open(f"{d}/"+pat.format(s=s)):
        c=[x.strip() for x in l.split('|')]
        if len(c)<13 or c[1] in('product','---'): continue
        k=(c[1],c[2])
        if k not in order: order.append(k)
        try:
            by[k]['all'].append(float(c[8].split()[-1])/float(c[7]))
            for m,i in (('hot',11),('salt',12)):
                u=c[i].split('/'); by[k][m].append(float(u[0])/float(u[1]))
            if len(c)>16 and '/' in c[16]:
                u=c[16].split('(')[0].split('/'); by[k]['unmarked'].append(float(u[0])/float(u[1]))
        except Exception as e: pass
gm=lambda v: math.exp(sum(map(math.log,v))/len(v))
print("| product | f1/f2 MHz | in range | unmarked readings | 10 C hotter | twice the salt | p (worse in range) |")
print("| --- | --- | --- | --- | --- | --- | --- |")
tot=collections.Counter(); have=collections.Counter(); ps=[]
for k in order:
    row=[]
    for m in modes:
        v=by[k][m]
        if not v: row.append('-'); continue
        g=gm(v); row.append(f"{g:.3f} ({sum(x<=1 for x in v)}/{len(v)})"); tot[m]+= g<=1; have[m]+=1
    lr=[math.log(x) for x in by[k]['all']]
    p=wilcoxon(lr, alternative='greater').pvalue
    ps.append(p)
    print(f"| {k[0]} | {k[1]} | "+" | ".join(row)+f" | {p:.2f} |")
n=len(order)
# Holm's step-down procedure at 5 %: reject the smallest p while it is at
# most 0.05 / (number of groups not yet rejected).
holm=0
for i,p in enumerate(sorted(ps)):
    if p > 0.05/(n-i): break
    holm+=1
print(f"\ngroups {n}; geometric mean at or below 1: "+", ".join(f"{m} {tot[m]} of {have[m]}" for m in modes)+f"; worse at p < 0.05 (uncorrected) {sum(p<0.05 for p in ps)}; worse after Holm's correction {holm}")
