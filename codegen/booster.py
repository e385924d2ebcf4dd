"""Booster landings: the reference successive convexification, solved
with CVXPY and Clarabel (issue 19).

The method, its sources, the defaults and the outcomes are stated in
codegen/model/scvx.py; this module runs the passes: one DPP program per
(vehicle, horizon), the convergence loop at one time of flight, the
time-of-flight search over it, and the verdict of a converged plan.
"""

from __future__ import annotations

import math
import time
import warnings

import cvxpy as cp
import numpy as np

from codegen.errors import InputError
from codegen.model import tofsearch
from codegen.model.canonical import CLARABEL_TIGHT
from codegen.model.problem import Constants, Scaling, parameter_values, time_of_flight_bracket
from codegen.model.scvx import (CONVERGED, DEFECT_POSITION_MAX_M, DEFECT_VELOCITY_MAX_MPS,
                                FUEL_STEP_REL, NO_PLAN, PASS_CAP, PASS_CAP_REACHED, PASS_FAILED,
                                RK4_STEPS, SWITCH_OFF, W_TRUST, W_VIRTUAL, BoosterPlan,
                                ScaledDynamics)
from codegen.model.trajectory import (INPUT_REFUSED, ITERATIONS_EXHAUSTED, LIMITS_VIOLATED,
                                      SOLVER_BREAKDOWN, TARGET_MET, UNREACHABLE)
from codegen.model.verdict import CHECKS, check_plan
from codegen.reference import CLARABEL_RETRIES, validate_state


#: Columns of x whose rows of A_k are parameters (r_x and r_y enter nothing:
#: their columns of Phi are the unit vectors, constants of the program).
_STATE_COLS = (2, 3, 4, 5, 6)


class BoosterReference:
    """solve(state, pad) -> BoosterPlan, by successive convexification with
    CVXPY and Clarabel. One compiled program per (vehicle, horizon): each
    pass sets new parameter values (CVXPY's DPP), as the generated C will."""

    name = "reference-scvx"

    def __init__(self, vehicle, horizon: int, pass_cap: int = PASS_CAP,
                 solver_options: dict | None = None):
        if not isinstance(horizon, int) or isinstance(horizon, bool) or horizon < 2:
            raise InputError("horizon", horizon, "must be an integer >= 2")
        if isinstance(pass_cap, bool) or not isinstance(pass_cap, int) or pass_cap < 1:
            raise InputError("pass_cap", pass_cap, "must be an integer >= 1")
        self.vehicle = vehicle
        self.horizon = horizon
        self.pass_cap = pass_cap
        self.solver_options = dict(CLARABEL_TIGHT if solver_options is None else solver_options)
        from codegen.model import library_options
        from codegen.model.policy import PROBE_TOLERANCE
        #: A search's probes: the reference's probe tolerance, no retries.
        self.probe_options = library_options.clarabel(PROBE_TOLERANCE, iterations=200)
        self.scaling = Scaling.for_vehicle(vehicle)
        self.constants = Constants.of(vehicle, self.scaling)
        self.dynamics = ScaledDynamics(vehicle, self.scaling, self.constants)
        self.free_dynamics = ScaledDynamics(vehicle, self.scaling, self.constants,
                                            with_drag=False)
        b = vehicle.booster
        self.rate_limit = None if b is None else b.thrust_rate_max_nps
        self.approach = None if b is None else b.final_approach
        self._build()

    # -- the program ----------------------------------------------------------
    def _build(self):
        n, c = self.horizon, self.constants
        P = {}

        def par(name, shape, **kw):
            P[name] = cp.Parameter(shape, name=name, **kw)
            return P[name]

        X = cp.Variable((7, n + 1), name="x")
        U = cp.Variable((3, n), name="u")
        sig = cp.Variable(n, name="sigma")
        nu = cp.Variable((6, n), name="virtual_control")
        self.vars = {"x": X, "u": U, "sigma": sig, "nu": nu}
        W = cp.vstack([U, cp.reshape(sig, (1, n), order="F")])

        cons = [X[:, 0] == par("x0", 7)]
        for i in range(6):
            rhs = par(f"c{i}", n) + nu[i, :]
            if i < 2:
                rhs = rhs + X[i, :-1]
            for j in _STATE_COLS:
                rhs = rhs + cp.multiply(par(f"a{i}{j}", n), X[j, :-1])
            for l in range(3):
                rhs = rhs + cp.multiply(par(f"b{i}{l}", n), U[l, :])
            rhs = rhs + cp.multiply(par(f"b{i}3", n), sig)
            cons.append(X[i, 1:] == rhs)
        cons.append(X[6, 1:] == X[6, :-1] - par("adt", ()) * sig)

        z = X[6, :]
        cons += [cp.norm(U, 2, axis=0) <= sig]
        z_end = z[1:]
        a_lo = cp.multiply(par("s_lo", n), z_end) - par("c_lo", n)
        w_lo = sig - par("p_lo", n) + cp.multiply(par("mu_lo", n), z_end)
        cons += [cp.SOC(w_lo + 1.0, cp.vstack([2.0 * a_lo, w_lo - 1.0]), axis=0)]
        cons += [sig <= par("p_hi", n) - cp.multiply(par("mu_hi", n), z[:-1])]
        cons += [z[1:] >= par("zlo", n), z[1:] <= par("zhi", n), z[n] >= c.z_dry]
        if c.cos_pointing > -1.0:
            cons += [U[2, :] >= c.cos_pointing * sig]
        cons += [cp.SOC(np.full(n - 1, c.speed_max), X[3:6, 1:n], axis=0)]
        pad = par("pad", (3, n + 1))
        rel = X[0:3, :] - pad
        if c.tan_glide_slope > 0.0:
            cons += [cp.SOC(rel[2, :n], c.tan_glide_slope * rel[:2, :n], axis=0)]
        ap = self.approach
        if ap is not None and not math.isnan(ap.cone_half_angle_deg):
            tan_cone = math.tan(math.radians(ap.cone_half_angle_deg))
            cons += [cp.SOC(tan_cone * rel[2, 1:n] + par("cone_off", n - 1), rel[:2, 1:n], axis=0)]
        if ap is not None and not math.isnan(ap.altitude_min_m):
            cons += [rel[2, 1:n] >= par("height_min", n - 1)]
        if self.rate_limit is not None:
            thrust = cp.multiply(par("mass_ref", n), sig)
            step = par("rate_dt", ())
            cons += [thrust[1:] - thrust[:-1] <= step, thrust[:-1] - thrust[1:] <= step]
        cons += [X[0:3, n] == pad[:, n], X[3:6, n] == par("v_target", 3)]

        fuel = par("dt", ()) * cp.sum(sig)
        trust = par("w_trust", (), nonneg=True)
        objective = (fuel + W_VIRTUAL * cp.sum(cp.abs(nu))
                     + trust * (cp.sum_squares(X - par("x_ref", (7, n + 1)))
                                + cp.sum_squares(W - par("w_ref", (4, n)))))
        self.params = P
        self.fuel_expr = fuel
        self.dynamics_rows = cons[1:7]
        self.problem = cp.Problem(cp.Minimize(objective), cons)

    # -- one pass ---------------------------------------------------------------
    def _fixed_values(self, x0_si, tof, pad_p, pad_v):
        """Parameters that do not change between passes at one time of flight."""
        s, c, n = self.scaling, self.constants, self.horizon
        pos, vel, mass = x0_si
        base = parameter_values(c, s, n, pos, vel, mass, tof, pad_p, "target", 0.0, pad_v)
        dt = base["dt"][0]
        t = dt * np.arange(n + 1)
        vals = {k: base[k] for k in ("zlo", "zhi", "mu_lo", "mu_hi", "p_lo", "p_hi", "s_lo",
                                     "c_lo")}
        vals["adt"] = base["adt"][0]
        vals["dt"] = dt
        vals["x0"] = np.concatenate([base["r0"], base["v0"], base["z0"]])
        pad0 = np.asarray(pad_p, float) / s.length_m
        padv = np.asarray(pad_v, float) / s.speed_mps
        vals["pad"] = pad0[:, None] + padv[:, None] * t[None, :]
        vals["v_target"] = padv
        ap = self.approach
        in_approach = t >= tof / s.time_s - ap.duration_s / s.time_s - 1e-12 * (1 + t) \
            if ap is not None else None
        if "cone_off" in self.params:
            vals["cone_off"] = np.where(in_approach[1:n], 0.0, SWITCH_OFF)
        if "height_min" in self.params:
            vals["height_min"] = np.where(in_approach[1:n], -SWITCH_OFF,
                                          ap.altitude_min_m / s.length_m)
        if "rate_dt" in self.params:
            force = s.mass_kg * s.accel_mps2
            vals["rate_dt"] = self.rate_limit / (force / s.time_s) * dt
        return vals, dt

    def _linearise(self, dyn, x_ref, w_ref, dt):
        """(A_k, B_k, c_k) about (x_ref, w_ref), and the reference flow's ends."""
        x_end, phi, sm = dyn.flow(x_ref[:, :-1].T, w_ref.T, dt, RK4_STEPS, True)
        c = x_end - np.einsum("nij,nj->ni", phi, x_ref[:, :-1].T) \
            - np.einsum("nij,nj->ni", sm, w_ref.T)
        return phi, sm, c, x_end

    def _set_model(self, vals, phi, sm, c):
        for i in range(6):
            vals[f"c{i}"] = c[:, i]
            for j in _STATE_COLS:
                vals[f"a{i}{j}"] = phi[:, i, j]
            for l in range(4):
                vals[f"b{i}{l}"] = sm[:, i, l]

    def _solve(self, vals):
        """One pass's SOCP: at the tight tolerances, then, when those stall
        short ("almost solved"), the reference's own retries
        (codegen.reference.CLARABEL_RETRIES: 1e-8, 1e-7, then ECOS)."""
        for name, p in self.params.items():
            p.value = vals[name]
        status, msg, iters = self._solve_with("CLARABEL", self.solver_options)
        if self.solver_options is not self.probe_options:
            for label, solver, options in CLARABEL_RETRIES:
                if status != "failed":
                    break
                status, msg, more = self._solve_with(solver, options)
                iters += more
        return status, msg, iters

    def _solve_with(self, solver, options):
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", UserWarning)
                self.problem.solve(solver=solver, warm_start=False, **options)
        except cp.error.SolverError as exc:
            return "failed", str(exc), 0
        st = self.problem.solver_stats
        iters = int(st.num_iters or 0) if st is not None else 0
        if self.problem.status == cp.OPTIMAL:
            return "optimal", "", iters
        if self.problem.status == cp.INFEASIBLE:
            return "infeasible", "a pass is infeasible", iters
        return "failed", f"a pass ended {self.problem.status}", iters

    def _defects(self, x, w, dt):
        """Largest interval defect (m, m/s) of a plan under the full dynamics."""
        s = self.scaling
        x_end, _, _ = self.dynamics.flow(x[:, :-1].T, w.T, dt, RK4_STEPS, False)
        d = x_end - x[:, 1:].T
        return (float(np.max(np.linalg.norm(d[:, 0:3], axis=1))) * s.length_m,
                float(np.max(np.linalg.norm(d[:, 3:6], axis=1))) * s.speed_mps)

    def fly_open_loop(self, x_scaled0, w, dt):
        """The plan's controls flown from its first node under the full
        dynamics: the node states (N+1, 7), scaled."""
        out = [x_scaled0]
        x = x_scaled0[None, :]
        for k in range(w.shape[1]):
            x, _, _ = self.dynamics.flow(x, w[:, k][None, :], dt, RK4_STEPS, False)
            out.append(x[0])
        return np.array(out)

    # -- the passes at one time of flight ---------------------------------------
    def solve_fixed(self, position_m, velocity_mps, mass_kg, time_of_flight_s,
                    pad_position_m=(0.0, 0.0, 0.0), pad_velocity_mps=(0.0, 0.0, 0.0),
                    tolerance=None) -> BoosterPlan:
        """The successive convexification at one time of flight."""
        t0 = time.perf_counter()
        plan = BoosterPlan(status=INPUT_REFUSED, solver=self.name, horizon=self.horizon)
        try:
            validate_state(self.vehicle, position_m, velocity_mps, mass_kg, time_of_flight_s,
                           pad_position_m, pad_velocity_mps)
            if time_of_flight_s is None:
                raise InputError("time_of_flight_s", None, "must be given to solve_fixed")
        except InputError as exc:
            plan.message = str(exc)
            return plan
        options = self.solver_options if tolerance is None else tolerance
        saved, self.solver_options = self.solver_options, options
        try:
            return self._passes(plan, position_m, velocity_mps, mass_kg, float(time_of_flight_s),
                                pad_position_m, pad_velocity_mps, t0)
        finally:
            self.solver_options = saved

    def _passes(self, plan, position_m, velocity_mps, mass_kg, tof, pad_p, pad_v, t0):
        n, s = self.horizon, self.scaling
        vals, dt = self._fixed_values((position_m, velocity_mps, mass_kg), tof, pad_p, pad_v)
        plan.time_of_flight_s = tof
        plan.pad_position_m = np.asarray(pad_p, float)
        plan.pad_velocity_mps = np.asarray(pad_v, float)
        exact_model = not self.dynamics.drag and self.rate_limit is None
        # Pass 1: the drag-free program about a placeholder reference (the
        # drag-free model does not depend on it), no trust region.
        x_ref = np.zeros((7, n + 1))
        w_ref = np.zeros((4, n))
        phi, sm, c, _ = self._linearise(self.free_dynamics, x_ref, w_ref, dt)
        self._set_model(vals, phi, sm, c)
        vals["w_trust"] = 0.0
        vals["x_ref"], vals["w_ref"] = x_ref, w_ref
        if "mass_ref" in self.params:
            vals["mass_ref"] = np.exp(np.concatenate([vals["x0"][6:7], vals["zlo"][:n - 1]]))
        fuel_prev = math.nan
        iters_total = iters_max = 0
        outcome, x, w = PASS_CAP_REACHED, None, None
        for k in range(self.pass_cap):
            status, msg, iters = self._solve(vals)
            iters_total += iters
            iters_max = max(iters_max, iters)
            plan.passes = k + 1
            if status != "optimal":
                outcome = NO_PLAN if status == "infeasible" else PASS_FAILED
                plan.message = f"pass {k + 1}: {msg}"
                x = None
                break
            x = self.vars["x"].value
            w = np.vstack([self.vars["u"].value, self.vars["sigma"].value[None, :]])
            nu = self.vars["nu"].value
            fuel = float(s.mass_kg * (math.exp(x[6, 0]) - math.exp(x[6, n])))
            plan.fuel_by_pass_kg.append(fuel)
            dpos, dvel = self._defects(x, w, dt)
            plan.defect_position_m, plan.defect_velocity_mps = dpos, dvel
            feasible = dpos <= DEFECT_POSITION_MAX_M and dvel <= DEFECT_VELOCITY_MAX_MPS
            still = (k == 0 and exact_model) or \
                (k > 0 and abs(fuel - fuel_prev) <= FUEL_STEP_REL * abs(fuel))
            if feasible and still:
                outcome = CONVERGED
                break
            if still and float(np.max(np.abs(nu))) * s.length_m > DEFECT_POSITION_MAX_M:
                # Stationary, yet only virtual control meets the dynamics.
                outcome = NO_PLAN
                plan.message = (f"pass {k + 1}: the passes settled on a plan that needs "
                                f"virtual control (defect {dpos:.3g} m, {dvel:.3g} m/s)")
                break
            fuel_prev = fuel
            phi, sm, c, _ = self._linearise(self.dynamics, x, w, dt)
            self._set_model(vals, phi, sm, c)
            vals["w_trust"] = W_TRUST
            vals["x_ref"], vals["w_ref"] = x, w
            if "mass_ref" in self.params:
                vals["mass_ref"] = np.exp(x[6, :n])
        plan.convergence = outcome
        plan.iterations = iters_max
        plan.iterations_total = iters_total
        plan.iterations_max = iters_max
        plan.solves = plan.passes
        if outcome == PASS_CAP_REACHED:
            steps = np.abs(np.diff(plan.fuel_by_pass_kg))
            plan.message = (f"not converged in {plan.passes} passes: defect "
                            f"{plan.defect_position_m:.3g} m, {plan.defect_velocity_mps:.3g} m/s; "
                            f"last fuel step {steps[-1] if len(steps) else math.nan:.3g} kg")
        if x is not None:
            self._fill(plan, x, w, dt, vals)
        plan.status = {CONVERGED: TARGET_MET, PASS_CAP_REACHED: ITERATIONS_EXHAUSTED,
                       NO_PLAN: UNREACHABLE, PASS_FAILED: SOLVER_BREAKDOWN}[outcome]
        if outcome == CONVERGED:
            judge(self, plan)
            if not plan.verdict["flyable"]:
                plan.status = LIMITS_VIOLATED
                plan.message = f"plan breaks a real constraint: {plan.verdict_text}"
        plan.solve_time_s = time.perf_counter() - t0
        return plan

    def _fill(self, plan, x, w, dt, vals):
        s, n = self.scaling, self.horizon
        plan.t_s = np.linspace(0.0, plan.time_of_flight_s, n + 1)
        plan.position_m = x[0:3].T * s.length_m
        plan.velocity_mps = x[3:6].T * s.speed_mps
        plan.mass_kg = np.exp(x[6]) * s.mass_kg
        plan.accel_mps2 = w[0:3].T * s.accel_mps2
        plan.accel_slack_mps2 = w[3] * s.accel_mps2
        plan.thrust_n = plan.accel_mps2 * plan.mass_kg[:n, None]
        full = self.vehicle.thrust_max_n * math.cos(math.radians(self.vehicle.engine_cant_deg))
        plan.throttle = np.linalg.norm(plan.thrust_n, axis=1) / full
        plan.fuel_kg = float(plan.mass_kg[0] - plan.mass_kg[-1])
        plan.target_m = vals["pad"][:, n] * s.length_m
        plan.velocity_target_mps = vals["v_target"] * s.speed_mps
        plan.set_terminal_error(self.vehicle.touchdown)
        plan.objective = float(self.fuel_expr.value)
        plan.plan_mode = "target"
        plan.throttle_limit = self.vehicle.throttle_max
        flown = self.fly_open_loop(x[:, 0], w, dt)
        plan.predicted_position_error_m = flown[n, 0:3] * s.length_m - plan.target_m
        plan.predicted_velocity_error_mps = flown[n, 3:6] * s.speed_mps - plan.velocity_target_mps
        plan.open_loop_states = flown

    # -- the call: a searched or a given time of flight ---------------------------
    def solve(self, position_m, velocity_mps, mass_kg, time_of_flight_s=None,
              pad_position_m=(0.0, 0.0, 0.0), pad_velocity_mps=(0.0, 0.0, 0.0)) -> BoosterPlan:
        """Plan a landing. Without a time of flight, ``tofsearch.search``
        over (1e-3 t_max, t_max], t_max the rocket-equation bound of
        problem.time_of_flight_bracket (burning all the fuel at the lowest
        thrust; drag does not change it); its lower bound t_min assumes no
        drag, so it is not used. Each probe is a full successive
        convexification at the search's probe tolerance; only converged,
        flyable plans rank; the tight passes then run at the time found."""
        if time_of_flight_s is not None:
            return self.solve_fixed(position_m, velocity_mps, mass_kg, time_of_flight_s,
                                    pad_position_m, pad_velocity_mps)
        t0 = time.perf_counter()
        try:
            validate_state(self.vehicle, position_m, velocity_mps, mass_kg, None,
                           pad_position_m, pad_velocity_mps)
        except InputError as exc:
            return BoosterPlan(status=INPUT_REFUSED, solver=self.name, horizon=self.horizon,
                               message=str(exc))
        probe_options = self.probe_options
        spent = {"passes": 0, "iters": 0}

        def evaluate(t, mode):
            if mode != "target":
                # No merit phase: a booster plan either meets the pad or is none.
                return tofsearch.INFEASIBLE, math.inf, None
            tr = self.solve_fixed(position_m, velocity_mps, mass_kg, t, pad_position_m,
                                  pad_velocity_mps, tolerance=probe_options)
            spent["passes"] += tr.passes
            spent["iters"] += tr.iterations_total
            if tr.status == TARGET_MET:
                return tofsearch.SOLVED, tr.objective, tr
            if tr.convergence == NO_PLAN:
                return tofsearch.INFEASIBLE, math.inf, tr
            return tofsearch.FAILED, math.nan, tr

        _, hi = time_of_flight_bracket(self.vehicle, position_m, velocity_mps, mass_kg)
        found = tofsearch.search(evaluate, 1e-3 * hi, hi, reach=(1e-3 * hi, hi))
        if found.t_best is None:
            last = found.payload_best
            plan = BoosterPlan(status=UNREACHABLE, solver=self.name, horizon=self.horizon,
                               convergence=NO_PLAN,
                               message="no time of flight in the bracket gave a converged plan"
                                       + (f" (last probe: {last.message})" if last else ""))
        else:
            plan = self.solve_fixed(position_m, velocity_mps, mass_kg, found.t_best,
                                    pad_position_m, pad_velocity_mps)
        plan.iterations_total += spent["iters"]
        plan.solves = spent["passes"] + plan.passes
        plan.solve_time_s = time.perf_counter() - t0
        return plan


def judge(ref: BoosterReference, plan: BoosterPlan) -> None:
    """The real constraints of a converged plan, into ``plan.verdict``:
    every check of verdict.check_plan but its drag-free dynamics, which are
    replaced by the interval defects under the full dynamics; and the booster's own: thrust rate between consecutive intervals
    (at their starts, with the re-integrated masses) and the final approach."""
    v = ref.vehicle
    base = check_plan(v, plan.time_of_flight_s, plan.position_m, plan.velocity_mps, plan.mass_kg,
                      plan.accel_mps2, plan.accel_slack_mps2, plan.target_m,
                      plan.velocity_target_mps, meets_target=True)
    viol = dict(base.violations)
    tol = dict(base.tolerances)
    # Dynamics: each interval flown under its held controls from its own
    # first node (the defect). Flown open loop from the first node only, the
    # small defects of each interval add up and drag amplifies them; that
    # is the plan's predicted terminal error, reported beside the verdict.
    viol["dynamics_position_m"] = plan.defect_position_m
    viol["dynamics_velocity_mps"] = plan.defect_velocity_mps
    keys = {name: key for name, key in _CHECK_KEYS}
    n = plan.horizon
    dt = plan.time_of_flight_s / n
    if ref.rate_limit is not None:
        thrust = base.true_mass_kg[:n] * np.linalg.norm(plan.accel_mps2, axis=1)
        rate = np.max(np.abs(np.diff(thrust))) / dt if n > 1 else 0.0
        viol["thrust_rate_excess_rel"] = max(0.0, rate / ref.rate_limit - 1.0)
        keys["thrust_rate_excess_rel"] = "thrust_rel"
    ap = ref.approach
    if ap is not None:
        rel = plan.position_m - (plan.pad_position_m[None, :]
                                 + plan.pad_velocity_mps[None, :] * plan.t_s[:, None])
        inside = plan.t_s >= plan.time_of_flight_s - ap.duration_s - 1e-9
        if not math.isnan(ap.cone_half_angle_deg):
            tan_c = math.tan(math.radians(ap.cone_half_angle_deg))
            depth = np.linalg.norm(rel[:, :2], axis=1) - tan_c * rel[:, 2]
            viol["approach_cone_m"] = max(0.0, float(np.max(np.where(inside, depth, 0.0))))
        else:
            short = ap.altitude_min_m - rel[:, 2]
            short[0] = 0.0
            viol["approach_cone_m"] = max(0.0, float(np.max(np.where(inside, 0.0, short))))
        keys["approach_cone_m"] = "glide_slope_m"
    bad = [k for k, key in keys.items() if not viol.get(k, 0.0) <= tol[key]]
    worst = max(bad, key=lambda k: viol[k] / tol[keys[k]]) if bad else ""
    plan.verdict = {"flyable": not bad, "worst": worst,
                    "violations": {k: float(x) for k, x in viol.items()}}
    plan.verdict_text = "meets every constraint" if not bad else "; ".join(
        f"{k} {viol[k]:.3g} (tolerance {tol[keys[k]]:.1g})" for k in bad)


_CHECK_KEYS = tuple((name, key) for name, key, _ in CHECKS)
