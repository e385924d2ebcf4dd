"""The sequence of solves of one guidance call: constants the reference
(codegen/reference.py) and the generated guidance layer share.

Each value says where its figure comes from; DEVELOPERS.md has the
measurements.
"""

#: Tolerance of the search's probes (relative residuals and gap). Measured on
#: the demo vehicle (60 dispersed states, N = 20, Clarabel): probes at 1e-5
#: instead of 1e-9 moved the searched fuel by at most 8e-7 relative and saved
#: about a fifth of the iterations; 1e-6 keeps a margin.
PROBE_TOLERANCE = 1e-6

#: The error held in the second stage of the best-reachable pair: the least
#: error found in the first, times (1 + rel), plus abs (weighted; see
#: problem.terminal_error_weights). Without the slack the second stage's feasible set is a
#: sliver that Clarabel could not solve (demo vehicle, N = 50, 30 s). When
#: the second stage's plan is not flyable, it is solved again with the next,
#: larger relative slack: where the time is too short for the target, the
#: least-error plan burns propellant its thrust does not use (sigma > |u|:
#: a lighter vehicle brakes harder), which no engine can do, and a few per
#: cent more terminal error buys a plan without that (demo vehicle, N = 50,
#: 1500 m up, 33 s: 27 % gap at 0.1 % and 1 %, none at 3 %).
ERROR_SLACK_REL = (1e-3, 3e-2, 3e-1)
ERROR_SLACK_ABS = 1e-3

#: Bisection steps between the planning limit and the reserve's limit (a
#: fixed time of flight whose target is out of reach at the planning limit),
#: by default and at most. Measured in closed loop (codegen/sim/settings.py).
RESERVE_STEPS = 4
RESERVE_STEPS_MAX = 12

#: A merit probe whose terminal error is at most this (units of the touchdown
#: limits) counts as meeting the target: the final solve then tries the
#: target mode first.
MERIT_MEETS_TARGET = 1e-4

#: A searched call whose target plan at the time found converged but breaks a
#: real constraint (the relaxation not tight there) tries the target at these
#: nearby times of flight, in multiples of the search tolerance, in this
#: order; the first flyable plan is the answer. Measured: in a 10,000-case
#: campaign on the demo tree (N = 50) 5 searched calls ended limits_violated
#: for that reason; 4 of them had a flyable target plan at one of +-0.2 s
#: and +-0.5 s (4 and 10 tolerances) of the time found, at 0.008 to 0.15 kg
#: more fuel, and none at +-0.05 s (reference solves at t* +- 0.05, 0.2,
#: 0.5 s). With these steps the generated C and the reference recover the
#: same 4. The fifth (case 326 of that campaign, t* = 44.90 s, tightness gap
#: 0.20 at t* and at t* +- 0.5 s and -1 s) was flyable at t* + 1, + 2 and
#: + 3 s (reference solves, 0.7 to 6.2 kg more fuel): hence the later steps
#: 20 and 40 (+1 s, +2 s), tried last.
NEARBY_TOF_STEPS = (4, -4, 10, -10, 20, 40)

#: Solves after the search at its time of flight, at most: the target, the
#: nearby targets, the least error, and the least fuel at that error with
#: each slack.
FINAL_SOLVES_SEARCH = 2 + len(NEARBY_TOF_STEPS) + len(ERROR_SLACK_REL)
#: Solves of a fixed time of flight, at most, besides the reserve's bisection:
#: the target at the planning limit and at the reserve's, the least error and
#: each slack.
FINAL_SOLVES_FIXED = 3 + len(ERROR_SLACK_REL)
