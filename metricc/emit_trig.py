"""sin and cos for the generated C: the helpers every C kernel calls instead of libm's.

libm's sin and cos are opaque calls, so a loop over states that needs them stays scalar, and in
the Kerr right-hand sides one sin/cos pair costs about as much as all the arithmetic. The
generated files therefore carry their own, written in plain arithmetic that compilers vectorise:

* reduction x = k pi/2 + r, k the nearest integer to x 2/pi (found by adding and subtracting
  1.5 2^52, which rounds to an integer in round-to-nearest), with pi/2 split in three parts
  (Cody & Waite's method): k P1 and k P2 are exact for |k| < 2^20, and the rounding error of
  the last part is carried as a tail e of r = r_hi + e;
* sin r and cos r on |r| <= pi/4 (a little more near the quadrant boundaries) from their Taylor
  series to r^17 and r^18, whose next terms are below 1e-19 relative there, evaluated by
  Estrin's scheme (short dependency chains: a scalar call is bound by their latency); cos
  adds the rounding error of 1 - r^2/2 back in;
* the quadrant (k mod 4) picks and signs the two results with integer bit operations, so no
  branch and no floating-point rounding is involved.

For 0 < |x| <= 2^19 the results are within 2 ulp of the exact values: tests/test_trig.py checks
that bound against mpmath at random, large and near-multiple-of-pi/2 arguments, where the
largest error seen is 1.34 ulp (libm's is 0.5). Zero (whose sign the polynomial would lose),
|x| > 2^19, infinities and NaN go to libm. The scalar functions (``NAME_sin``) test the range
and branch; the tiled batch kernels run the polynomial for a whole tile in a vectorised loop
and then redo the out-of-range lanes with libm, which gives each state exactly the scalar
function's bits.

Define NAME_LIBM_TRIG to use libm's sin and cos throughout. The polynomial also steps aside by
itself where its arithmetic would not be exact IEEE double: under -ffast-math (the
reassociation would cancel the rounding trick) and where FLT_EVAL_METHOD is not 0 (x87).
"""
from __future__ import annotations

from math import factorial

import sympy as sp

from .printing import number_literal

TRIG_FUNCTIONS = ("sin", "cos")

# pi/2 = PIO2_1 + PIO2_2 + PIO2_3 + O(2^-122): PIO2_1 and PIO2_2 are the leading 33 and next 33
# bits of pi/2, PIO2_3 the next 53 rounded (computed with mpmath at 200 bits; tests/test_trig.py
# recomputes them).
PIO2_1 = 1.5707963267341256
PIO2_2 = 6.077100506303966e-11
PIO2_3 = 2.0222662487959506e-21
TWO_OVER_PI = 0.6366197723675814
ROUND_MAGIC = 6755399441055744.0      # 1.5 * 2^52
RANGE = 524288.0                      # 2^19: |k| <= 2^19 2/pi < 2^19, k PIO2_1 exact
SIN_DEGREE = 17
COS_DEGREE = 18


def function_names(ks) -> dict:
    """Printer overrides: sympy function name -> the generated file's C function."""
    return {f: f"{ks.name}_{f}" for f in TRIG_FUNCTIONS}


def poly_names(ks) -> dict:
    """Printer overrides for the vectorised tile loops: the polynomial without the range test."""
    return {f: f"{ks.name}_{f}_poly" for f in TRIG_FUNCTIONS}


def is_trig_call(e) -> bool:
    """True for sin(x) and cos(x), the calls the helpers replace."""
    return isinstance(e, sp.Function) and type(e).__name__ in TRIG_FUNCTIONS


def uses_trig(ks) -> bool:
    """Whether any kernel of ``ks`` calls sin or cos."""
    for k in ks.kernels:
        exprs = [st.expr for st in k.steps if hasattr(st, "expr")] + list(k.outputs)
        for st in k.steps:
            if not hasattr(st, "expr"):
                exprs += list(st.matrix) + [e for col in st.rhs for e in col]
        for e in exprs:
            if any(is_trig_call(node) for node in sp.preorder_traversal(e)):
                return True
    return False


def _estrin(coeffs: list[float], powers: list[str]) -> str:
    """c0 + c1 x + c2 x^2 + ... as C text by Estrin's scheme: pairs (c0 + c1 x), combined
    pairwise with x^2, then x^4, ...; ``powers`` names x, x^2, x^4, .... Fewer dependent
    steps than Horner's rule (the scalar kernels are bound by that latency) for about the
    same number of operations."""
    terms = [f"({number_literal(c)})" if c < 0 else number_literal(c) for c in coeffs]
    level = 0
    while len(terms) > 1:
        x = powers[level]
        terms = [f"({terms[i]} + {x} * {terms[i + 1]})" if i + 1 < len(terms) else terms[i]
                 for i in range(0, len(terms), 2)]
        level += 1
    return terms[0]


def _series(first: int, last: int) -> list[float]:
    """The Taylor coefficients of sin (odd n) or cos (even n), (-1)^(n div 2) / n!, for
    n = first, first + 2, ..., last (each the double nearest the exact fraction)."""
    return [(-1) ** (n // 2) / factorial(n) for n in range(first, last + 1, 2)]


def helpers(ks, prefix: str) -> str:
    """The C text of NAME_sin, NAME_cos, their _poly versions and NAME_trig_in_range."""
    n, P = ks.name, prefix
    lit = number_literal
    powers = ["z", "z2", "z4"]                 # the C text below defines these three
    assert max(len(_series(3, SIN_DEGREE)), len(_series(4, COS_DEGREE))) <= 2 ** len(powers)
    sin_poly = _estrin(_series(3, SIN_DEGREE), powers)   # sin r = r + r z (-1/3! + z/5! ...)
    cos_poly = _estrin(_series(4, COS_DEGREE), powers)   # cos r = 1 - z/2 + z^2 (1/4! - ...)
    return f"""/* sin and cos of the kernels: a polynomial that loops over states vectorise, within 2 ulp
 * for 0 < |x| <= 2^19, libm for the other arguments; define {P}_LIBM_TRIG to use libm
 * throughout (metricc's emit_trig module documents the method). */
#include <float.h>
#include <stdint.h>
#include <string.h>
#if defined(__GNUC__)
#define {P}_TRIG_INLINE __attribute__((always_inline)) inline
#elif defined(_MSC_VER)
#define {P}_TRIG_INLINE __inline
#else
#define {P}_TRIG_INLINE
#endif
#if defined({P}_LIBM_TRIG) || defined(__FAST_MATH__) || (defined(FLT_EVAL_METHOD) && FLT_EVAL_METHOD != 0)
static {P}_FN {P}_TRIG_INLINE int {n}_trig_in_range(double x) {{ (void)x; return 1; }}
static {P}_FN {P}_TRIG_INLINE double {n}_sin_poly(double x) {{ return sin(x); }}
static {P}_FN {P}_TRIG_INLINE double {n}_cos_poly(double x) {{ return cos(x); }}
#else
static {P}_FN {P}_TRIG_INLINE int {n}_trig_in_range(double x)
{{
    return fabs(x) <= {lit(RANGE)} && x != 0.0;
}}
/* sin x and cos x for 0 < |x| <= 2^19 (no range test: for a vectorised loop). */
static {P}_FN {P}_TRIG_INLINE void {n}_sincos_poly(double x, double *s, double *c)
{{
    const double t = x * {lit(TWO_OVER_PI)} + {lit(ROUND_MAGIC)};
    const double kd = t - {lit(ROUND_MAGIC)};               /* nearest integer to x 2/pi */
    const double rh = (x - kd * {lit(PIO2_1)}) - kd * {lit(PIO2_2)};
    const double rt = kd * {lit(PIO2_3)};
    const double r = rh - rt;
    const double e = (rh - r) - rt;                       /* r + e = x - k pi/2 */
    const double z = r * r, z2 = z * z, z4 = z2 * z2;
    const double ps = r + (e + r * z * ({sin_poly}));
    const double hz = 0.5 * z, w = 1.0 - hz;
    const double pc = w + (((1.0 - w) - hz) - r * e + z2 * ({cos_poly}));
    uint64_t q, sb, cb, odd;
    memcpy(&q, &t, sizeof q);                             /* k mod 4 in the low bits */
    memcpy(&sb, &ps, sizeof sb);
    memcpy(&cb, &pc, sizeof cb);
    odd = (uint64_t)0 - (q & 1u);                         /* all ones for odd k: swap */
    {{
        const uint64_t s_bits = ((cb & odd) | (sb & ~odd)) ^ ((q & 2u) << 62);
        const uint64_t c_bits = ((sb & odd) | (cb & ~odd)) ^ (((q + 1u) & 2u) << 62);
        memcpy(s, &s_bits, sizeof s_bits);
        memcpy(c, &c_bits, sizeof c_bits);
    }}
}}
static {P}_FN {P}_TRIG_INLINE double {n}_sin_poly(double x)
{{
    double s, c;
    {n}_sincos_poly(x, &s, &c);
    return s;
}}
static {P}_FN {P}_TRIG_INLINE double {n}_cos_poly(double x)
{{
    double s, c;
    {n}_sincos_poly(x, &s, &c);
    return c;
}}
#endif
static {P}_FN {P}_TRIG_INLINE double {n}_sin(double x)
{{
    return {n}_trig_in_range(x) ? {n}_sin_poly(x) : sin(x);
}}
static {P}_FN {P}_TRIG_INLINE double {n}_cos(double x)
{{
    return {n}_trig_in_range(x) ? {n}_cos_poly(x) : cos(x);
}}
"""
