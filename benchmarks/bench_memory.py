"""Peak memory of the direct sampler's set-up, as ratios measured in one run.

For the ``dose_mg_kg`` part of the invented ``sparse`` demo (strata ``centre``, nuisance
co-medication and age; a nuisance network of about 5.3 million nodes and 9.5 million arcs), each
step runs in a fresh subprocess and reports its peak resident memory (``resource.getrusage``):

1. the nuisance network alone (``mcexact.plan``);
2. the network, then the arrays of the direct kernel (``montecarlo._flatten``: node pointers,
   successors, events per arc and alias tables), at the null and at one tilt;
3. a whole ``fit(method="direct")`` of the part with tilted refinement.

Printed: the peak of each step, and for step 2 the growth of the peak over step 1 divided by the
bytes of the arrays the set-up returns (1.0 would mean no scratch memory at all). Target (ours):
at most 1.5.

Measured on 2026-12-02: network 497 MB; set-up 1,081 MB with 438 MB of arrays (ratio 1.33); fit
1,083 MB. The same script on the code before the set-up filled its arrays in place, kept its
alias scratch per node and shared the network's structure between tilts: set-up 1,522 MB with
587 MB of arrays (ratio 1.75); fit 1,524 MB.

    python benchmarks/bench_memory.py

Prints a table; asserts nothing.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

STEP = r'''
import json, resource, sys
sys.path.insert(0, {root!r})
import numpy as np, mcexact
from mcexact import montecarlo as mc
from mcexact.design import Design
data = mcexact.load_demo("sparse")
d = Design.from_formula(data, "rash ~ dose_mg_kg + comed + age", strata="centre",
                        interest=["dose_mg_kg"])
out = {{}}
if {step!r} == "fit":
    mcexact.fit(d, method="direct", n_draws=10000, rng=1, progress=False, asymptotic=False)
else:
    net = mcexact.plan(d)._network
    out["nodes"] = int(sum(net.stage_nodes)); out["arcs"] = int(sum(int(p[-1]) for p in net.arc_ptr))
    if {step!r} == "flatten":
        flat = mc._flatten(net)
        theta = np.full(net.problem.n_stages, 0.05)
        tilted = mc._flatten(net, mc._tilted_logp(net, theta))
        shared = {{id(a) for a in flat}}
        out["bytes"] = int(sum(a.nbytes for a in flat)
                           + sum(a.nbytes for a in tilted if id(a) not in shared))
out["peak_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
print(json.dumps(out))
'''


def run(step: str) -> dict:
    code = STEP.format(root=ROOT, step=step)
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          check=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> None:
    net, flat, fit = run("network"), run("flatten"), run("fit")
    ratio = (flat["peak_mb"] - net["peak_mb"]) * 2 ** 20 / flat["bytes"]
    print(f"Peak memory of the direct sampler's set-up: demo 'sparse', part dose_mg_kg "
          f"({net['nodes']:,} nodes, {net['arcs']:,} arcs)")
    print(f"  {'step':44s} {'peak MB':>8s}")
    print(f"  {'nuisance network (plan)':44s} {net['peak_mb']:8.0f}")
    print(f"  {'network + kernel arrays, null and one tilt':44s} {flat['peak_mb']:8.0f}")
    print(f"  {'fit(method=direct) with tilted refinement':44s} {fit['peak_mb']:8.0f}")
    print(f"  arrays returned by the set-up: {flat['bytes'] / 2 ** 20:.0f} MB; peak growth / "
          f"arrays = {ratio:.2f} (target <= 1.5: {'met' if ratio <= 1.5 else 'NOT met'})")


if __name__ == "__main__":
    main()
