/*
 * pdg_guidance.c: the guidance layer above the "native" solver.
 *
 * Validates the run-time inputs, computes every solver parameter from the
 * physical state (the mass bounds, exp(-z0) Taylor terms and dt terms of the
 * lossless convexification, Acikmese & Ploen 2007, and the terminal mode),
 * searches the time of flight when asked (two phases of a grid then Brent's
 * minimiser), runs the sequence of solves that gives a flyable plan, checks
 * every plan against the real constraints (pdg_verdict.c) and
 * converts the answer back to SI units with an honest status.
 *
 * This file mirrors codegen/model/problem.py (parameter_values,
 * reach_bracket), codegen/model/tofsearch.py (search) and codegen/reference.py
 * (the sequence of solves) of pdgc 0.1.0 line for line; the two are
 * checked against each other by `pdgc check`.
 * Generated; do not edit. NOT FLIGHT-QUALIFIED: see README.md.
 */
#include "pdg_guidance.h"

#include <math.h>
#include <stddef.h>

#define N_ 50

/* Scaling: SI value = scaled value * unit. */
static const double LENGTH_UNIT_M = 2000.0;
static const double TIME_UNIT_S = 16.46039919117932;
static const double MASS_UNIT_KG = 1900.0;
static const double SPEED_UNIT_MPS = 121.50373613488946;
static const double ACCEL_UNIT_MPS2 = 7.381578947368421;

/* Vehicle constants, scaled (see codegen/model/problem.py, Constants). */
static const double THRUST_LOWER = 0.29411764705882354;
static const double THRUST_UPPER = 1.0;
static const double MASS_FLOW = 0.05386927377136476;
static const double MASS_DRY = 0.7631578947368421;
static const double MASS_FLOOR_FRACTION = 0.001;

/* Vehicle constants, SI. */
static const double MASS_DRY_KG = 1450.0;
static const double MASS_WET_KG = 1900.0;
static const double THRUST_LOWER_N = 4125.0;
static const double THRUST_UPPER_N = 14025.0;
static const double THRUST_MAX_N = 16500.0;
static const double COS_CANT = 1.0;
static const double MASS_FLOW_PER_N = 0.00044335487520779493;
static const double THROTTLE_MIN = 0.25;
static const double THROTTLE_MAX = 0.85;
static const double GRAVITY_UP_MPS2 = -3.7114;
static const double SPEED_MAX_MPS = 110.0;

/* Terminal error weights, SI (problem.terminal_error_weights in SI). */
static const double ERROR_WEIGHT[6] = { 0.01, 0.01, 0.01, 1.0, 1.0, 0.5 };

/* Modes (codegen/model/problem.py, parameter_values). */
static const double MERIT_ERROR_WEIGHT = 10.0;
static const double LEAST_ERROR_FUEL_WEIGHT = 0.001;
static const double ERROR_BOUND_FREE = 1000000.0;

/* The sequence of solves (codegen/reference.py). */
static const double ERROR_SLACK_REL[3] = { 0.001, 0.03, 0.3 };
#define ERROR_SLACKS 3
static const double ERROR_SLACK_ABS = 0.001;
static const int NEARBY_TOF_STEPS[6] = { 4, -4, 10, -10, 20, 40 };
#define NEARBY_STEPS 6
static const double MERIT_MEETS_TARGET = 0.0001;

/* Time-of-flight search (codegen/model/tofsearch.py). */
#define GRID_POINTS 9
#define BRENT_MAX_STEPS 40
#define RETRY_BUDGET 4
static const double RETRY_SHIFT = 0.125;
static const double GOLDEN_STEP = 0.3819660112501051;

/* Outcomes of one solve, as the search sees them. */
#define SOLVE_CONVERGED 0
#define SOLVE_INFEASIBLE 1

/* Offsets of the parameters in the flat parameter vector. */
#define P_R0 0
#define P_V0 3
#define P_Z0 6
#define P_TARGET 7
#define P_DT 10
#define P_DT2H 11
#define P_ADT 12
#define P_ZLO 13
#define P_ZHI 63
#define P_MU_LO 113
#define P_MU_HI 163
#define P_P_LO 213
#define P_P_HI 263
#define P_S_LO 313
#define P_C_LO 363
#define P_V_TARGET 413
#define P_KAPPA 416
#define P_W_FUEL_DT 417
#define P_W_ERR 418
#define P_ERR_MAX 419

void pdg_guidance_config_init(pdg_guidance_config *settings)
{
    settings->iterations_per_solve_max = 100;
    settings->tof_tolerance_s = 0.05;
    settings->iterations_per_call_max = 0;
    settings->reserve_throttle_max = 0.0;
    settings->reserve_steps = 4;
    settings->allow_terminal_error = 1;
}

const char *pdg_status_name(pdg_status status)
{
    switch (status) {
    case PDG_TARGET_MET: return "target_met";
    case PDG_UNREACHABLE: return "unreachable";
    case PDG_ITERATIONS_EXHAUSTED: return "iterations_exhausted";
    case PDG_SOLVER_BREAKDOWN: return "solver_breakdown";
    case PDG_INPUT_REFUSED: return "input_refused";
    case PDG_BEST_REACHABLE: return "best_reachable";
    case PDG_LIMITS_VIOLATED: return "limits_violated";
    default: return "unknown";
    }
}

static int finite_vec(const double *v, int n)
{
    int i;
    for (i = 0; i < n; i++) {
        if (!isfinite(v[i])) {
            return 0;
        }
    }
    return 1;
}

static int input_ok(const pdg_input *in, const pdg_guidance_config *s)
{
    if (!finite_vec(in->position_m, 3) || !finite_vec(in->velocity_mps, 3) ||
        !finite_vec(in->target_m, 3) || !finite_vec(in->velocity_target_mps, 3) ||
        !isfinite(in->mass_kg) || !isfinite(in->time_of_flight_s) ||
        !isfinite(in->throttle_max)) {
        return 0;
    }
    if (!(in->mass_kg > MASS_DRY_KG && in->mass_kg <= MASS_WET_KG)) {
        return 0;
    }
    if (in->time_of_flight_s < 0.0) {
        return 0;
    }
    if (in->throttle_max != 0.0 && !(in->throttle_max >= THROTTLE_MIN && in->throttle_max <= 1.0)) {
        return 0;
    }
    if (s->iterations_per_solve_max < 1 || s->iterations_per_solve_max > 200) {
        return 0;
    }
    if (!isfinite(s->tof_tolerance_s) || !(s->tof_tolerance_s > 0.0)) {
        return 0;
    }
    if (s->iterations_per_call_max < 0) {
        return 0;
    }
    if (!isfinite(s->reserve_throttle_max) ||
        (s->reserve_throttle_max != 0.0 &&
         !(s->reserve_throttle_max >= THROTTLE_MIN && s->reserve_throttle_max <= 1.0))) {
        return 0;
    }
    if (s->reserve_steps < 0 || s->reserve_steps > 12) {
        return 0;
    }
    if (s->allow_terminal_error != 0 && s->allow_terminal_error != 1) {
        return 0;
    }
    return 1;
}

/* Net upper thrust bound (N) at a throttle limit (problem.thrust_upper_n). */
static double thrust_upper_n(double limit)
{
    return limit == THROTTLE_MAX ? THRUST_UPPER_N : limit * THRUST_MAX_N * COS_CANT;
}

/* Physical inputs -> scaled parameters (mirror of problem.parameter_values). */
static void compute_params(const pdg_input *in, double tof_s, int mode, double err_max,
                           double limit, double *p)
{
    const double rho2 = limit == THROTTLE_MAX ? THRUST_UPPER : limit * THRUST_UPPER / THROTTLE_MAX;
    const double m0 = in->mass_kg / MASS_UNIT_KG;
    const double tf = tof_s / TIME_UNIT_S;
    const double dt = tf / (double)N_;
    const double floor_mass = MASS_DRY * MASS_FLOOR_FRACTION;
    double kappa = 1.0;
    double w_fuel = 1.0;
    double w_err = 0.0;
    double e_max = err_max;
    int i;
    int k;
    for (i = 0; i < 3; i++) {
        p[P_R0 + i] = in->position_m[i] / LENGTH_UNIT_M;
        p[P_V0 + i] = in->velocity_mps[i] / SPEED_UNIT_MPS;
        p[P_TARGET + i] = in->target_m[i] / LENGTH_UNIT_M;
        p[P_V_TARGET + i] = in->velocity_target_mps[i] / SPEED_UNIT_MPS;
    }
    p[P_Z0] = log(m0);
    p[P_DT] = dt;
    p[P_DT2H] = dt * dt / 2.0;
    p[P_ADT] = MASS_FLOW * dt;
    for (k = 0; k <= N_; k++) {
        const double t = dt * (double)k;
        double m_lo = m0 - MASS_FLOW * rho2 * t;
        double m_hi = m0 - MASS_FLOW * THRUST_LOWER * t;
        double z_lo;
        if (m_lo < MASS_DRY) {
            m_lo = MASS_DRY;
        }
        if (m_hi < floor_mass) {
            m_hi = floor_mass;
        }
        z_lo = (k == 0) ? log(m0) : log(m_lo);
        if (k >= 1) {
            /* Node k is the end of interval k - 1: the lower thrust bound's Taylor point. */
            const double mu_lo = THRUST_LOWER * exp(-z_lo);
            const double s_lo = sqrt(mu_lo / 2.0);
            p[P_ZLO + k - 1] = z_lo;
            p[P_ZHI + k - 1] = log(m_hi);
            p[P_MU_LO + k - 1] = mu_lo;
            p[P_P_LO + k - 1] = mu_lo * (1.0 + z_lo);
            p[P_S_LO + k - 1] = s_lo;
            p[P_C_LO + k - 1] = s_lo * z_lo;
        }
        if (k < N_) {
            /* Node k is the start of interval k: the upper bound's Taylor point. */
            const double mu_hi = rho2 * exp(-z_lo);
            p[P_MU_HI + k] = mu_hi;
            p[P_P_HI + k] = mu_hi * (1.0 + z_lo);
        }
    }
    if (mode == PDG_MODE_TARGET) {
        kappa = 0.0;
        e_max = 1.0;
    } else if (mode == PDG_MODE_MERIT) {
        w_err = MERIT_ERROR_WEIGHT;
        e_max = ERROR_BOUND_FREE;
    } else if (mode == PDG_MODE_LEAST_ERROR) {
        w_fuel = LEAST_ERROR_FUEL_WEIGHT;
        w_err = 1.0;
        e_max = ERROR_BOUND_FREE;
    }
    p[P_KAPPA] = kappa;
    p[P_W_FUEL_DT] = w_fuel * dt;
    p[P_W_ERR] = w_err;
    p[P_ERR_MAX] = e_max;
}

/* The weighted terminal error of a solution
 * (Trajectory.set_terminal_error). */
static double terminal_error(const pdg_solution *x, const pdg_input *in)
{
    double sum = 0.0;
    int i;
    for (i = 0; i < 3; i++) {
        const double er = (x->r[3 * N_ + i] * LENGTH_UNIT_M - in->target_m[i]) * ERROR_WEIGHT[i];
        sum += er * er;
    }
    for (i = 0; i < 3; i++) {
        const double ev = (x->v[3 * N_ + i] * SPEED_UNIT_MPS - in->velocity_target_mps[i]) *
                          ERROR_WEIGHT[3 + i];
        sum += ev * ev;
    }
    return sqrt(sum);
}

/* One solve; its solution goes to w->current when it converged. `probe`:
 * at the search's loose tolerance, its cap keeping one full solve's
 * iterations for the final solve when the call has a budget. Returns the
 * guidance status of the solve (OPTIMAL when it converged). */
static int solve_once(pdg_workspace *w, const pdg_input *in, double tof_s,
                      int mode, double err_max, double limit, int probe,
                      const pdg_guidance_config *s)
{
    double objective = 0.0;
    int iterations = 0;
    int cap = s->iterations_per_solve_max;
    int status;
    if (s->iterations_per_call_max > 0) {
        const int left = s->iterations_per_call_max - w->iterations_total;
        const int room = probe ? left - s->iterations_per_solve_max : left;
        if (room < cap) {
            cap = room;
        }
        if (cap < 1) {
            w->budget_exhausted = 1;
            w->last_status = PDG_ITERATIONS_EXHAUSTED;
            return PDG_ITERATIONS_EXHAUSTED;
        }
    }
    compute_params(in, tof_s, mode, err_max, limit, w->params);
    status = pdg_backend_solve(&w->backend, w->params, cap, probe, &objective,
                                      &iterations);
    w->solves += 1;
    w->iterations_total += iterations;
    if (iterations > w->iterations_max) {
        w->iterations_max = iterations;
    }
    w->last_status = status;
    w->last_iterations = iterations;
    if (status == PDG_TARGET_MET && isfinite(objective)) {
        pdg_solution *x = &w->current;
        pdg_backend_solution(&w->backend, x->r, x->v, x->z, x->u, x->sigma,
                                    &x->error_norm);
        x->objective = objective;
        x->tof = tof_s;
        x->limit = limit;
        x->iterations = iterations;
        x->mode = mode;
        return PDG_TARGET_MET;
    }
    return status == PDG_TARGET_MET ? PDG_SOLVER_BREAKDOWN : status;
}

/* ---- the time-of-flight search (mirror of tofsearch.search) -------------- */

static int target_possible(const pdg_input *in, double tof_s);

/* One evaluation: the cost when solved, INFINITY when proven infeasible
 * (by a solve, or without one when target_possible rules a target probe
 * out), NAN when failed; keeps the phase's best point. */
static double evaluate(pdg_workspace *w, const pdg_input *in, double t,
                       int mode, double limit, const pdg_guidance_config *s)
{
    int status;
    if (mode == PDG_MODE_TARGET && !target_possible(in, t)) {
        return INFINITY;    /* more delta-v than the propellant gives: no solve */
    }
    status = solve_once(w, in, t, mode, 0.0, limit, 1, s);
    if (status == PDG_TARGET_MET) {
        const double cost = w->current.objective;
        if (cost < w->best_cost) {
            w->best_cost = cost;
            w->best_t = t;
            w->best_error = terminal_error(&w->current, in);
        }
        return cost;
    }
    if (status == PDG_UNREACHABLE) {
        return INFINITY;
    }
    return NAN;
}

/* One probe: an evaluation, retried once at a time shifted by RETRY_SHIFT *
 * tolerance when it failed, while the call's RETRY_BUDGET lasts; ranked:
 * anything but a solved probe is INFINITY. */
static double probe(pdg_workspace *w, const pdg_input *in, double t, int mode,
                    double lo, double hi, double limit, const pdg_guidance_config *s)
{
    double value = evaluate(w, in, t, mode, limit, s);
    const double shift = RETRY_SHIFT * s->tof_tolerance_s;
    double t_retry = t + shift;
    if (t_retry > hi) {
        t_retry = t - shift;
    }
    if (isnan(value) && w->retries < RETRY_BUDGET && t_retry >= lo) {
        w->retries += 1;
        value = evaluate(w, in, t_retry, mode, limit, s);
    }
    return isnan(value) ? INFINITY : value;
}

/* Brent's minimiser on [a, b] from x (value fx, finite): mirror of
 * tofsearch._brent. At most BRENT_MAX_STEPS probes. */
static void brent(pdg_workspace *w, const pdg_input *in, int mode, double lo,
                  double hi, double limit, double a, double b, double x, double fx,
                  const pdg_guidance_config *s)
{
    const double step_min = s->tof_tolerance_s / 4.0;
    double v = x;
    double wx = x;
    double fv = fx;
    double fw = fx;
    double d = 0.0;
    double e = 0.0;
    int step;
    for (step = 0; step < BRENT_MAX_STEPS; step++) {
        const double m = 0.5 * (a + b);
        int parabolic = 0;
        double u;
        double fu;
        if (fabs(x - m) <= 2.0 * step_min - 0.5 * (b - a)) {
            break;
        }
        if (fabs(e) > step_min && isfinite(fw) && isfinite(fv)) {
            /* Minimum of the parabola through (v, fv), (w, fw), (x, fx): x + p / q. */
            double r = (x - wx) * (fx - fv);
            double q = (x - v) * (fx - fw);
            double p = (x - v) * q - (x - wx) * r;
            double e_prev;
            q = 2.0 * (q - r);
            if (q > 0.0) {
                p = -p;
            }
            q = fabs(q);
            e_prev = e;
            if (fabs(p) < fabs(0.5 * q * e_prev) && p > q * (a - x) && p < q * (b - x)) {
                e = d;
                d = p / q;
                if ((x + d) - a < 2.0 * step_min || b - (x + d) < 2.0 * step_min) {
                    d = m >= x ? step_min : -step_min;
                }
                parabolic = 1;
            }
        }
        if (!parabolic) {
            e = x >= m ? (a - x) : (b - x);
            d = GOLDEN_STEP * e;
        }
        if (fabs(d) >= step_min) {
            u = x + d;
        } else {
            u = x + (d > 0.0 ? step_min : -step_min);
        }
        fu = probe(w, in, u, mode, lo, hi, limit, s);
        if (fu <= fx) {
            if (u >= x) {
                a = x;
            } else {
                b = x;
            }
            v = wx;
            fv = fw;
            wx = x;
            fw = fx;
            x = u;
            fx = fu;
        } else {
            if (u < x) {
                a = u;
            } else {
                b = u;
            }
            if (fu <= fw || wx == x) {
                v = wx;
                fv = fw;
                wx = u;
                fw = fu;
            } else if (fu <= fv || v == x || v == wx) {
                v = u;
                fv = fu;
            }
        }
    }
}

/* One phase of the search over [lo, hi]: a grid, then Brent's minimiser
 * around its best point. Returns 1 when a probe solved (w->best_*). */
static int search_phase(pdg_workspace *w, const pdg_input *in, int mode,
                        double lo, double hi, double limit, const pdg_guidance_config *s)
{
    double *times = w->search_t;
    double *costs = w->search_c;
    int best_i = 0;
    int i;
    w->best_cost = INFINITY;
    w->best_t = 0.0;
    w->best_error = INFINITY;
    for (i = 0; i < GRID_POINTS; i++) {
        times[i] = lo + (hi - lo) * (double)i / (double)(GRID_POINTS - 1);
    }
    for (i = 0; i < GRID_POINTS; i++) {
        costs[i] = probe(w, in, times[i], mode, lo, hi, limit, s);
    }
    if (!isfinite(w->best_cost)) {
        return 0;
    }
    for (i = 1; i < GRID_POINTS; i++) {
        if (costs[i] < costs[best_i]) {
            best_i = i;
        }
    }
    brent(w, in, mode, lo, hi, limit, times[best_i > 0 ? best_i - 1 : 0],
          times[best_i < GRID_POINTS - 1 ? best_i + 1 : GRID_POINTS - 1], times[best_i],
          costs[best_i], s);
    return 1;
}

/* ---- bracket and reach (mirror of problem.time_of_flight_bracket, reach_bracket) */

/* {t : a t^2 + b t + c <= 0} as [*lo, *hi] (infinite ends allowed); 0 when empty. */
static int quadratic_below(double a, double b, double c, double *lo, double *hi)
{
    double disc;
    double q;
    double r1;
    double r2;
    if (a == 0.0) {
        if (b == 0.0) {
            *lo = -INFINITY;
            *hi = INFINITY;
            return c <= 0.0;
        }
        if (b > 0.0) {
            *lo = -INFINITY;
            *hi = -c / b;
        } else {
            *lo = -c / b;
            *hi = INFINITY;
        }
        return 1;
    }
    disc = b * b - 4.0 * a * c;
    if (disc < 0.0) {
        *lo = -INFINITY;
        *hi = INFINITY;
        return a <= 0.0;
    }
    q = sqrt(disc);
    r1 = (-b - q) / (2.0 * a);
    r2 = (-b + q) / (2.0 * a);
    if (r2 < r1) {
        const double t = r1;
        r1 = r2;
        r2 = t;
    }
    if (a > 0.0) {
        *lo = r1;
        *hi = r2;
    } else if (r1 <= 0.0) {
        *lo = r2;
        *hi = INFINITY;
    } else {
        *lo = r1;
        *hi = r2;
    }
    return 1;
}

/* sqrt(x^2 + y^2 + z^2) in problem._norm3's order. */
static double norm3(double x, double y, double z)
{
    return sqrt(x * x + y * y + z * z);
}

/* Shortest time of flight the speed limit allows (problem.speed_lower_bound). */
static double speed_lower_bound(const pdg_input *in)
{
    const double dist = norm3(in->target_m[0] - in->position_m[0],
                              in->target_m[1] - in->position_m[1],
                              in->target_m[2] - in->position_m[2]);
    const double speeds = norm3(in->velocity_mps[0], in->velocity_mps[1], in->velocity_mps[2]) +
                          2.0 * (double)(N_ - 1) * SPEED_MAX_MPS +
                          norm3(in->velocity_target_mps[0], in->velocity_target_mps[1],
                                in->velocity_target_mps[2]);
    return 2.0 * (double)N_ * dist / speeds;
}

/* The part of [t_lo, t_hi] where the target can be met at all; 0 when none. */
static int reach_bracket(const pdg_input *in, double limit, double t_lo, double t_hi,
                         double *lo, double *hi)
{
    const double reach = (1.0 / MASS_FLOW_PER_N) * log(in->mass_kg / MASS_DRY_KG);
    const double accel = thrust_upper_n(limit) / MASS_DRY_KG;
    const double g[3] = { 0.0, 0.0, GRAVITY_UP_MPS2 };
    double a[3];
    double gg;
    double ag;
    double aa;
    double lo1;
    double hi1;
    double lo2;
    double hi2;
    int i;
    for (i = 0; i < 3; i++) {
        a[i] = in->velocity_target_mps[i] - in->velocity_mps[i];
    }
    gg = g[0] * g[0] + g[1] * g[1] + g[2] * g[2];
    ag = a[0] * g[0] + a[1] * g[1] + a[2] * g[2];
    aa = a[0] * a[0] + a[1] * a[1] + a[2] * a[2];
    if (!quadratic_below(gg, -2.0 * ag, aa - reach * reach, &lo1, &hi1) ||
        !quadratic_below(gg - accel * accel, -2.0 * ag, aa, &lo2, &hi2)) {
        return 0;
    }
    *lo = fmax(t_lo, fmax(lo1, lo2));
    *hi = fmin(t_hi, fmin(hi1, hi2));
    *lo = fmax(*lo, speed_lower_bound(in));
    return *lo <= *hi;
}

/* Least delta-v of any plan that meets the target at tof_s, thrust limits
 * aside (mirror of problem.impulse_delta_v); 1 when the propellant covers it
 * (problem.target_possible), 0 when the target cannot be met at tof_s. */
static int target_possible(const pdg_input *in, double tof_s)
{
    const double budget = (1.0 / MASS_FLOW_PER_N) * log(in->mass_kg / MASS_DRY_KG);
    const double g[3] = { 0.0, 0.0, GRAVITY_UP_MPS2 };
    const double t = tof_s;
    const double dt = t / (double)N_;
    const double span = dt * (double)(N_ - 1);
    double a[3];
    double b[3];
    double first[3];
    double last[3];
    int i;
    for (i = 0; i < 3; i++) {
        const double v0 = in->velocity_mps[i];
        a[i] = in->velocity_target_mps[i] - v0 - g[i] * t;
        b[i] = in->target_m[i] - in->position_m[i] - v0 * t - 0.5 * g[i] * t * t;
    }
    for (i = 0; i < 3; i++) {
        first[i] = (b[i] - 0.5 * dt * a[i]) / span;
    }
    for (i = 0; i < 3; i++) {
        last[i] = a[i] - first[i];
    }
    return norm3(first[0], first[1], first[2]) + norm3(last[0], last[1], last[2]) <= budget;
}

/* ---- the plan ------------------------------------------------------------ */

/* A scaled solution into the caller's plan, in SI units, with its terminal
 * error; then its check against the real constraints. Returns 1 if flyable. */
static int fill_and_check(const pdg_solution *x, const pdg_input *in,
                          int meets_target, pdg_plan *plan)
{
    pdg_plan_view view;
    const double tof = x->tof;
    int i;
    int k;
    for (k = 0; k <= N_; k++) {
        plan->t_s[k] = tof * (double)k / (double)N_;
        for (i = 0; i < 3; i++) {
            plan->position_m[k][i] = x->r[i + 3 * k] * LENGTH_UNIT_M;
            plan->velocity_mps[k][i] = x->v[i + 3 * k] * SPEED_UNIT_MPS;
        }
        plan->mass_kg[k] = exp(x->z[k]) * MASS_UNIT_KG;
    }
    for (k = 0; k < N_; k++) {
        for (i = 0; i < 3; i++) {
            plan->accel_mps2[k][i] = x->u[i + 3 * k] * ACCEL_UNIT_MPS2;
            plan->thrust_n[k][i] = plan->accel_mps2[k][i] * plan->mass_kg[k];
        }
        plan->accel_slack_mps2[k] = x->sigma[k] * ACCEL_UNIT_MPS2;
    }
    for (i = 0; i < 3; i++) {
        plan->terminal_position_error_m[i] = plan->position_m[N_][i] - in->target_m[i];
        plan->terminal_velocity_error_mps[i] = plan->velocity_mps[N_][i] - in->velocity_target_mps[i];
    }
    plan->terminal_error = terminal_error(x, in);
    plan->time_of_flight_s = tof;
    plan->fuel_kg = plan->mass_kg[0] - plan->mass_kg[N_];
    plan->landing_miss_m = hypot(plan->terminal_position_error_m[0],
                                 plan->terminal_position_error_m[1]);
    plan->objective = x->objective;
    plan->iterations = x->iterations;
    plan->mode = (pdg_mode)x->mode;
    plan->throttle_limit = x->limit;
    view.time_of_flight_s = tof;
    view.position_m = (const double (*)[3])plan->position_m;
    view.velocity_mps = (const double (*)[3])plan->velocity_mps;
    view.mass_kg = plan->mass_kg;
    view.accel_mps2 = (const double (*)[3])plan->accel_mps2;
    view.accel_slack_mps2 = plan->accel_slack_mps2;
    view.target_m = in->target_m;
    view.velocity_target_mps = in->velocity_target_mps;
    view.thrust_upper_n = thrust_upper_n(x->limit);
    view.meets_target = meets_target;
    return pdg_check_plan(&view, plan->violation, &plan->worst_check);
}

static void clear_plan(pdg_plan *plan, double tof)
{
    int i;
    int k;
    for (k = 0; k <= N_; k++) {
        plan->t_s[k] = 0.0;
        plan->mass_kg[k] = 0.0;
        for (i = 0; i < 3; i++) {
            plan->position_m[k][i] = 0.0;
            plan->velocity_mps[k][i] = 0.0;
        }
    }
    for (k = 0; k < N_; k++) {
        plan->accel_slack_mps2[k] = 0.0;
        for (i = 0; i < 3; i++) {
            plan->thrust_n[k][i] = 0.0;
            plan->accel_mps2[k][i] = 0.0;
        }
    }
    for (i = 0; i < 3; i++) {
        plan->terminal_position_error_m[i] = NAN;
        plan->terminal_velocity_error_mps[i] = NAN;
    }
    for (k = 0; k < PDG_NUM_CHECKS; k++) {
        plan->violation[k] = 0.0;
    }
    plan->worst_check = -1;
    plan->terminal_error = NAN;
    plan->time_of_flight_s = tof;
    plan->fuel_kg = NAN;
    plan->landing_miss_m = NAN;
    plan->objective = NAN;
    plan->mode = PDG_MODE_TARGET;
    plan->throttle_limit = NAN;
}

/* Bookkeeping of the final solves: the first converged one (for
 * LIMITS_VIOLATED) and the first failure that is not a proof of infeasibility. */
static void note(int status, pdg_workspace *w, int *first_failure)
{
    if (status == PDG_TARGET_MET) {
        if (!w->have_first) {
            w->first = w->current;
            w->have_first = 1;
        }
    } else if (status != PDG_UNREACHABLE && *first_failure < 0) {
        *first_failure = status;
    }
}

/* The tight solves at one time of flight (mirror of ReferenceSolver._finish):
 * the target at the planning limit (when allowed by the rocket equation);
 * with a reserve, the target at its limit, then bisection for the lowest
 * limit that meets it; then the least error and the least fuel at that
 * error. Returns the status, with the plan filled. */
static pdg_status finish(pdg_workspace *w, const pdg_input *in,
                                   double tof, int try_target, double planning, double reserve,
                                   int nearby, const pdg_guidance_config *s,
                                   pdg_plan *plan)
{
    int first_failure = -1;
    int tried = 0;
    double limit = planning;
    int status;
    w->have_first = 0;
    if (try_target) {
        tried = 1;
        status = solve_once(w, in, tof, PDG_MODE_TARGET, 0.0, planning, 0, s);
        if (status == PDG_TARGET_MET && fill_and_check(&w->current, in, 1, plan)) {
            return PDG_TARGET_MET;
        }
        note(status, w, &first_failure);
        if (status == PDG_TARGET_MET && nearby) {
            /* Converged but not flyable (the relaxation not tight here): the
             * target at nearby times of flight (policy.NEARBY_TOF_STEPS). */
            int j;
            for (j = 0; j < NEARBY_STEPS; j++) {
                const double t = tof + (double)NEARBY_TOF_STEPS[j] * s->tof_tolerance_s;
                if (t <= 0.0) {
                    continue;
                }
                status = solve_once(w, in, t, PDG_MODE_TARGET, 0.0, planning, 0, s);
                if (status == PDG_TARGET_MET && fill_and_check(&w->current, in, 1, plan)) {
                    return PDG_TARGET_MET;
                }
            }
        }
    }
    if (reserve > planning) {
        limit = reserve;
        tried = 1;
        status = solve_once(w, in, tof, PDG_MODE_TARGET, 0.0, reserve, 0, s);
        if (status == PDG_TARGET_MET && fill_and_check(&w->current, in, 1, plan)) {
            double lo = planning;
            double hi = reserve;
            int step;
            w->kept = w->current;
            for (step = 0; step < s->reserve_steps; step++) {
                const double mid = 0.5 * (lo + hi);
                status = solve_once(w, in, tof, PDG_MODE_TARGET, 0.0, mid, 0, s);
                if (status == PDG_TARGET_MET && fill_and_check(&w->current, in, 1, plan)) {
                    hi = mid;
                    w->kept = w->current;
                } else {
                    lo = mid;
                }
            }
            (void)fill_and_check(&w->kept, in, 1, plan);
            return PDG_TARGET_MET;
        }
        note(status, w, &first_failure);
    }
    if (s->allow_terminal_error) {
        tried = 1;
        status = solve_once(w, in, tof, PDG_MODE_LEAST_ERROR, 0.0, limit, 0, s);
        note(status, w, &first_failure);
        if (status == PDG_TARGET_MET) {
            int j;
            w->kept = w->current;                 /* the least-error plan, judged last */
            for (j = 0; j < ERROR_SLACKS; j++) {
                const double bound = terminal_error(&w->kept, in) * (1.0 + ERROR_SLACK_REL[j]) +
                                     ERROR_SLACK_ABS;
                status = solve_once(w, in, tof, PDG_MODE_FUEL_AT_ERROR, bound, limit, 0, s);
                note(status, w, &first_failure);
                if (status != PDG_TARGET_MET) {
                    break;
                }
                if (fill_and_check(&w->current, in, 0, plan)) {
                    return PDG_BEST_REACHABLE;
                }
            }
            if (fill_and_check(&w->kept, in, 0, plan)) {
                return PDG_BEST_REACHABLE;
            }
        }
    }
    if (w->have_first) {
        (void)fill_and_check(&w->first, in, w->first.mode == PDG_MODE_TARGET, plan);
        return PDG_LIMITS_VIOLATED;
    }
    clear_plan(plan, tof);
    plan->iterations = w->last_iterations;
    if (first_failure >= 0) {
        return (pdg_status)first_failure;
    }
    if (!tried) {
        return PDG_UNREACHABLE;   /* ruled out by the rocket equation, nothing allowed */
    }
    return (pdg_status)w->last_status;
}

pdg_status pdg_plan_descent(pdg_workspace *work,
    const pdg_input *input, const pdg_guidance_config *settings,
    pdg_plan *plan)
{
    pdg_guidance_config defaults;
    const pdg_guidance_config *s = settings;
    pdg_status status;
    double planning;
    double t_lo;
    double t_hi;
    double r_lo = 0.0;
    double r_hi = 0.0;
    if (work == NULL || input == NULL || plan == NULL) {
        return PDG_INPUT_REFUSED;
    }
    if (s == NULL) {
        pdg_guidance_config_init(&defaults);
        s = &defaults;
    }
    if (!input_ok(input, s)) {
        return PDG_INPUT_REFUSED;
    }
    planning = input->throttle_max == 0.0 ? THROTTLE_MAX : input->throttle_max;
    work->iterations_total = 0;
    work->iterations_max = 0;
    work->solves = 0;
    work->retries = 0;
    work->budget_exhausted = 0;
    work->have_first = 0;
    work->last_status = PDG_SOLVER_BREAKDOWN;
    work->last_iterations = 0;
    {
        /* Bracket of Acikmese & Ploen (2007), with the current mass. */
        const double fuel = input->mass_kg - MASS_DRY_KG;
        const double speed = sqrt(input->velocity_mps[0] * input->velocity_mps[0] +
                                  input->velocity_mps[1] * input->velocity_mps[1] +
                                  input->velocity_mps[2] * input->velocity_mps[2]);
        t_hi = fuel / (MASS_FLOW_PER_N * THRUST_LOWER_N);
        t_lo = fuel * speed / thrust_upper_n(planning);
        if (t_lo < 1e-3 * t_hi) {
            t_lo = 1e-3 * t_hi;
        }
    }
    if (input->time_of_flight_s > 0.0) {
        const double t = input->time_of_flight_s;
        const int met = reach_bracket(input, planning, t, t, &r_lo, &r_hi) &&
                        target_possible(input, t);
        const double reserve = s->reserve_throttle_max > planning ? s->reserve_throttle_max : 0.0;
        status = finish(work, input, t, met, planning, reserve, 0, s, plan);
    } else {
        int found;
        int phase_target = 0;
        if (reach_bracket(input, planning, t_lo, t_hi, &r_lo, &r_hi)) {
            found = search_phase(work, input, PDG_MODE_TARGET, r_lo, r_hi, planning, s);
            phase_target = found;
        } else {
            found = 0;
        }
        if (!found) {
            found = search_phase(work, input, PDG_MODE_MERIT, t_lo, t_hi, planning, s);
        }
        if (found) {
            const int met = phase_target || work->best_error <= MERIT_MEETS_TARGET;
            status = finish(work, input, work->best_t, met, planning, 0.0, 1, s, plan);
        } else {
            status = (pdg_status)work->last_status;
            clear_plan(plan, input->time_of_flight_s);
            plan->iterations = work->last_iterations;
        }
    }
    plan->status = status;
    plan->iterations_total = work->iterations_total;
    plan->iterations_max = work->iterations_max;
    plan->solves = work->solves;
    plan->budget_exhausted = work->budget_exhausted;
    return status;
}
