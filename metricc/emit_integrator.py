"""The batch integrator's C source, generated next to each spec's kernels.

The Runge-Kutta stages are unrolled from the tableaus in :mod:`metricc.tableaus` (only
non-zero coefficients are printed); the driver around them is layout in
``templates/c_integrator.c.j2``. The same algorithm in NumPy is :mod:`metricc.integrate`.
"""
from __future__ import annotations

from .integrate import DOMAIN, EVENT_BASE, HMIN_REL, ROOT_REL_TOL
from .printing import number_literal
from .tableaus import DOP853, DP5

KMAX = 16      # stages kept (DOP853: 12 + f(y_new) + 3 for the dense output)
CONTMAX = 7    # dense-output coefficient vectors (DOP853: 7, DP5: 4)


def _lit(v) -> str:
    return number_literal(float(v))


def _combo(coeffs, n: int, scale: str = "h") -> str:
    """'h * (c0*k[0*n + i] + ...)' over the non-zero coefficients."""
    terms = [f"{_lit(c)} * k[{j * n} + i]" for j, c in enumerate(coeffs) if float(c) != 0.0]
    inner = " + ".join(terms) if terms else "0.0"
    return f"{scale} * ({inner})" if scale else f"({inner})"


def _step_function(name: str, P: str, tab: dict, n: int) -> str:
    tag = tab["name"]
    s = tab["stages"]
    lines = [f"static {P}_FN double {name}_{tag}_step(int form, const double *y, double h, "
             "const double *params, double rtol, double atol, double *k, double *ynew)", "{",
             f"    double yt[{n}];", "    int i;"]
    if tag == "dp5":
        lines.append("    double err = 0.0;")
    else:
        lines.append("    double err5 = 0.0, err3 = 0.0, deno;")
    for st in range(1, s - 1):
        lines.append(f"    for (i = 0; i < {n}; ++i) yt[i] = y[i] + {_combo(tab['a'][st], n)};")
        lines.append(f"    {name}_rhs_form(form, yt, params, k + {st * n});")
    lines.append(f"    for (i = 0; i < {n}; ++i) ynew[i] = y[i] + {_combo(tab['b'][:s - 1], n)};")
    lines.append(f"    {name}_rhs_form(form, ynew, params, k + {(s - 1) * n});")
    lines.append(f"    for (i = 0; i < {n}; ++i) {{")
    # a comparison rather than fmax: fmax is a libm call when NaN semantics must be kept,
    # and a NaN here makes the error non-finite (the step is rejected) either way
    lines.append("        const double ay = fabs(y[i]), an = fabs(ynew[i]);")
    lines.append("        const double sk = atol + rtol * (ay > an ? ay : an);")
    if tag == "dp5":
        lines.append(f"        const double e = {_combo(tab['e'], n)} / sk;")
        lines.append("        err += e * e;")
        lines.append("    }")
        lines.append(f"    return sqrt(err / {n}.0);")
    else:
        lines.append(f"        const double e5 = {_combo(tab['e5'], n, '')} / sk;")
        lines.append(f"        const double e3 = {_combo(tab['e3'], n, '')} / sk;")
        lines.append("        err5 += e5 * e5;")
        lines.append("        err3 += e3 * e3;")
        lines.append("    }")
        lines.append("    deno = err5 + 0.01 * err3;")
        lines.append("    if (!(deno > 0.0)) deno = 1.0;")
        lines.append(f"    return fabs(h) * err5 / sqrt(deno * {n}.0);")
    lines.append("}")
    return "\n".join(lines) + "\n"


def _dense_functions(name: str, P: str, n: int) -> list[str]:
    d5 = DP5["d"]
    dp5_prepare = f"""static {P}_FN void {name}_dp5_prepare(int form, const double *y, const double *ynew, double *k,
                           double h, const double *params, double *cont)
{{
    int i;
    (void)form;
    (void)params;
    for (i = 0; i < {n}; ++i) {{
        const double ydiff = ynew[i] - y[i];
        const double bspl = h * k[i] - ydiff;
        cont[i] = ydiff;
        cont[{n} + i] = bspl;
        cont[{2 * n} + i] = ydiff - h * k[{6 * n} + i] - bspl;
        cont[{3 * n} + i] = {_combo(d5, n)};
    }}
}}
"""
    dp5_dense = f"""static {P}_FN void {name}_dp5_dense(const double *y, const double *cont, double th, double *out)
{{
    const double t1 = 1.0 - th;
    int i;
    for (i = 0; i < {n}; ++i)
        out[i] = y[i] + th * (cont[i] + t1 * (cont[{n} + i] + th * (cont[{2 * n} + i] + t1 * cont[{3 * n} + i])));
}}
"""
    extra = []
    for e, row in enumerate(DOP853["a_extra"]):
        st = 13 + e
        extra.append(f"    for (i = 0; i < {n}; ++i) yt[i] = y[i] + {_combo(row, n)};")
        extra.append(f"    {name}_rhs_form(form, yt, params, k + {st * n});")
    dcoef = "\n".join(f"        cont[{(3 + r) * n} + i] = {_combo(DOP853['d'][r], n)};"
                      for r in range(4))
    dop_prepare = (f"static {P}_FN void {name}_dop853_prepare(int form, const double *y, "
                   "const double *ynew, double *k,\n"
                   "                              double h, const double *params, double *cont)\n"
                   "{\n"
                   f"    double yt[{n}];\n    int i;\n" + "\n".join(extra) + "\n"
                   f"    for (i = 0; i < {n}; ++i) {{\n"
                   "        const double ydiff = ynew[i] - y[i];\n"
                   "        cont[i] = ydiff;\n"
                   f"        cont[{n} + i] = h * k[i] - ydiff;\n"
                   f"        cont[{2 * n} + i] = 2.0 * ydiff - h * (k[{12 * n} + i] + k[i]);\n"
                   f"{dcoef}\n    }}\n}}\n")
    nest = f"cont[{6 * n} + i]"
    # out = y + th*(F0 + t1*(F1 + th*(F2 + t1*(F3 + th*(F4 + t1*(F5 + th*F6))))))
    for r in range(5, -1, -1):
        nest = f"cont[{r * n} + i] + {'th' if r % 2 == 1 else 't1'} * ({nest})"
    dop_dense = (f"static {P}_FN void {name}_dop853_dense(const double *y, const double *cont, "
                 "double th, double *out)\n{\n    const double t1 = 1.0 - th;\n    int i;\n"
                 f"    for (i = 0; i < {n}; ++i)\n        out[i] = y[i] + th * ({nest});\n}}\n")
    return [dp5_prepare, dp5_dense, dop_prepare, dop_dense]


def integrator_context(ks) -> dict:
    """Template variables for templates/c_integrator.c.j2."""
    name, P = ks.name, ks.name.upper()
    n = 2 * ks.dim
    nev, ndom = len(ks.events), len(ks.domain)
    nstop = nev + ndom
    stop_body = []
    if nstop:
        stop_body.append(f"{name}_stops(y, params, g);")
        for j in range(nev):
            stop_body.append(f"if (!((mask >> {j}) & 1UL)) g[{j}] = 1.0;")
        if not nev:
            stop_body.append("(void)mask;")
    else:
        stop_body += ["(void)y;", "(void)params;", "(void)mask;", "g[0] = 1.0;"]
    stop_code = (f"static {P}_FN int {name}_stop_code(int j)\n{{\n"
                 f"    return j < {nev} ? {EVENT_BASE} + j : {DOMAIN};\n}}\n")

    def ctl(tab):
        return {"expo1": _lit(tab["expo1"]), "beta": _lit(tab["beta"]),
                "facc1": _lit(1.0 / tab["fac_min"]), "facc2": _lit(1.0 / tab["fac_max"])}

    steps = [stop_code, _step_function(name, P, DP5, n), _step_function(name, P, DOP853, n)]
    steps += _dense_functions(name, P, n)
    npar = len(ks.parameters)
    return {"P": P, "name": name, "n": n, "nstop": nstop, "nstop1": max(nstop, 1),
            "kmax": KMAX, "contmax": CONTMAX, "root_tol": _lit(ROOT_REL_TOL),
            "hmin_rel": _lit(HMIN_REL), "dp5": ctl(DP5), "dop853": ctl(DOP853),
            "stop_body": stop_body, "step_functions": steps,
            "param_ptr": "params + i * params_stride" if npar else "params",
            "driver_prologue": [] if npar else ["(void)params_stride;"]}


def options_struct(ks, restrict_free: bool = False) -> str:
    """The options struct declaration (same text for the header and cffi's cdef)."""
    return (f"typedef struct {ks.name}_integrator_options {{\n"
            "    double rtol;                /* relative tolerance */\n"
            "    double atol;                /* absolute tolerance */\n"
            "    long max_steps;             /* accepted steps per state */\n"
            f"    int method;                 /* {ks.name.upper()}_METHOD_DP5 or _DOP853 */\n"
            f"    int form;                   /* {ks.name.upper()}_FORM_GEODESIC or _HAMILTON */\n"
            "    unsigned long event_mask;   /* bit k set: event k of the spec is active */\n"
            "    int threads;                /* OpenMP threads; <= 0: the OpenMP default */\n"
            f"}} {ks.name}_integrator_options;")


def integrate_prototype(ks, restrict: str) -> str:
    r = restrict
    return (f"void {ks.name}_integrate(size_t n, const double *{r} y0, double lam_end, "
            f"const double *{r} params, size_t params_stride, "
            f"const {ks.name}_integrator_options *{r} opt, size_t n_samples, "
            f"const double *{r} samples, double *{r} y_out, double *{r} lam_out, "
            f"int *{r} status, long *{r} steps, double *{r} samples_out)")
