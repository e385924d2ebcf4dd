"""``pdgc check``: a generated solver against the reference, case by case."""

from __future__ import annotations

from codegen.cli.common import print_table
from codegen.progress import Progress


def register(sub) -> None:
    s = sub.add_parser("check", help="check a generated solver against the reference")
    s.add_argument("dir")
    s.add_argument("--cases", type=int, default=200)
    s.add_argument("--seed", type=int, default=1)
    s.add_argument("--tol-objective", type=float, default=None,
                   help="relative objective tolerance (default by precision)")
    s.add_argument("--search-every", type=int, default=5,
                   help="every K-th case searches the time of flight (default 5)")
    s.add_argument("--edge-states", type=int, default=0, metavar="K",
                   help="also sweep fixed times of flight across both edges of the feasible "
                        "window for K states drawn inside the envelope (codegen.verify.edges); "
                        "fails on any plan that breaks the real constraints")
    s.add_argument("--json", default=None, metavar="FILE", help="also write the results as JSON")
    s.set_defaults(func=run)


def run(args) -> int:
    import json
    import sys
    from pathlib import Path

    from codegen import versions
    from codegen.errors import InputError
    from codegen.verify.check import check_tree, replay_line, results_json

    if not (Path(args.dir) / "manifest.json").is_file():
        raise InputError("dir", args.dir, "must be a generated tree (a directory with "
                                          "manifest.json), made by pdgc generate")

    try:
        env = json.loads((Path(args.dir) / "manifest.json").read_text()).get("environment")
    except (OSError, ValueError, AttributeError):
        env = None      # check_tree says what is wrong with the tree
    for line in versions.warning_lines(env, f"tree {args.dir}"):
        print(f"pdgc check: {line}", file=sys.stderr)

    # Off a terminal: a line at every tenth of the cases, as before the bar.
    with Progress(max(args.cases, 0), "pdgc check", "cases",
                  line_every=max(1, args.cases // 10)) as bar:
        r = check_tree(args.dir, args.cases, args.seed, args.search_every, args.tol_objective,
                       on_case=lambda done, total: bar.update())
    gen, s, tol, length = r.solver, r.summary, r.tolerances, r.length_m
    vehicle = gen.vehicle
    ms = 1e3
    print(f"pdgc check: {args.dir} ({gen.backend}, N = {gen.horizon}, {r.precision}), "
          f"{s['cases']} cases, seed {args.seed}")
    print_table([
        ("status agreement", f"{s['status_agreement']}/{s['cases']}"),
        ("status pairs (generated/reference)",
         ", ".join(f"{k}: {v}" for k, v in s["status_pairs"].items())),
        ("worst relative objective error", f"{s['worst_objective_rel']:.3g}  (tol {tol['objective_rel']:.1g})"),
        ("worst relative fuel error", f"{s['worst_fuel_rel']:.3g}"),
        ("worst position difference", f"{s['worst_position_m']:.3g} m  (tol {tol['position_rel'] * length:.3g})"),
        ("worst thrust difference", f"{s['worst_thrust_n']:.3g} N  (tol {tol['thrust_rel'] * vehicle.thrust_upper_n:.3g})"),
        ("iterations per solve (median / worst)", f"{s['iterations_median']:.0f} / {s['iterations_worst']}"),
        ("solve time, fixed tof (median / worst)",
         f"{s['solve_time_fixed_median_s'] * ms:.3f} / {s['solve_time_fixed_worst_s'] * ms:.3f} ms"),
        ("plan time, searched tof (median / worst)",
         f"{s['solve_time_search_median_s'] * ms:.3f} / {s['solve_time_search_worst_s'] * ms:.3f} ms"),
    ])
    failed = [x for x in r.results if x.failures]
    for x in failed[:20]:
        print(f"FAIL case {x.case.index} ({x.case.kind}): {'; '.join(x.failures)}")
        print(f"  replay: {replay_line(args.dir, x.case, gen.horizon)}")
    if len(failed) > 20:
        print(f"... and {len(failed) - 20} more failing cases")
    edge_bad = 0
    if args.edge_states < 0:
        print(f"pdgc check: --edge-states = {args.edge_states}: must be >= 0", file=sys.stderr)
        return 2
    if args.edge_states:
        edge_bad = run_edges(args, gen)
    if args.json:
        from codegen.fsutil import write_atomic
        write_atomic(args.json, results_json(r))
    bad = len(failed) + edge_bad
    print("PASS" if not bad else f"FAIL: {len(failed)} of {len(r.results)} cases"
          + (f", {edge_bad} edge-sweep plans that break the constraints" if edge_bad else ""))
    return 0 if not bad else 1


def run_edges(args, gen) -> int:
    """The edge sweep; returns the number of plans called flyable that are not."""
    from codegen.reference import ReferenceSolver
    from codegen.verify.check import draw_cases
    from codegen.verify.edges import OFFSETS_S, sweep

    drawn = [c for c in draw_cases(gen.vehicle, 4 * args.edge_states + 8, args.seed,
                                   search_every=0) if c.kind == "inside"][:args.edge_states]
    states = [(c.position_m, c.velocity_mps, c.mass_kg) for c in drawn]
    ref = ReferenceSolver(gen.vehicle, gen.horizon)
    with Progress(len(states), "pdgc check: edge sweep", "states") as bar:
        res = sweep(gen, ref, states, progress=lambda done: bar.update())
    e = res.summary()
    print(f"pdgc check: edge sweep, {e['states']} states, {e['solves']} solves at "
          f"{min(OFFSETS_S):g} .. {max(OFFSETS_S):g} s from both edges of the feasible window")
    print_table([
        ("plans that break the constraints (generated / reference)",
         f"{e['false_flyable']['generated']} / {e['false_flyable']['reference']}"),
        ("failures inside the window (generated / reference)",
         f"{e['failures_inside']['generated']} / {e['failures_inside']['reference']} "
         f"of {e['inside']}"),
        ("status disagreements", f"{e['status_disagreements']}"),
        ("worst iterations of a call (generated)", f"{e['generated_iterations_worst']}"),
    ])
    return e["false_flyable"]["generated"]
