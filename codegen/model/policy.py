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

#: Solves after the search at its time of flight, at most: the target, the
#: least error, and the least fuel at that error with each slack.
FINAL_SOLVES_SEARCH = 2 + len(ERROR_SLACK_REL)
#: Solves of a fixed time of flight, at most, besides the reserve's bisection:
#: the target at the planning limit and at the reserve's, the least error and
#: each slack.
FINAL_SOLVES_FIXED = 3 + len(ERROR_SLACK_REL)
