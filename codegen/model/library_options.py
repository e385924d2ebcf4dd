"""Options of the general-purpose solvers the reference and the measurement
tools call: Clarabel, ECOS and SCS, through CVXPY or directly.

This module is the one place that spells those libraries' own option names
(Clarabel's ``DefaultSettings`` fields, ECOS's and SCS's solve arguments).
They are the libraries' public API, so they must read exactly as each
library accepts them; every caller says what it wants in our terms (a stop
tolerance, an iteration limit) and takes the keywords from here.
"""

from __future__ import annotations


def clarabel(stop: float, certificates: bool = True, iterations: int | None = 200) -> dict:
    """Clarabel: absolute and relative gap and feasibility to ``stop``; with
    ``certificates``, the infeasibility certificates too; an iteration limit
    unless None (Clarabel's own default then holds)."""
    out = {"tol_gap_abs": stop, "tol_gap_rel": stop, "tol_feas": stop}
    if certificates:
        out.update({"tol_infeas_abs": stop, "tol_infeas_rel": stop})
    if iterations is not None:
        out["max_iter"] = iterations
    return out


def ecos(stop: float, iterations: int | None = 200) -> dict:
    """ECOS: absolute and relative gap and feasibility to ``stop``; an
    iteration limit unless None (ECOS's own default then holds)."""
    out = {"abstol": stop, "reltol": stop, "feastol": stop}
    if iterations is not None:
        out["max_iters"] = iterations
    return out


def scs(stop: float, iterations: int) -> dict:
    """SCS: absolute and relative residuals to ``stop``."""
    return {"eps_abs": stop, "eps_rel": stop, "max_iters": iterations}
