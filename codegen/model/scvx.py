"""Booster landings: the reference successive convexification (issue 19).

The lander's problem (problem.py) has dynamics that are linear in its
variables (r, v, z = ln m; u = T/m, sigma), so one SOCP is the answer. With
drag the velocity equation gains a_drag(up(r), v, z) (codegen/model/drag.py),
which is not affine, and the plan is found by a sequence of SOCPs, each with
the drag linearised about the previous pass's plan:

- Mao, Szmuk & Acikmese (2016), "Successive convexification of non-convex
  optimal control problems and its convergence properties", IEEE CDC, and
  Mao, Szmuk, Xu & Acikmese (2018), "Successive convexification: a
  superlinearly convergent algorithm for non-convex optimal control
  problems", arXiv:1804.06539: linearise, solve, repeat, with virtual
  control (a slack on the dynamics rows, penalised by its 1-norm, so that a
  pass is never infeasible only because the linearisation is poor) and a
  trust region (so that a pass stays where the linearisation holds);
- Szmuk, Acikmese & Berning (2016), "Successive convexification for
  fuel-optimal powered landing with aerodynamic drag and non-convex
  constraints", AIAA GNC Conference: the same for powered landing with drag;
- Malyuta et al. (2022), "Convex optimization for trajectory generation",
  IEEE Control Systems Magazine 42(5): the tutorial, whose penalised trust
  region (a quadratic penalty on the step instead of a hard radius, so no
  radius-update logic) is the variant used here.

What each pass solves (scaled units as problem.py; x = (r, v, z), w = (u, sigma)):

    minimise   dt sum(sigma) + W_VIRTUAL ||nu||_1 + W_TRUST (||x - xbar||^2 + ||w - wbar||^2)
    subject to x_{k+1} = A_k x_k + B_k w_k + c_k + E nu_k        (k = 0..N-1)
               every constraint of problem.py (thrust bounds by lossless
               convexification, mass corridor, pointing, speed, glide slope),
               thrust-rate limit, final approach, touchdown at the pad.

(A_k, B_k, c_k) discretise the dynamics linearised about the previous plan
exactly over each interval, with u and sigma held (zero-order hold, the
plan's meaning in problem.py): from the previous node xbar_k under wbar_k,
x, Phi = dx/dx_k and S = dx/dw_k are integrated together over the interval
(x' = f(x, w), Phi' = A(x) Phi, S' = A(x) S + B) and A_k = Phi(t_{k+1}),
B_k = S(t_{k+1}), c_k = x(t_{k+1}) - A_k xbar_k - B_k wbar_k. Without drag
the linearisation is the dynamics and the integration is exact (RK4 is exact
on a system whose solution is a quadratic in t), so the pass is problem.py's
SOCP and the plan is the lossless-convexification plan.

The passes themselves (the program, the convergence loop, the search and
the verdict) are codegen/booster.py: this module holds the model half
(dynamics, discretisation, outcomes, defaults), which the generated C's
guidance layer will mirror.

The first pass linearises about nothing: it solves the drag-free program
(the lossless plan), whose plan seeds the second pass. The convergence test
is stated with its constants below; ``PASS_CAP`` bounds the passes.

A moving pad: the pad is at ``pad_position_m`` at the call and moves at the
constant ``pad_velocity_mps``; touchdown is at the pad's position at t_f
with the pad's velocity, and the glide-slope cone and the final approach
move with the pad (their apex is the pad at each node's time).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from codegen.model.drag import DragModel
from codegen.model.problem import Constants, Scaling
from codegen.model.trajectory import Trajectory
from codegen.model.verdict import TOLERANCES

# --- outcomes of the passes (BoosterPlan.convergence) ------------------------
#: The last pass met the convergence test: the plan is dynamically feasible
#: under drag within DEFECT_*_MAX and no longer changes.
CONVERGED = "converged"
#: PASS_CAP passes without meeting the test; ``defect_*`` say how far.
PASS_CAP_REACHED = "pass_cap_reached"
#: No plan: a pass was proven infeasible, or the passes converged to a plan
#: that still needs virtual control (the linearised problem has no exact
#: solution near it: Mao et al. 2018 call such a limit point infeasible).
NO_PLAN = "infeasible"
#: A pass's solve broke down numerically.
PASS_FAILED = "pass_failed"
CONVERGENCE_OUTCOMES = (CONVERGED, PASS_CAP_REACHED, NO_PLAN, PASS_FAILED)

# --- defaults, each with its source ------------------------------------------
#: Convergence, part 1: the largest defect of the plan under the full
#: nonlinear dynamics (each node flown under its held controls to the next
#: node, against that node). The same numbers as the verdict's dynamics
#: tolerances (verdict.TOLERANCES["double"]: 1 cm, 1 mm/s), so a converged
#: plan passes the check that every plan passes.
DEFECT_POSITION_MAX_M = TOLERANCES["double"]["dynamics_m"]
DEFECT_VELOCITY_MAX_MPS = TOLERANCES["double"]["dynamics_mps"]
#: Convergence, part 2: the fuel of the last two passes within this relative
#: difference (the plan has stopped moving). Chosen a hundred times inside
#: the 1e-4 relative fuel agreement issue 19 asks of the generated C.
FUEL_STEP_REL = 1e-6
#: Passes at most (the first, drag-free, included). Measured on the demo
#: booster (examples/demo_booster.toml, DEVELOPERS.md "Booster landings"):
#: see there for the passes the envelope takes; the cap leaves room above.
PASS_CAP = 15
#: Weight of ||nu||_1 (scaled units). The virtual control must cost more
#: than any multiplier of a dynamics row, so that it is zero whenever the
#: linearised problem can be met exactly (exact penalty; Mao et al. 2018);
#: measured: tests/test_scvx.py checks the multipliers of the first pass on
#: the demo booster are far below it.
W_VIRTUAL = 1e3
#: Weight of the squared step (scaled units), the penalised trust region of
#: Malyuta et al. (2022). Measured on the demo booster at N = 20 from
#: (100, 0, 3000) m, (-10, 0, -250) m/s, 30 t, at t_f = 20 s and 24 s
#: (DEVELOPERS.md, "Booster landings"): 1 and 0.1 crawl (fuel still falling
#: 0.3 kg a pass at the cap of 15), 1e-2 converges in 10 and 15 passes,
#: 1e-3 in 5 and 6, 1e-4 in 5 and 5; 1e-3 keeps a decade of damping.
W_TRUST = 1e-3
#: RK4 steps per interval for the discretisation and the defect. Measured:
#: at N = 50 on the demo booster the terminal state of the plan flown at 10
#: steps differs from scipy's solve_ivp at 1e-10 by far less than the defect
#: tolerances (tests/test_scvx.py).
RK4_STEPS = 10
#: A big number (scaled length) that switches off the final approach's
#: cone at nodes outside the approach: far above any scaled distance of a
#: plan (lengths are scaled by the largest envelope coordinate).
SWITCH_OFF = 100.0


@dataclass
class BoosterPlan(Trajectory):
    """A Trajectory with what the passes say (issue 19).

    ``convergence`` is one of CONVERGENCE_OUTCOMES; ``passes`` how many were
    solved; ``defect_position_m`` / ``defect_velocity_mps`` the largest
    interval defect under the nonlinear dynamics of the last pass's plan;
    ``predicted_*`` the terminal error of the plan flown open loop from the
    initial state under the nonlinear dynamics (RK4, ``RK4_STEPS`` per
    interval): what the vehicle would reach following it with no feedback.
    """

    convergence: str = ""
    passes: int = 0
    defect_position_m: float = math.nan
    defect_velocity_mps: float = math.nan
    predicted_position_error_m: np.ndarray = field(default_factory=lambda: np.full(3, math.nan))
    predicted_velocity_error_mps: np.ndarray = field(default_factory=lambda: np.full(3, math.nan))
    pad_position_m: np.ndarray = field(default_factory=lambda: np.zeros(3))
    pad_velocity_mps: np.ndarray = field(default_factory=lambda: np.zeros(3))
    fuel_by_pass_kg: list = field(default_factory=list)
    #: The plan flown open loop (scaled states, N+1 rows); not serialised.
    open_loop_states: np.ndarray = field(default_factory=lambda: np.zeros((0, 7)))

    def to_dict(self) -> dict:
        out = super().to_dict()

        def vec(a):
            a = np.asarray(a, float)
            return a.tolist() if np.all(np.isfinite(a)) else None

        def num(x):
            return None if not math.isfinite(x) else float(x)

        out.update({
            "convergence": self.convergence,
            "passes": self.passes,
            "defect_position_m": num(self.defect_position_m),
            "defect_velocity_mps": num(self.defect_velocity_mps),
            "predicted_position_error_m": vec(self.predicted_position_error_m),
            "predicted_velocity_error_mps": vec(self.predicted_velocity_error_mps),
            "pad_position_m": vec(self.pad_position_m),
            "pad_velocity_mps": vec(self.pad_velocity_mps),
            "fuel_by_pass_kg": [float(x) for x in self.fuel_by_pass_kg],
        })
        return out


class ScaledDynamics:
    """f(x, w) and its Jacobian in scaled units, vectorised over rows."""

    def __init__(self, vehicle, scaling: Scaling, constants: Constants, with_drag: bool = True):
        self.s, self.c = scaling, constants
        b = vehicle.booster
        self.drag = DragModel(b) if (with_drag and b is not None and b.has_drag) else None
        self.g = np.array([0.0, 0.0, constants.gravity_up])

    def rates(self, x, w, jacobian: bool):
        """dx/dt (n,7) and, with ``jacobian``, df/dx (n,7,7)."""
        n = x.shape[0]
        dx = np.zeros((n, 7))
        dx[:, 0:3] = x[:, 3:6]
        dx[:, 3:6] = w[:, 0:3] + self.g
        dx[:, 6] = -self.c.mass_flow * w[:, 3]
        jac = None
        if jacobian:
            jac = np.zeros((n, 7, 7))
            jac[:, 0:3, 3:6] = np.eye(3)
        if self.drag is not None:
            s = self.s
            up = x[:, 2] * s.length_m
            vel = x[:, 3:6] * s.speed_mps
            mass = np.exp(x[:, 6]) * s.mass_kg
            a, da_dh, da_dv, da_dm = self.drag.derivatives(up, vel, mass)
            dx[:, 3:6] += a / s.accel_mps2
            if jacobian:
                jac[:, 3:6, 2] = da_dh * (s.length_m / s.accel_mps2)
                jac[:, 3:6, 3:6] = da_dv * (s.speed_mps / s.accel_mps2)
                jac[:, 3:6, 6] = (da_dm * mass[:, None]) / s.accel_mps2
        return dx, jac

    def input_matrix(self):
        bm = np.zeros((7, 4))
        bm[3:6, 0:3] = np.eye(3)
        bm[6, 3] = -self.c.mass_flow
        return bm

    def flow(self, x0, w, dt, steps, jacobian: bool):
        """Integrate each row of x0 over dt under its held w (RK4, ``steps``
        steps). Returns x(dt) and, with ``jacobian``, Phi(dt) and S(dt)."""
        n = x0.shape[0]
        bm = self.input_matrix()
        h = dt / steps
        x = x0.copy()
        if not jacobian:
            for _ in range(steps):
                k1, _ = self.rates(x, w, False)
                k2, _ = self.rates(x + 0.5 * h * k1, w, False)
                k3, _ = self.rates(x + 0.5 * h * k2, w, False)
                k4, _ = self.rates(x + h * k3, w, False)
                x = x + (h / 6.0) * (k1 + 2 * k2 + 2 * k3 + k4)
            return x, None, None
        phi = np.tile(np.eye(7), (n, 1, 1))
        sm = np.zeros((n, 7, 4))

        def deriv(x, phi, sm):
            dx, jac = self.rates(x, w, True)
            return dx, jac @ phi, jac @ sm + bm

        for _ in range(steps):
            a1 = deriv(x, phi, sm)
            a2 = deriv(x + 0.5 * h * a1[0], phi + 0.5 * h * a1[1], sm + 0.5 * h * a1[2])
            a3 = deriv(x + 0.5 * h * a2[0], phi + 0.5 * h * a2[1], sm + 0.5 * h * a2[2])
            a4 = deriv(x + h * a3[0], phi + h * a3[1], sm + h * a3[2])
            x = x + (h / 6.0) * (a1[0] + 2 * a2[0] + 2 * a3[0] + a4[0])
            phi = phi + (h / 6.0) * (a1[1] + 2 * a2[1] + 2 * a3[1] + a4[1])
            sm = sm + (h / 6.0) * (a1[2] + 2 * a2[2] + 2 * a3[2] + a4[2])
        return x, phi, sm


