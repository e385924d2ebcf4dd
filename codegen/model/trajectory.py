"""The answer every solver returns, in SI units, with an honest status."""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

import numpy as np

#: Statuses, shared by the reference and every generated solver.
#: Statuses of a guidance call (the C's {c}_status, in the same order).
#: The plan meets the target, least fuel, and passes the real-constraint
#: checks. (Also the status of one converged solve_mode solve, in any mode.)
TARGET_MET = "target_met"
#: No plan exists: the solver certified infeasibility, or the rocket
#: equation rules the target out and no best reachable plan was allowed.
UNREACHABLE = "unreachable"
#: The per-solve cap or the call's iteration budget was reached: no plan.
ITERATIONS_EXHAUSTED = "iterations_exhausted"
#: The solver broke down numerically: no plan.
SOLVER_BREAKDOWN = "solver_breakdown"
#: The input was refused before any solve; nothing was written.
INPUT_REFUSED = "input_refused"
#: The target was out of reach; the answer is the plan of least terminal
#: error, then least fuel at that error (two-stage, Blackmore et al. 2010),
#: with its predicted terminal error.
BEST_REACHABLE = "best_reachable"
#: A solve converged, but its plan breaks a real (non-convex) constraint
#: beyond tolerance (codegen/model/verdict.py); the plan and the violation
#: are returned so that the caller sees them, and it must not be flown.
LIMITS_VIOLATED = "limits_violated"
STATUSES = (TARGET_MET, UNREACHABLE, ITERATIONS_EXHAUSTED, SOLVER_BREAKDOWN, INPUT_REFUSED, BEST_REACHABLE,
            LIMITS_VIOLATED)
SOLVED = (TARGET_MET, BEST_REACHABLE)


@dataclass
class Trajectory:
    """A descent plan. Arrays have N+1 rows (nodes) or N rows (intervals).

    ``objective`` is the scaled objective of the final solve (fuel kind: dt *
    sum(sigma) in scaled units), used to compare solvers to each other.
    ``iterations`` counts the interior-point iterations of the solve that
    gave the answer; ``iterations_total`` those of the whole time-of-flight
    search; ``iterations_max`` the most of any one solve in it.
    """

    status: str
    solver: str
    horizon: int
    time_of_flight_s: float = math.nan
    t_s: np.ndarray = field(default_factory=lambda: np.zeros(0))
    position_m: np.ndarray = field(default_factory=lambda: np.zeros((0, 3)))
    velocity_mps: np.ndarray = field(default_factory=lambda: np.zeros((0, 3)))
    mass_kg: np.ndarray = field(default_factory=lambda: np.zeros(0))
    thrust_n: np.ndarray = field(default_factory=lambda: np.zeros((0, 3)))
    throttle: np.ndarray = field(default_factory=lambda: np.zeros(0))
    accel_slack_mps2: np.ndarray = field(default_factory=lambda: np.zeros(0))
    accel_mps2: np.ndarray = field(default_factory=lambda: np.zeros((0, 3)))
    fuel_kg: float = math.nan
    landing_miss_m: float = math.nan
    objective: float = math.nan
    iterations: int = 0
    iterations_total: int = 0
    iterations_max: int = 0
    solves: int = 0
    solve_time_s: float = 0.0
    message: str = ""
    #: The problem mode of the solve that gave the plan (problem.MODES), and
    #: the throttle limit it was made for (fraction of thrust_max_n).
    plan_mode: str = ""
    throttle_limit: float = math.nan
    target_m: np.ndarray = field(default_factory=lambda: np.zeros(3))
    velocity_target_mps: np.ndarray = field(default_factory=lambda: np.zeros(3))
    #: Predicted terminal error of the plan: r_N - target, v_N - v_target (SI),
    #: and its weighted norm (velocity by the touchdown speed limits, position
    #: by touchdown.error_position_scale_m: 1 = one speed limit).
    terminal_position_error_m: np.ndarray = field(default_factory=lambda: np.full(3, math.nan))
    terminal_velocity_error_mps: np.ndarray = field(default_factory=lambda: np.full(3, math.nan))
    terminal_error: float = math.nan
    #: Violations of the real constraints (codegen/model/verdict.py, Verdict.as_dict).
    verdict: dict = field(default_factory=dict)
    verdict_text: str = ""

    @property
    def solved(self) -> bool:
        return self.status in SOLVED

    @property
    def degraded(self) -> bool:
        """A plan was handed out, but not the plain one asked for: the best
        reachable plan (the target out of reach), or a target plan that
        needed a remedy its ``message`` names (relaxed solver tolerances, a
        nearby time of flight, the engine's reserve, a budget). Callers warn."""
        return self.solved and (self.status != TARGET_MET or bool(self.message))

    @property
    def terminal_miss_m(self) -> float:
        """Horizontal distance of the plan's last node from the target."""
        return float(np.hypot(*self.terminal_position_error_m[:2]))

    @property
    def terminal_speed_error_mps(self) -> float:
        return float(np.linalg.norm(self.terminal_velocity_error_mps))

    def set_terminal_error(self, touchdown) -> None:
        """Terminal error from the plan's last node, weighted by ``touchdown``
        (a vehicle's Touchdown) as in problem.terminal_error_weights."""
        dr = np.asarray(self.position_m[-1], float) - np.asarray(self.target_m, float)
        dv = np.asarray(self.velocity_mps[-1], float) - np.asarray(self.velocity_target_mps, float)
        self.terminal_position_error_m, self.terminal_velocity_error_mps = dr, dv
        w = np.array([1.0 / touchdown.error_position_scale_m] * 3 + [1.0 / touchdown.speed_horizontal_max_mps] * 2
                     + [1.0 / touchdown.speed_vertical_max_mps])
        self.terminal_error = float(np.linalg.norm(w * np.concatenate([dr, dv])))
        self.landing_miss_m = self.terminal_miss_m

    @property
    def tightness_gap(self) -> float:
        """Largest relative gap between |u| and sigma over the intervals.

        Zero at a lossless optimum (Acikmese & Ploen 2007)."""
        if not self.solved or len(self.accel_slack_mps2) == 0:
            return math.nan
        norm_u = np.linalg.norm(self.accel_mps2, axis=1)
        return float(np.max(np.abs(self.accel_slack_mps2 - norm_u) / np.maximum(self.accel_slack_mps2, 1e-12)))

    def to_dict(self) -> dict:
        def arr(a):
            return np.asarray(a, float).tolist()

        def vec(a):
            a = np.asarray(a, float)
            return a.tolist() if np.all(np.isfinite(a)) else None

        def num(x):
            return None if x is None or not math.isfinite(x) else float(x)

        return {
            "status": self.status,
            "solver": self.solver,
            "horizon": self.horizon,
            "time_of_flight_s": num(self.time_of_flight_s),
            "fuel_kg": num(self.fuel_kg),
            "landing_miss_m": num(self.landing_miss_m),
            "objective": num(self.objective),
            "iterations": self.iterations,
            "iterations_total": self.iterations_total,
            "iterations_max": self.iterations_max,
            "solves": self.solves,
            "solve_time_s": self.solve_time_s,
            "tightness_gap": num(self.tightness_gap),
            "message": self.message,
            "degraded": self.degraded,
            "plan_mode": self.plan_mode,
            "throttle_limit": num(self.throttle_limit),
            "terminal_position_error_m": vec(self.terminal_position_error_m),
            "terminal_velocity_error_mps": vec(self.terminal_velocity_error_mps),
            "terminal_error": num(self.terminal_error),
            "verdict": self.verdict,
            "t_s": arr(self.t_s),
            "position_m": arr(self.position_m),
            "velocity_mps": arr(self.velocity_mps),
            "mass_kg": arr(self.mass_kg),
            "accel_mps2": arr(self.accel_mps2),
            "accel_slack_mps2": arr(self.accel_slack_mps2),
            "thrust_n": arr(self.thrust_n),
            "throttle": arr(self.throttle),
        }

    def to_json(self) -> str:
        return json.dumps(self.to_dict())

    def to_csv(self) -> str:
        """One row per node (codegen/model/export.py says the columns)."""
        from codegen.model.export import to_csv
        return to_csv(self)

    def save(self, path):
        """Write the plan to ``path``: .json, .csv or .mat (MATLAB), atomically."""
        from codegen.model.export import save
        return save(self, path)
