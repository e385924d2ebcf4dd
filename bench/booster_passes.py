"""Passes of the reference successive convexification over the demo
booster's envelope (issue 19): the figures behind PASS_CAP and W_TRUST.

    .venv/bin/python -m bench.booster_passes [--cases 40] [--horizon 50] [--seed 1]

Draws states uniformly from the envelope of examples/demo_booster.toml and
solves each at a few fixed times of flight (the search would multiply the
cost by its probes without changing what one SCvx run does); prints the
outcomes and, over the converged runs, the median and worst passes, and
the worst open-loop predicted terminal error. Single-threaded; run it under
the shared lock on a shared machine.
"""

from __future__ import annotations

import argparse
import collections
import time
from pathlib import Path

import numpy as np

from codegen.booster import BoosterReference
from codegen.model import scvx
from codegen.model.vehicle import load_vehicle

BOOSTER = Path(__file__).resolve().parent.parent / "examples" / "demo_booster.toml"
TIMES_S = (20.0, 22.0, 24.0, 26.0)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--cases", type=int, default=40)
    ap.add_argument("--horizon", type=int, default=50)
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args(argv)
    v = load_vehicle(BOOSTER)
    env = v.envelope
    rng = np.random.default_rng(args.seed)
    ref = BoosterReference(v, args.horizon)
    outcomes = collections.Counter()
    passes, err_r, err_v, secs = [], [], [], []
    for _ in range(args.cases):
        r = rng.uniform(env.position_min_m, env.position_max_m)
        vel = rng.uniform(env.velocity_min_mps, env.velocity_max_mps)
        m = rng.uniform(env.mass_min_kg, env.mass_max_kg)
        for tof in TIMES_S:
            t0 = time.perf_counter()
            p = ref.solve_fixed(r, vel, m, tof)
            secs.append(time.perf_counter() - t0)
            outcomes[(p.convergence, p.status)] += 1
            if p.convergence == scvx.CONVERGED:
                passes.append(p.passes)
                err_r.append(float(np.linalg.norm(p.predicted_position_error_m)))
                err_v.append(float(np.linalg.norm(p.predicted_velocity_error_mps)))
    print(f"demo booster, N = {args.horizon}, {args.cases} states x t_f in {TIMES_S} s, "
          f"seed {args.seed}, pass cap {scvx.PASS_CAP}")
    for (conv, status), count in sorted(outcomes.items()):
        print(f"  {conv:18s} {status:20s} {count}")
    if passes:
        print(f"  passes when converged: median {np.median(passes):g}, worst {max(passes)}")
        print(f"  predicted terminal error, worst: {max(err_r):.3g} m, {max(err_v):.3g} m/s")
    print(f"  time per run: median {np.median(secs):.3f} s (wall clock, shared machine)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
