"""Second-order cone kernels written out for one cone size.

The solver's cone work (socp.c.j2) loops over the cones; for a cone of a
size listed in :func:`specialised_sizes` it calls the functions below,
written out for that size with every entry in a local: no inner loop, no
reload of an entry through the workspace pointer, and the values of one
cone stay in registers from the first operation to the last. Cones of
other sizes take the generic loops. Each kernel does the arithmetic of the
generic loop it replaces in the same order (sums left to right, the dot
product's four partial sums as ``dot`` in the template), so with
floating-point contraction off the results are those of the loops, bit for
bit (the sign of an exact zero aside: the loops start their sums from
+0).

Measured (``python -m bench.instructions``, demo vehicle, N = 50, the
bench's 8 instances, gcc 12 -O2): see DEVELOPERS.md, "The native solver
core".
"""

from __future__ import annotations

#: Sizes that get written-out kernels, when the program has a cone of that
#: size: 2 to 5 hold the norms of vectors of 1 to 4 entries (the descent
#: problem has 3 and 4: the thrust pointing and glide slope in 2-D and 3-D
#: forms). The source of one size grows as size^2 (the W'W block), so
#: larger, rarer cones keep the loops.
SIZES = (2, 3, 4, 5)


def specialised_sizes(soc: list) -> list:
    """The sizes of ``soc`` (cone sizes) that get their own kernels."""
    return sorted({int(q) for q in soc if int(q) in SIZES})


def _dot(a: str, b: str, q: int) -> str:
    """dot(a, b, q) of the template, written out: four partial sums over
    the full blocks of four, the rest added to the first, then
    (s0 + s1) + (s2 + s3)."""
    terms = [f"{a}{i} * {b}{i}" for i in range(q)]
    nb = q // 4
    if nb == 0:
        return "(" + " + ".join(terms) + ")"
    parts = []
    for j in range(4):
        idx = [4 * blk + j for blk in range(nb)]
        if j == 0:
            idx += list(range(4 * nb, q))
        parts.append(" + ".join(terms[i] for i in idx))
    return f"((({parts[0]}) + ({parts[1]})) + (({parts[2]}) + ({parts[3]})))"


def _sum(terms: list) -> str:
    return "(" + " + ".join(terms) + ")" if terms else "R(0)"


def _decl(name: str, q: int) -> str:
    return "real " + ", ".join(f"{name}{k}" for k in range(q)) + ";"


def _ref(base: str) -> str:
    return f"({base})" if " " in base else base


def _load(name: str, src: str, q: int) -> list:
    return [f"    const real {name}{k} = {_ref(src)}[{k}];" for k in range(q)]


def _store(dst: str, src: str, q: int, neg: bool = False) -> list:
    sign = "-" if neg else ""
    return [f"    {_ref(dst)}[{k}] = {sign}{src}{k};" for k in range(q)]


def kernels(q: int, prefix: str) -> str:
    """The C functions of cone size q (static inline; names end in _q)."""
    W = f"{prefix}_socp_work"
    out = [f"/* ---- cone kernels written out for size {q} (codegen/backends/native/cones.py) */"]

    # nt_scaling's block: scaling point, geo_s, geo_z, eta, rw, lambda = W z
    ns = _sum([f"s{k} * s{k}" for k in range(1, q)])
    nz = _sum([f"z{k} * z{k}" for k in range(1, q)])
    szb = _sum([f"OVER(s{k}, isn) * OVER(z{k}, izn)" for k in range(q)])
    out += [f"static inline int nt_cone_{q}({W} *w, int c, int o)", "{"]
    out += _load("s", "w->s + o", q) + _load("z", "w->z + o", q)
    out += ["    real *wb = w->ntw + o;", "    real *gs = w->geo_s + 4 * c;",
            "    real *gz = w->geo_z + 4 * c;",
            "    real ns1, nz1, sdet, zdet, sn, zn, isn, izn, szb, gam, i2g, eta, rw;",
            "    " + _decl("b", q),
            f"    ns1 = SQRT({ns});", f"    nz1 = SQRT({nz});",
            "    sdet = (s0 - ns1) * (s0 + ns1);", "    zdet = (z0 - nz1) * (z0 + nz1);",
            "    if (!(s0 - ns1 > R(0)) || !(z0 - nz1 > R(0)) || !(sdet > R(0)) || !(zdet > R(0))) {",
            "        return -1;", "    }",
            "    sn = SQRT(sdet);", "    zn = SQRT(zdet);", "    isn = DEN(sn);", "    izn = DEN(zn);",
            "    gs[0] = DEN(sdet);", "    gs[1] = sn;", "    gs[2] = isn;", "    gs[3] = DEN(s0 + sn);",
            "    gz[0] = DEN(zdet);", "    gz[1] = zn;", "    gz[2] = izn;", "    gz[3] = DEN(z0 + zn);",
            f"    szb = {szb};",
            "    gam = SQRT((R(1) + szb) / R(2));", "    i2g = DEN(R(2) * gam);",
            "    b0 = OVER(OVER(s0, isn) + OVER(z0, izn), i2g);"]
    out += [f"    b{k} = OVER(OVER(s{k}, isn) - OVER(z{k}, izn), i2g);" for k in range(1, q)]
    out += _store("wb", "b", q)
    out += ["    eta = SQRT(OVER(sn, izn));", "    w->eta[c] = eta;", "    rw = DEN(R(1) + b0);",
            "    w->rw[c] = rw;", "    {",
            f"        const real w1v = {_sum([f'b{k} * z{k}' for k in range(1, q)])};",
            "        const real f = z0 + OVER(w1v, rw);",
            "        w->lambda[o] = eta * (b0 * z0 + w1v);"]
    out += [f"        w->lambda[o + {k}] = eta * (z{k} + f * b{k});" for k in range(1, q)]
    out += ["    }", "    return 0;", "}", ""]

    # out = W v of one block (apply_w)
    out += [f"static inline void w_cone_{q}(const {W} *w, int c, int o, const real *v, real *out)",
            "{", "    const real rw = w->rw[c], eta = w->eta[c];"]
    out += _load("b", "w->ntw + o", q) + _load("v", "v + o", q)
    out += ["    " + _decl("r", q)]
    out += _wmul("r", "b", "rw", "eta", 1, "v", q)
    out += _store("out + o", "r", q) + ["}", ""]

    # out = W'W v of one block (apply_w2)
    out += [f"static inline void w2_cone_{q}(const {W} *w, int c, int o, const real *v, real *out)",
            "{", "    const real e2 = w->eta[c] * w->eta[c];"]
    out += _load("b", "w->ntw + o", q) + _load("v", "v + o", q)
    out += [f"    const real t = R(2) * {_dot('b', 'v', q)};",
            "    out[o] = e2 * (t * b0 - v0);"]
    out += [f"    out[o + {k}] = e2 * (t * b{k} + v{k});" for k in range(1, q)]
    out += ["}", ""]

    # the -W'W - eps block of the KKT values (kkt_assemble_scaling); k: first off-diagonal
    out += [f"static inline void kkt_cone_{q}({W} *w, int c, int o, int k)", "{",
            "    const real eps = w->shift;", "    const real e2 = w->eta[c] * w->eta[c];",
            "    const real m2 = -e2 * R(2);"]
    out += _load("b", "w->ntw + o", q)
    t = 0
    for a in range(q):
        j = "R(-1)" if a == 0 else "R(1)"
        out.append(f"    w->kkt[kpos_zdiag[o + {a}]] = -(e2 * (R(2) * b{a} * b{a} + {j})) - eps;")
        for b in range(a + 1, q):
            out.append(f"    w->kkt[kpos_zoff[k + {t}]] = m2 * b{a} * b{b};")
            t += 1
    out += ["}", ""]

    # slack_direction's block: dz = dz0 + dtau dz1, dza = W dz, ds = -W (dza + v)
    out += [f"static inline void slack_cone_{q}({W} *w, int c, int o, const real *v, real dtau,",
            "                                 const real *dz0, const real *dz1)", "{",
            "    const real rw = w->rw[c], eta = w->eta[c];"]
    out += _load("b", "w->ntw + o", q)
    out += ["    " + _decl("d", q), "    " + _decl("e", q), "    " + _decl("t", q),
            "    " + _decl("r", q)]
    out += [f"    d{k} = dz0[o + {k}] + dtau * dz1[o + {k}];" for k in range(q)]
    out += _wmul("e", "b", "rw", "eta", 1, "d", q)
    out += [f"    t{k} = e{k} + v[o + {k}];" for k in range(q)]
    out += _wmul("r", "b", "rw", "eta", 1, "t", q)
    out += _store("w->dz + o", "d", q) + _store("w->dza + o", "e", q)
    out += _store("w->ds + o", "r", q, neg=True) + ["}", ""]

    # cone_step's block: the largest a (at most cap) with u + a d in this cone
    ujd = " - ".join([f"u{k} * d{k}" for k in range(q)])
    r1 = _sum([f"e{k} * e{k}" for k in range(1, q)])
    out += [f"static inline real step_cone_{q}(const real *u, const real *d, const real *g, real a)",
            "{"]
    out += _load("u", "u", q) + _load("d", "d", q)
    out += [f"    const real r0 = OVER({ujd}, g[0]);",
            "    const real fac = OVER(d0 + r0 * g[1], g[3]);"]
    out += [f"    const real e{k} = d{k} - fac * u{k};" for k in range(1, q)]
    out += [f"    const real t = OVER(SQRT({r1}), g[2]) - r0;",
            "    return t * a > R(1) ? R(1) / t : a;", "}", ""]

    # corrector_terms' block: dsa = lambda \ (lambda o lambda + (W^-1 ds) o dza - smu e), t1 = W dsa
    out += [f"static inline void corr_cone_{q}({W} *w, int c, int o, real smu)", "{",
            "    const real rw = w->rw[c], eta = w->eta[c];", "    const real sc = R(1) / eta;"]
    out += _load("b", "w->ntw + o", q) + _load("v", "w->ds + o", q)
    out += _load("p", "w->dza + o", q) + _load("l", "w->lambda + o", q)
    out += ["    " + _decl("a", q), "    " + _decl("m", q), "    " + _decl("x", q),
            "    " + _decl("r", q), "    real n1, uv, det;"]
    out += _wmul("a", "b", "rw", "sc", -1, "v", q)
    out += [f"    m0 = {_dot('l', 'l', q)} + {_dot('a', 'p', q)};"]
    out += [f"    m{k} = (l0 * l{k} + l0 * l{k}) + (a0 * p{k} + p0 * a{k});" for k in range(1, q)]
    out += ["    m0 -= smu;",
            f"    n1 = SQRT({_sum([f'l{k} * l{k}' for k in range(1, q)])});",
            f"    uv = {_sum([f'l{k} * m{k}' for k in range(1, q)])};",
            "    det = (l0 - n1) * (l0 + n1);", "    x0 = (l0 * m0 - uv) / det;", "    {",
            "        const real iu0 = DEN(l0);"]
    out += [f"        x{k} = OVER(m{k} - x0 * l{k}, iu0);" for k in range(1, q)]
    out += ["    }"]
    out += _wmul("r", "b", "rw", "eta", 1, "x", q)
    out += _store("w->dsa + o", "x", q) + _store("w->t1 + o", "r", q) + ["}", ""]
    return "\n".join(out) + "\n"


def _wmul(out: str, wb: str, rw: str, sc: str, sg: int, v: str, q: int) -> list:
    """out = W v (sg = 1, sc = eta) or W^{-1} v (sg = -1, sc = 1/eta) of one
    block, as cone_w in the template: locals wb0.., v0.. in, out0.. declared
    by the caller."""
    w1v = _sum([f"{wb}{k} * {v}{k}" for k in range(1, q)])
    sgn = "+" if sg > 0 else "-"
    f_expr = f"{v}0" if sg > 0 else f"-{v}0"
    lines = ["    {", f"        const real w1v_ = {w1v};",
             f"        const real f_ = {f_expr} + OVER(w1v_, {rw});",
             f"        {out}0 = {sc} * ({wb}0 * {v}0 {sgn} w1v_);"]
    lines += [f"        {out}{k} = {sc} * ({v}{k} + f_ * {wb}{k});" for k in range(1, q)]
    lines.append("    }")
    return lines
