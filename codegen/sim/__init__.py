"""Closed-loop software-in-the-loop landing simulation.

A guidance solver (the generated C through cffi, or a dry-run tree backed by
the reference) flies a truth model in a loop, as it would on board:

Truth model
    3-DoF translation with variable mass in the landing-site frame (third
    axis up): r' = v, v' = T/m + g + d, m' = -|T| / (Isp g0 cos(cant)), with
    g0 = 9.80665 m/s^2 exact (3rd CGPM 1901) and the vehicle's mass-flow
    constant (rocket equation in rate form). Constant gravity; an optional
    constant disturbance acceleration d. Integrated by classical fixed-step
    RK4 at ``step_s`` (default 0.01 s, at least ten steps per guidance
    period). A step is shortened so that it ends exactly on every event
    (guidance call, plan taking effect, boundary of a plan interval, engine
    cut-off), so the command is constant within each step and RK4 keeps its
    order. The engine state (the lagged thrust magnitude, when a lag is set)
    is integrated with the rest.

Command: acceleration, not force
    A plan holds the acceleration u = T/m constant on each interval (the
    change of variables of the formulation; its zero-order hold is exact for
    the double integrator). So the flight software commands the plan's
    acceleration and turns it into a thrust with its current mass estimate,
    T_cmd = u * m_est. With a perfect mass estimate the vehicle then flies
    exactly the plan's dynamics; holding the plan's force instead would
    accelerate more and more as propellant burns (about 0.8 % over one
    interval of the demo plan) and miss even with no error at all. A mass
    estimate error then shows as an acceleration error, as it does in flight.

Engine
    Commanded magnitude clamped to the engine's range when the error file
    says so: throttle_min to full throttle (thrust_max_n). The vehicle's
    throttle_max is read as the planning limit below full throttle (a plan
    that rides the engine's true maximum leaves nothing to correct with);
    the margin above it is the tracking loop's authority. Then a
    first-order lag with an optional slew limit (the lag state starts at the first command: the run starts at powered
    descent with the engine settled), then the per-run magnitude error and
    misalignment (a fixed small rotation of the thrust direction about the
    two horizontal axes: a 3-DoF model has no attitude). Mass flow follows
    the delivered thrust. No thrust once the propellant is gone.

Guidance loop
    Navigation: estimate = truth + per-run bias + white noise per sample; the
    mass estimate = truth + per-run bias. The first plan searches the time of
    flight (``time_of_flight_s=None``) and fixes the end of the guided phase
    t_end. Then every 1/rate seconds guidance re-solves from the estimate
    with the time to go t_end - t (horizon N fixed, so the intervals shrink).
    A new plan takes effect ``latency_s`` after its navigation sample and is
    indexed from that sample's time. A solve that fails (any status but
    target_met / best_reachable) changes nothing: the last good plan is followed.
    The mass handed to the solver is clamped into (dry, wet] (an estimate
    above the wet mass is a known impossibility; flight software would clamp).
    ``rate_hz = 0`` flies the first plan open loop.

Tracking loop
    A fuel-optimal plan ends on a full-thrust arc: from a state a little
    behind it, no plan with the same thrust bound and touchdown time exists,
    so re-plans there fail and the vehicle would fly the last plan blind.
    Between re-plans a tracking loop (``control_rate_hz``, default 10 Hz,
    with its own navigation samples) adds to the plan's acceleration
    3 w (v_ref - v_est) + 3 w^2 (r_ref - r_est) + w^3 * integral(r_ref - r_est),
    poles at -w (triple; w = ``tracking_bandwidth_rad_s``, default 0.5 rad/s),
    the integral clamped (anti-windup) and kept across plans (it estimates
    persistent errors: thrust magnitude, mass estimate, disturbance). r_ref,
    v_ref follow the plan's nodes under its own zero-order hold. w = 0 flies
    the plan's accelerations alone.

Terminal phase (rules chosen here, both common practice)
    1. When the time to go falls below ``terminal_s`` (default 8 s,
       measured: settings.TERMINAL_S), guidance stops re-planning and flies
       (tracks) the last good plan to its end: a re-plan over a vanishing
       horizon has tiny intervals, its thrust bounds leave no room, and late
       re-plans pass navigation noise straight into the touchdown velocity.
    2. The plans aim at rest ``descent_altitude_m`` (default 4 m) above the
       target; from there a vertical descent at constant speed
       ``descent_speed_mps`` (default 1 m/s, reached at 1 m/s^2) under the
       same tracking loop (vertical channel: speed only) until ground
       contact, when the engine cuts off. A plan that ends at rest exactly on
       the ground turns an altitude error d into a touchdown speed of about
       sqrt(2 a d); the constant-speed descent makes the touchdown speed
       independent of altitude errors. ``descent_altitude_m = 0``: no
       descent; the engine cuts off at t_end or at contact, and a vehicle
       still above the ground falls freely to it.

Touchdown
    Ground contact is the first time the altitude reaches the target's
    altitude (located within a step by bisection on the RK4 step length).
    Position error: horizontal distance from the target. Velocity error:
    distance of the touchdown velocity from the intended one (0, 0,
    -descent_speed_mps), or from rest without a descent.

Reproducibility and resumption
    Run i of a batch with seed s takes all its randomness from
    ``numpy.random.default_rng([s, i])``: per-run draws first in a fixed
    order, then the navigation noise of each guidance call. So a run does not
    depend on which other runs were done, in which order, or on resumption.
    Each finished run is appended to ``runs.jsonl`` (one write, flush, fsync);
    ``manifest.json`` holds the settings. Running the same command again
    skips the runs already recorded (a torn last line is cut off) and refuses
    a run directory made with other settings.

Modules
    ``error_model`` (the error file), ``tree`` (the solver to fly),
    ``settings`` (Settings, per-run draws), ``truth`` (the truth model),
    ``plans`` (a plan or the terminal descent being followed), ``loop``
    (:func:`~codegen.sim.loop.fly`: one run), ``batch`` (manifest, records,
    resumption, statistics), ``figures`` and ``report`` (report.html).
    A consumer like verify: imports the model, the reference and bind, never
    the command line.
"""
