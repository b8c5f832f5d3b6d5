"""The batch integrator's C source, generated next to each spec's kernels.

The integrator advances LANES states side by side ("lanes"): the Runge-Kutta stage sums are
loops over the lanes in structure-of-arrays layout, and when every lane is busy one call of
the spec's ``*_soa`` kernel evaluates a stage for all of them, so the integrator's right-hand
side evaluations run at the batch kernels' rate. Each lane still follows its own state
through exactly the arithmetic of a one-state integrator: the results do not depend on the
lanes, the batch or the thread count. The stages are unrolled from the tableaus in
:mod:`metricc.tableaus` (only non-zero coefficients are printed); the per-lane driver around
them is layout in ``templates/c_integrator.c.j2``. The same algorithm in NumPy is
:mod:`metricc.integrate`.
"""
from __future__ import annotations

from .integrate import DOMAIN, EVENT_BASE, HMIN_REL, ROOT_REL_TOL, sqrt_depth
from .printing import number_literal
from .tableaus import DOP853, DP5

KMAX = 16      # stages of one state kept for the dense output (DOP853: 12 + f(y_new) + 3 extra)
CONTMAX = 7    # dense-output coefficient vectors (DOP853: 7, DP5: 4)
LANES = 16     # states advanced side by side (a multiple of the batch kernels' tile of 16)
FEW = 4        # at most this many busy lanes: one-state steps (idle lanes' sums cost more)
SOA_STAGES = max(DOP853["stages"], DP5["stages"])   # stages kept per lane (13)
MASK_BITS = 64  # events per unsigned long long word of the options' event masks


def _lit(v) -> str:
    return number_literal(float(v))


def _combo(coeffs, ref, scale: str = "h") -> str:
    """'h * (c0*K0 + ...)' over the non-zero coefficients; ref(j) is stage j's operand."""
    terms = [f"{_lit(c)} * {ref(j)}" for j, c in enumerate(coeffs) if float(c) != 0.0]
    inner = " + ".join(terms) if terms else "0.0"
    return f"{scale} * ({inner})" if scale else f"({inner})"


def _at(r: int, n) -> str:
    """Offset of block r of n components: a number for a compile-time n, else C text
    (n the name of a run-time size, as the carried components' nc)."""
    if isinstance(n, int):
        return str(r * n)
    return f"{r} * {n}" if r else "0"


def _aos(n, k: str = "k"):
    """Stage operands of one state: k[j*n + i] (n a number, or the name of a run-time size)."""
    return lambda j: f"{k}[{_at(j, n)} + i]"


def _error_power(name: str, expo: float, x: str) -> str:
    """C text of x^expo for the step-size controller, as integrate.error_power computes it
    (nested square roots for an exponent 1/2^k, such as DOP853's 1/8)."""
    depth = sqrt_depth(expo)
    if depth is None:
        return f"{name}_pow({x}, {_lit(expo)})"
    return "sqrt(" * depth + x + ")" * depth


def _stages_function(name: str, P: str, tab: dict, n: int, lanes: int = LANES) -> str:
    """One attempted step for the lanes (structure of arrays: component i of lane l at
    [i * lanes + l], stage j at k + j * n * lanes): the stages, y_new and the error norm of
    each lane, and bad[l] = 0 exactly when lane l's y_new is finite. With lanes > 1 the stage
    evaluations go through NAME_stage_rhs (idle lanes, all at nl or above if not all are
    busy, take part in the sums but are not evaluated); with lanes = 1
    (``NAME_<method>_stages1``, the layout is then that of one state) through the
    single-state kernel. Per lane the operations and their order are those of a one-state
    step, the same in both versions.

    cc (NULL: nothing carried) holds the carried components, nc of them per state, in the
    same layout (lanes > 1: cc->yc, cc->kc, ...; lanes = 1: cc->yc1, cc->kc1, ...): they take
    the same stage sums as the state, with the stride nc known only at run time, and their
    right-hand side comes with the state's (the kernels' f output, the same bits as the
    plain right-hand side: one evaluation of the shared part). With cc->ec they join the error norm
    (the sums go on over them and the mean is over n + nc components); without, the norm,
    and so the step sequence, is the plain one."""
    tag, s, L = tab["name"], tab["stages"], lanes
    R = f"{P}_RESTRICT"

    def ref(j):
        return f"k[{j * n * L} + o]"

    def cref(j):
        return f"kc[{j} * ncl + o]" if j else "kc[o]"
    loop = [f"    for (i = 0; i < {n}; ++i) {{", f"        for (l = 0; l < {L}; ++l) {{",
            f"            const int o = i * {L} + l;"]
    close = ["        }", "    }"]
    # the carried arrays are on the heap, where the compiler cannot tell that they do not
    # overlap: without P_IVDEP (no dependence between the lanes' iterations) the
    # integrator's -O2 leaves these loops scalar rather than test for overlap at run time
    cloop = ["        for (i = 0; i < nc; ++i) {", f"            {P}_IVDEP",
             f"            for (l = 0; l < {L}; ++l) {{",
             f"                const int o = i * {L} + l;"]
    cclose = ["            }", "        }", "    }"]
    sfx = "" if L > 1 else "1"
    if L > 1:
        lines = [f"static {P}_FN {P}_INLINE void {name}_{tag}_stages(int form, int nl, int full, "
                 f"const int *active, const double *{R} y,"]

        def rhs(src, csrc, st):
            return [f"    if (cc)",
                    f"        {name}_carry_stage(form, nl, full, active, {src}, {csrc}, lp, cc, "
                    f"kc + {st} * ncl, k + {st * n * L});",
                    "    else",
                    f"        {name}_stage_rhs(form, nl, full, active, {src}, lp, k + {st * n * L});"]
    else:
        lines = [f"static {P}_FN {P}_NOINLINE void {name}_{tag}_stages1(int form, "
                 f"const double *{R} y,"]

        def rhs(src, csrc, st):
            return [f"    if (cc)",
                    f"        {name}_carry_rhs1(form, cc, {src}, {csrc}, lp, kc + {st} * ncl, "
                    f"k + {st * n});",
                    "    else",
                    f"        {name}_rhs_form(form, {src}, lp, k + {st * n});"]
    lines += [f"        const double *{R} h, const double *{R} lp, double rtol, double atol, "
              f"double *{R} k,",
              f"        double *{R} ynew, double *{R} err, double *{R} bad, "
              f"{name}_carried *cc)", "{",
              f"    double yt[{n * L}];",
              "    /* the carried components (none without cc) */",
              "    const int nc = cc ? cc->nc : 0;",
              f"    const int ncl = nc * {L};",
              f"    const double *{R} yc = cc ? cc->yc{sfx} : 0;",
              f"    double *{R} kc = cc ? cc->kc{sfx} : 0;",
              f"    double *{R} ycn = cc ? cc->ycnew{sfx} : 0;",
              f"    double *{R} ytc = cc ? cc->ytc{sfx} : 0;",
              f"    const double dn = cc && cc->ec ? (double)({n} + nc) : {n}.0;"]
    if tag == "dp5":
        lines.append(f"    double acc[{L}];")
    else:
        lines.append(f"    double err5[{L}], err3[{L}];")
    lines.append("    int i, l;")
    for st in range(1, s - 1):
        lines += loop + [f"            yt[o] = y[o] + {_combo(tab['a'][st], ref, 'h[l]')};"] + close
        lines += (["    if (cc) {"] + cloop
                  + [f"                ytc[o] = yc[o] + {_combo(tab['a'][st], cref, 'h[l]')};"]
                  + cclose)
        lines += rhs("yt", "ytc", st)
    init = [f"    for (l = 0; l < {L}; ++l) {{"]
    init += (["        acc[l] = 0.0;"] if tag == "dp5"
             else ["        err5[l] = 0.0;", "        err3[l] = 0.0;"])
    init += ["        bad[l] = 0.0;", "    }"]
    # sk = 1 where atol + rtol * max(...) is 0 (integrate._scale: 0 / 0 would reject a finite
    # step as non-finite); a comparison rather than fmax: fmax is a libm call when NaN
    # semantics must be kept, and a NaN y_new is caught by bad[l] either way;
    # bad[l] stays 0 while every component of lane l's y_new is finite (an - an is NaN for
    # an infinite or NaN component): the finiteness test, vectorised with the error norm
    def norm(yv, ynv, r, ind):
        out = [f"{ind}const double ay = fabs({yv}[o]), an = fabs({ynv}[o]);",
               f"{ind}const double sk0 = atol + rtol * (ay > an ? ay : an);",
               f"{ind}const double sk = sk0 > 0.0 ? sk0 : 1.0;",
               f"{ind}bad[l] += an - an;"]
        if tag == "dp5":
            return out + [f"{ind}const double e = {_combo(tab['e'], r, 'h[l]')} / sk;",
                          f"{ind}acc[l] += e * e;"]
        return out + [f"{ind}const double e5 = {_combo(tab['e5'], r, '')} / sk;",
                      f"{ind}const double e3 = {_combo(tab['e3'], r, '')} / sk;",
                      f"{ind}err5[l] += e5 * e5;",
                      f"{ind}err3[l] += e3 * e3;"]
    if tag == "dp5":
        final = [f"    for (l = 0; l < {L}; ++l) err[l] = sqrt(acc[l] / dn);"]
    else:
        final = [f"    for (l = 0; l < {L}; ++l) {{",
                 "        double deno = err5[l] + 0.01 * err3[l];",
                 "        if (!(deno > 0.0)) deno = 1.0;",
                 "        err[l] = fabs(h[l]) * err5[l] / sqrt(deno * dn);",
                 "    }"]
    lines += loop + [f"            ynew[o] = y[o] + {_combo(tab['b'][:s - 1], ref, 'h[l]')};"]
    lines += close
    lines += (["    if (cc) {"] + cloop
              + [f"                ycn[o] = yc[o] + {_combo(tab['b'][:s - 1], cref, 'h[l]')};"]
              + cclose)
    lines += rhs("ynew", "ycn", s - 1)
    lines += init + loop + norm("y", "ynew", ref, " " * 12) + close
    lines += (["    if (cc && cc->ec) {"] + cloop + norm("yc", "ycn", cref, " " * 16) + cclose)
    lines += final
    lines.append("}")
    return "\n".join(lines) + "\n"


def _dense_functions(name: str, P: str, n: int) -> list[str]:
    """The dense output of one state: NAME_<method>_prepare computes the coefficient vectors
    cont (DOP853: after its 3 extra stages) and NAME_<method>_dense evaluates them at theta.
    The carried components (cc not NULL: their old and new values in cc->yo1 and cc->yn1,
    stages in cc->ka1) get theirs in cc->cont1, and DOP853's extra stages evaluate their
    right-hand side too; NAME_<method>_dense_n evaluates them (nc components)."""
    def dp5_cont(m, y, ynew, k, cont):
        return [f"const double ydiff = {ynew}[i] - {y}[i];",
                f"const double bspl = h * {k}[i] - ydiff;",
                f"{cont}[i] = ydiff;",
                f"{cont}[{_at(1, m)} + i] = bspl;",
                f"{cont}[{_at(2, m)} + i] = ydiff - h * {k}[{_at(6, m)} + i] - bspl;",
                f"{cont}[{_at(3, m)} + i] = {_combo(DP5['d'], _aos(m, k))};"]

    def dop_cont(m, y, ynew, k, cont):
        return ([f"const double ydiff = {ynew}[i] - {y}[i];",
                 f"{cont}[i] = ydiff;",
                 f"{cont}[{_at(1, m)} + i] = h * {k}[i] - ydiff;",
                 f"{cont}[{_at(2, m)} + i] = 2.0 * ydiff - h * ({k}[{_at(12, m)} + i] + {k}[i]);"]
                + [f"{cont}[{_at(3 + r, m)} + i] = {_combo(DOP853['d'][r], _aos(m, k))};"
                   for r in range(4)])

    def loop(m, body, ind="    "):
        return ([f"{ind}for (i = 0; i < {m}; ++i) {{"] + [f"{ind}    {b}" for b in body]
                + [f"{ind}}}"])
    carried = ["    if (cc) {", "        const int nc = cc->nc;",
               "        const double *yc = cc->yo1, *ycn = cc->yn1;",
               "        double *kc = cc->ka1, *contc = cc->cont1;"]
    head = ("(int form, const double *y, const double *ynew, double *k,\n"
            f"        double h, const double *params, double *cont, {name}_carried *cc)\n{{")
    dp5_prepare = "\n".join(
        [f"static {P}_FN void {name}_dp5_prepare{head}", "    int i;", "    (void)form;",
         "    (void)params;"] + loop(n, dp5_cont(n, "y", "ynew", "k", "cont"))
        + carried + loop("nc", dp5_cont("nc", "yc", "ycn", "kc", "contc"), " " * 8)
        + ["    }", "}", ""])
    extra = []
    for e, row in enumerate(DOP853["a_extra"]):
        st = 13 + e
        extra.append(f"    for (i = 0; i < {n}; ++i) yt[i] = y[i] + {_combo(row, _aos(n))};")
        extra += ["    if (cc) {",
                  "        const int nc = cc->nc;",
                  "        for (i = 0; i < nc; ++i) cc->ytc1[i] = cc->yo1[i] + "
                  f"{_combo(row, _aos('nc', 'cc->ka1'))};",
                  "    }"]
        extra += ["    if (cc)",
                  f"        {name}_carry_rhs1(form, cc, yt, cc->ytc1, params, "
                  f"cc->ka1 + {st} * cc->nc, k + {st * n});",
                  "    else",
                  f"        {name}_rhs_form(form, yt, params, k + {st * n});"]
    dop_prepare = "\n".join(
        [f"static {P}_FN void {name}_dop853_prepare{head}", f"    double yt[{n}];", "    int i;"]
        + extra + loop(n, dop_cont(n, "y", "ynew", "k", "cont"))
        + carried + loop("nc", dop_cont("nc", "yc", "ycn", "kc", "contc"), " " * 8)
        + ["    }", "}", ""])

    def dp5_dense(suffix, m):
        arg = "int nc, " if suffix else ""
        return (f"static {P}_FN void {name}_dp5_dense{suffix}({arg}const double *y, "
                "const double *cont, double th, double *out)\n{\n"
                "    const double t1 = 1.0 - th;\n    int i;\n"
                f"    for (i = 0; i < {m}; ++i)\n"
                f"        out[i] = y[i] + th * (cont[i] + t1 * (cont[{_at(1, m)} + i] + th * "
                f"(cont[{_at(2, m)} + i] + t1 * cont[{_at(3, m)} + i])));\n}}\n")

    def dop_dense(suffix, m):
        arg = "int nc, " if suffix else ""
        nest = f"cont[{_at(6, m)} + i]"
        # out = y + th*(F0 + t1*(F1 + th*(F2 + t1*(F3 + th*(F4 + t1*(F5 + th*F6))))))
        for r in range(5, -1, -1):
            nest = f"cont[{_at(r, m)} + i] + {'th' if r % 2 == 1 else 't1'} * ({nest})"
        return (f"static {P}_FN void {name}_dop853_dense{suffix}({arg}const double *y, "
                "const double *cont, double th, double *out)\n{\n"
                "    const double t1 = 1.0 - th;\n    int i;\n"
                f"    for (i = 0; i < {m}; ++i)\n        out[i] = y[i] + th * ({nest});\n}}\n")
    return [dp5_prepare, dp5_dense("", n), dp5_dense("_n", "nc"), dop_prepare,
            dop_dense("", n), dop_dense("_n", "nc")]


def _mask_word(j: int) -> str:
    """The options field holding event j's bit: event_mask for the first MASK_BITS events,
    then the words of event_mask_more (only declared for specs with more events)."""
    return "opt->event_mask" if j < MASK_BITS else f"opt->event_mask_more[{j // MASK_BITS - 1}]"


def mask_words(n_events: int) -> int:
    """Words of event_mask_more a spec with n_events events declares (0: the field is
    absent, and the struct is the one of a spec with at most 64 events)."""
    return max(0, -(-n_events // MASK_BITS) - 1)


def integrator_context(ks) -> dict:
    """Template variables for templates/c_integrator.c.j2."""
    name, P = ks.name, ks.name.upper()
    n = 2 * ks.dim
    nev, ndom = len(ks.events), len(ks.domain)
    nstop = nev + ndom
    npar = len(ks.parameters)
    stop_body = []
    if nstop:
        stop_body.append(f"{name}_stops(y, params, g);")
        for j in range(nev):
            stop_body.append(f"if (!(({_mask_word(j)} >> {j % MASK_BITS}) & 1ULL)) g[{j}] = 1.0;")
        if not nev:
            stop_body.append("(void)opt;")
    else:
        stop_body += ["(void)y;", "(void)params;", "(void)opt;", "g[0] = 1.0;"]
    stop_code = (f"static {P}_FN int {name}_stop_code(int j)\n{{\n"
                 f"    return j < {nev} ? {EVENT_BASE} + j : {DOMAIN};\n}}\n")

    def ctl(tab):
        return {"beta": _lit(tab["beta"]),
                "fac11": _error_power(name, tab["expo1"], "xe"),
                "predictive": "1" if tab["predictive"] else "0",
                "facc1": _lit(1.0 / tab["fac_min"]), "facc2": _lit(1.0 / tab["fac_max"])}

    steps = [stop_code] + [_stages_function(name, P, tab, n, lanes)
                           for lanes in (LANES, 1) for tab in (DP5, DOP853)]
    steps += _dense_functions(name, P, n)
    # a lane's parameters: a copy of its state's vector (lane l's at lp + l * npar)
    lane_params = ([f"for (j = 0; j < {npar}; ++j) "
                    "lp[j] = job->params[r * job->params_stride + j];"] if npar else [])
    return {"P": P, "name": name, "n": n, "dim": ks.dim, "nstop": nstop, "nstop1": max(nstop, 1),
            "kmax": KMAX, "contmax": CONTMAX, "lanes": LANES, "few": FEW, "soa_stages": SOA_STAGES,
            "npar": npar, "npar1": max(npar, 1), "lane_params": lane_params,
            "stages": {"dp5": DP5["stages"], "dop853": DOP853["stages"]},
            "root_tol": _lit(ROOT_REL_TOL),
            "hmin_rel": _lit(HMIN_REL), "dp5": ctl(DP5), "dop853": ctl(DOP853),
            "stop_body": stop_body, "step_functions": steps}


def options_struct(ks, restrict_free: bool = False) -> str:
    """The options struct declaration (same text for the header and cffi's cdef). A spec
    with more than 64 events gets one more field, event_mask_more, at the end."""
    words = mask_words(len(ks.events))
    more = (f"    unsigned long long event_mask_more[{words}]; /* bit b of word w: event "
            "64 (w + 1) + b */\n") if words else ""
    return (f"typedef struct {ks.name}_integrator_options {{\n"
            "    double rtol;                /* relative tolerance */\n"
            "    double atol;                /* absolute tolerance */\n"
            "    long max_steps;             /* accepted steps per state */\n"
            f"    int method;                 /* {ks.name.upper()}_METHOD_DP5 or _DOP853 */\n"
            f"    int form;                   /* {ks.name.upper()}_FORM_GEODESIC or _HAMILTON */\n"
            "    unsigned long long event_mask; /* bit k set: event k (< 64) of the spec is active */\n"
            "    int threads;                /* OpenMP threads; <= 0: the OpenMP default */\n"
            + more +
            f"}} {ks.name}_integrator_options;")


def carry_struct(ks) -> str:
    """The carried-quantities struct declaration (header and cffi's cdef)."""
    return (f"typedef struct {ks.name}_carry_options {{\n"
            "    int n_transport;        /* m_T vectors carried by parallel transport, "
            f"{ks.dim} components each */\n"
            "    int n_variations;       /* m_V state-space directions (tangent equations), "
            f"{2 * ks.dim} components each */\n"
            f"    int n_param;            /* parameter sensitivities, {2 * ks.dim} components "
            "each */\n"
            "    const int *param_index; /* [n_param]: which parameter each sensitivity is "
            "for */\n"
            "    int error_control;      /* nonzero: the carried components join the error "
            "norm; 0: the steps are a plain run's, bit for bit */\n"
            f"}} {ks.name}_carry_options;")


def integrate_carry_prototype(ks, restrict: str) -> str:
    """NAME_integrate_carry's prototype: NAME_integrate_interruptible's arguments with the
    carried quantities' options, initial values c0, results c_out and samples c_samples_out."""
    r, name = restrict, ks.name
    return (f"void {name}_integrate_carry(size_t n, const double *{r} y0, const double *{r} c0, "
            f"double lam_end, const double *{r} params, size_t params_stride, "
            f"const {name}_integrator_options *{r} opt, const {name}_carry_options *{r} carry, "
            f"size_t n_samples, const double *{r} samples, double *{r} y_out, "
            f"double *{r} c_out, double *{r} lam_out, int *{r} status, long *{r} steps, "
            f"double *{r} samples_out, double *{r} c_samples_out, "
            "const volatile int *interrupt)")


def integrate_prototype(ks, restrict: str, interruptible: bool = False) -> str:
    """NAME_integrate's prototype; interruptible: NAME_integrate_interruptible's, the same
    with a last argument, a flag that stops the run when it becomes nonzero."""
    r = restrict
    name = f"{ks.name}_integrate_interruptible" if interruptible else f"{ks.name}_integrate"
    flag = ", const volatile int *interrupt" if interruptible else ""
    return (f"void {name}(size_t n, const double *{r} y0, double lam_end, "
            f"const double *{r} params, size_t params_stride, "
            f"const {ks.name}_integrator_options *{r} opt, size_t n_samples, "
            f"const double *{r} samples, double *{r} y_out, double *{r} lam_out, "
            f"int *{r} status, long *{r} steps, double *{r} samples_out{flag})")
