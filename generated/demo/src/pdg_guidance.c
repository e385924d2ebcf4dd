/*
 * pdg_guidance.c: the guidance layer above the "native" solver.
 *
 * Validates the run-time inputs, computes every solver parameter from the
 * physical state (the mass bounds, exp(-z0) Taylor terms and dt terms of the
 * lossless convexification, Acikmese & Ploen 2007), searches the time of
 * flight when asked (grid, then golden section), calls the solver, and
 * converts the answer back to SI units with an honest status.
 *
 * This file mirrors codegen/model/problem.py (parameter_values) and
 * codegen/model/tofsearch.py (search) of pdgc 0.1.0 line for line; the two
 * are checked against each other by `pdgc check`.
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
static const double MASS_FLOW_PER_N = 0.00044335487520779493;

/* Time-of-flight search (codegen/model/tofsearch.py). */
#define GRID_POINTS 9
#define GRID_REFINEMENTS 3
#define GRID_MAX 65
#define GOLDEN_MAX_STEPS 40
#define RETRY_BUDGET 4
static const double INV_PHI = 0.6180339887498949;
static const double RETRY_SHIFT = 0.125;

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
#define P_MISS_MAX 413

void pdg_guidance_config_init(pdg_guidance_config *settings)
{
    settings->iterations_per_solve_max = 100;
    settings->tof_tolerance_s = 0.05;
}

const char *pdg_status_name(pdg_status status)
{
    switch (status) {
    case PDG_OPTIMAL: return "optimal";
    case PDG_INFEASIBLE: return "infeasible";
    case PDG_ITERATION_LIMIT: return "iteration_limit";
    case PDG_NUMERICAL_TROUBLE: return "numerical_trouble";
    case PDG_BAD_INPUT: return "bad_input";
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
        !finite_vec(in->target_m, 3) || !isfinite(in->mass_kg) ||
        !isfinite(in->time_of_flight_s)) {
        return 0;
    }
    if (!(in->mass_kg > MASS_DRY_KG && in->mass_kg <= MASS_WET_KG)) {
        return 0;
    }
    if (in->time_of_flight_s < 0.0) {
        return 0;
    }
    if (s->iterations_per_solve_max < 1
        || s->iterations_per_solve_max > 200) {
        return 0;
    }
    if (!isfinite(s->tof_tolerance_s) || !(s->tof_tolerance_s > 0.0)) {
        return 0;
    }
    return 1;
}

/* Physical inputs -> scaled parameters (mirror of problem.parameter_values). */
static void compute_params(const pdg_input *in, double tof_s, double *p)
{
    const double m0 = in->mass_kg / MASS_UNIT_KG;
    const double tf = tof_s / TIME_UNIT_S;
    const double dt = tf / (double)N_;
    const double floor_mass = MASS_DRY * MASS_FLOOR_FRACTION;
    int i;
    int k;
    for (i = 0; i < 3; i++) {
        p[P_R0 + i] = in->position_m[i] / LENGTH_UNIT_M;
        p[P_V0 + i] = in->velocity_mps[i] / SPEED_UNIT_MPS;
        p[P_TARGET + i] = in->target_m[i] / LENGTH_UNIT_M;
    }
    p[P_Z0] = log(m0);
    p[P_DT] = dt;
    p[P_DT2H] = dt * dt / 2.0;
    p[P_ADT] = MASS_FLOW * dt;
    p[P_MISS_MAX] = 0.0;
    for (k = 0; k <= N_; k++) {
        const double t = dt * (double)k;
        double m_lo = m0 - MASS_FLOW * THRUST_UPPER * t;
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
            p[P_ZLO + k - 1] = z_lo;
            p[P_ZHI + k - 1] = log(m_hi);
        }
        if (k < N_) {
            const double mu_lo = THRUST_LOWER * exp(-z_lo);
            const double mu_hi = THRUST_UPPER * exp(-z_lo);
            const double s_lo = sqrt(mu_lo / 2.0);
            p[P_MU_LO + k] = mu_lo;
            p[P_MU_HI + k] = mu_hi;
            p[P_P_LO + k] = mu_lo * (1.0 + z_lo);
            p[P_P_HI + k] = mu_hi * (1.0 + z_lo);
            p[P_S_LO + k] = s_lo;
            p[P_C_LO + k] = s_lo * z_lo;
        }
    }
}

/* One solve at time of flight tof_s; returns its cost when optimal, INFINITY
 * when proven infeasible, NAN when it failed (iteration limit, numerical
 * trouble: unknown), and keeps the best answer so far in the workspace. */
static double solve_at(pdg_workspace *w, const pdg_input *in, double tof_s,
                       const pdg_guidance_config *s)
{
    double objective = 0.0;
    int iterations = 0;
    int status;
    double cost;
    compute_params(in, tof_s, w->params);
    status = pdg_backend_solve(&w->backend, w->params, s->iterations_per_solve_max,
                                      &objective, &iterations);
    w->solves += 1;
    w->iterations_total += iterations;
    if (iterations > w->iterations_max) {
        w->iterations_max = iterations;
    }
    w->last_status = status;
    w->last_iterations = iterations;
    if (status == PDG_OPTIMAL && isfinite(objective)) {
        cost = objective;
        if (cost < w->best_cost) {
            w->best_cost = cost;
            w->best_tof = tof_s;
            w->best_iterations = iterations;
            w->have_best = 1;
            pdg_backend_solution(&w->backend, w->best_r, w->best_v, w->best_z,
                                        w->best_u, w->best_sigma);
        }
    } else if (status == PDG_INFEASIBLE) {
        cost = INFINITY;
    } else {
        /* NAN is never compared: isnan() sorts it out first. */
        cost = NAN;
    }
    return cost;
}

/* One probe of the search (mirror of probe in tofsearch.search): a solve,
 * retried once at a time shifted by RETRY_SHIFT * tolerance when it failed,
 * while the search's RETRY_BUDGET lasts; NAN when still failed (unknown). */
static double probe(pdg_workspace *w, const pdg_input *in, double tof_s,
                    double t_lo, double t_hi, int *retries, const pdg_guidance_config *s)
{
    double value = solve_at(w, in, tof_s, s);
    const double shift = RETRY_SHIFT * s->tof_tolerance_s;
    double t_retry = tof_s + shift;
    if (t_retry > t_hi) {
        t_retry = tof_s - shift;
    }
    if (isnan(value) && *retries < RETRY_BUDGET && t_retry >= t_lo) {
        *retries += 1;
        value = solve_at(w, in, t_retry, s);
    }
    return value;
}

/* Grid ranking: an unknown probe is never the best. */
static double rank(double value)
{
    return isnan(value) ? INFINITY : value;
}

/* Grid, then golden section (mirror of tofsearch.search). Bounded:
 * at most GRID_MAX + 2 + GOLDEN_MAX_STEPS probes and RETRY_BUDGET retries,
 * 111 solves. Scratch lives in the workspace, not on the stack. */
static void search_tof(pdg_workspace *w, const pdg_input *in, double t_lo,
                       double t_hi, const pdg_guidance_config *s)
{
    double *times = w->search_t;
    double *costs = w->search_c;
    int count = GRID_POINTS;
    int retries = 0;
    int keep_left;
    int i;
    int r;
    int step;
    int best_i;
    double a;
    double b;
    double c;
    double d;
    double fc;
    double fd;

    for (i = 0; i < GRID_POINTS; i++) {
        times[i] = t_lo + (t_hi - t_lo) * (double)i / (double)(GRID_POINTS - 1);
    }
    for (i = 0; i < GRID_POINTS; i++) {
        costs[i] = rank(probe(w, in, times[i], t_lo, t_hi, &retries, s));
    }
    for (r = 0; r < GRID_REFINEMENTS; r++) {
        if (w->have_best) {
            break;
        }
        /* Midpoints, evaluated left to right, then merged in place from the end. */
        {
            double *mid_t = w->mid_t;
            double *mid_c = w->mid_c;
            int j;
            for (j = 0; j < count - 1; j++) {
                mid_t[j] = (times[j] + times[j + 1]) / 2.0;
                mid_c[j] = rank(probe(w, in, mid_t[j], t_lo, t_hi, &retries, s));
            }
            for (j = count - 1; j >= 0; j--) {
                times[2 * j] = times[j];
                costs[2 * j] = costs[j];
            }
            for (j = 0; j < count - 1; j++) {
                times[2 * j + 1] = mid_t[j];
                costs[2 * j + 1] = mid_c[j];
            }
            count = 2 * count - 1;
        }
    }
    if (!w->have_best) {
        return;
    }
    best_i = 0;
    for (i = 1; i < count; i++) {
        if (costs[i] < costs[best_i]) {
            best_i = i;
        }
    }
    a = times[best_i > 0 ? best_i - 1 : 0];
    b = times[best_i < count - 1 ? best_i + 1 : count - 1];
    c = b - INV_PHI * (b - a);
    d = a + INV_PHI * (b - a);
    fc = probe(w, in, c, t_lo, t_hi, &retries, s);
    fd = probe(w, in, d, t_lo, t_hi, &retries, s);
    for (step = 0; step < GOLDEN_MAX_STEPS; step++) {
        if (b - a <= s->tof_tolerance_s) {
            break;
        }
        if (isnan(fc) && !isnan(fd)) {
            /* c unknown: d separates, the best point so far decides. */
            keep_left = w->best_tof < d;
        } else if (isnan(fd) || (isinf(fc) && isinf(fd))) {
            /* d unknown (c known or not), or both infeasible: c separates. */
            keep_left = w->best_tof <= c;
        } else {
            keep_left = fc < fd;
        }
        if (keep_left) {
            b = d;
            d = c;
            fd = fc;
            c = b - INV_PHI * (b - a);
            fc = probe(w, in, c, t_lo, t_hi, &retries, s);
        } else {
            a = c;
            c = d;
            fc = fd;
            d = a + INV_PHI * (b - a);
            fd = probe(w, in, d, t_lo, t_hi, &retries, s);
        }
    }
}

static void fill_plan(const pdg_workspace *w, const pdg_input *in,
                      pdg_plan *plan)
{
    int i;
    int k;
    const double tof = w->best_tof;
    for (k = 0; k <= N_; k++) {
        plan->t_s[k] = tof * (double)k / (double)N_;
        for (i = 0; i < 3; i++) {
            plan->position_m[k][i] = w->best_r[i + 3 * k] * LENGTH_UNIT_M;
            plan->velocity_mps[k][i] = w->best_v[i + 3 * k] * SPEED_UNIT_MPS;
        }
        plan->mass_kg[k] = exp(w->best_z[k]) * MASS_UNIT_KG;
    }
    for (k = 0; k < N_; k++) {
        for (i = 0; i < 3; i++) {
            plan->accel_mps2[k][i] = w->best_u[i + 3 * k] * ACCEL_UNIT_MPS2;
            plan->thrust_n[k][i] = plan->accel_mps2[k][i] * plan->mass_kg[k];
        }
        plan->accel_slack_mps2[k] = w->best_sigma[k] * ACCEL_UNIT_MPS2;
    }
    plan->time_of_flight_s = tof;
    plan->fuel_kg = plan->mass_kg[0] - plan->mass_kg[N_];
    plan->landing_miss_m = hypot(plan->position_m[N_][0] - in->target_m[0],
                                 plan->position_m[N_][1] - in->target_m[1]);
    plan->objective = w->best_cost;
    plan->iterations = w->best_iterations;
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
    plan->time_of_flight_s = tof;
    plan->fuel_kg = NAN;
    plan->landing_miss_m = NAN;
    plan->objective = NAN;
}

pdg_status pdg_plan_descent(pdg_workspace *work,
    const pdg_input *input, const pdg_guidance_config *settings,
    pdg_plan *plan)
{
    pdg_guidance_config defaults;
    const pdg_guidance_config *s = settings;
    pdg_status status;
    if (work == NULL || input == NULL || plan == NULL) {
        return PDG_BAD_INPUT;
    }
    if (s == NULL) {
        pdg_guidance_config_init(&defaults);
        s = &defaults;
    }
    if (!input_ok(input, s)) {
        return PDG_BAD_INPUT;
    }
    work->best_cost = INFINITY;
    work->best_tof = 0.0;
    work->best_iterations = 0;
    work->have_best = 0;
    work->iterations_total = 0;
    work->iterations_max = 0;
    work->solves = 0;
    work->last_status = PDG_NUMERICAL_TROUBLE;
    work->last_iterations = 0;

    if (input->time_of_flight_s > 0.0) {
        (void)solve_at(work, input, input->time_of_flight_s, s);
    } else {
        /* Bracket of Acikmese & Ploen (2007), with the current mass. */
        const double fuel = input->mass_kg - MASS_DRY_KG;
        const double speed = sqrt(input->velocity_mps[0] * input->velocity_mps[0] +
                                  input->velocity_mps[1] * input->velocity_mps[1] +
                                  input->velocity_mps[2] * input->velocity_mps[2]);
        const double t_max = fuel / (MASS_FLOW_PER_N * THRUST_LOWER_N);
        double t_min = fuel * speed / THRUST_UPPER_N;
        if (t_min < 1e-3 * t_max) {
            t_min = 1e-3 * t_max;
        }
        search_tof(work, input, t_min, t_max, s);
    }
    if (work->have_best) {
        status = PDG_OPTIMAL;
        fill_plan(work, input, plan);
    } else {
        status = (pdg_status)work->last_status;
        clear_plan(plan, input->time_of_flight_s);
        plan->iterations = work->last_iterations;
    }
    plan->status = status;
    plan->iterations_total = work->iterations_total;
    plan->iterations_max = work->iterations_max;
    plan->solves = work->solves;
    return status;
}
