/* Integrates one timelike orbit of the demo probe "Kite" around the invented star "Ember"
 * with the integrator metricc generated next to the kernels (gen/ember.c), and prints a few
 * numbers as "key = value" lines. The scenario and all its numbers are made up for the demo.
 *
 * The probe starts at r = R0 moving purely sideways (dr/dtau = 0) with angular rate
 * dphi/dtau = UPHI0; dt/dtau follows from g(u, u) = -1 with the metric kernel, using the
 * parameter values the spec declares (so editing the spec changes the orbit). */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>

#include "ember.h"

#define N (2 * EMBER_DIM)     /* state: t, r, phi, dt/dtau, dr/dtau, dphi/dtau */
#define R0 10.0               /* start radius (units of the default mass) */
#define UPHI0 0.042           /* start angular rate dphi/dtau */
#define LAM_END 2000.0        /* proper time to integrate */
#define NSAMPLES 401          /* samples for the radial range */

static const char *status_name(int s)
{
    switch (s) {
    case EMBER_STATUS_DONE: return "done";
    case EMBER_STATUS_DOMAIN: return "domain";
    case EMBER_STATUS_MAX_STEPS: return "max_steps";
    case EMBER_STATUS_STEP_UNDERFLOW: return "step_underflow";
    case EMBER_STATUS_NOT_FINITE: return "not_finite";
    case EMBER_STATUS_EVENT(EMBER_EVENT_surface): return "surface";
    default: return "unknown";
    }
}

int main(void)
{
    double p[EMBER_NPARAMS], g[EMBER_DIM * EMBER_DIM], y0[N], y[N], c0[2], c1[2], n0, n1;
    double samples[NSAMPLES], sampled[NSAMPLES * N], lam, r_min = INFINITY, r_max = 0.0;
    int status, i, got = 0;
    long steps;
    ember_integrator_options opt;

    ember_default_params(p);

    /* Initial state: position, then dt/dtau from the normalisation g_tt ut^2 + g_pp uphi^2 = -1. */
    y0[0] = 0.0; y0[1] = R0; y0[2] = 0.0;
    y0[4] = 0.0; y0[5] = UPHI0;
    ember_metric(y0, p, g);
    y0[3] = sqrt(-(1.0 + g[2 * EMBER_DIM + 2] * UPHI0 * UPHI0) / g[0]);

    opt.rtol = 1e-12;
    opt.atol = 1e-12;
    opt.max_steps = 100000;
    opt.method = EMBER_METHOD_DOP853;
    opt.form = EMBER_FORM_GEODESIC;
    opt.event_mask = 1ul << EMBER_EVENT_surface;
    opt.threads = 1;
    for (i = 0; i < NSAMPLES; ++i)
        samples[i] = LAM_END * i / (NSAMPLES - 1);   /* 0 .. LAM_END */

    ember_integrate(1, y0, LAM_END, p, 0, &opt, NSAMPLES, samples, y, &lam, &status, &steps,
                    sampled);

    for (i = 0; i < NSAMPLES; ++i) {
        double r = sampled[i * N + 1];
        if (isnan(r))
            continue;
        ++got;
        if (r < r_min) r_min = r;
        if (r > r_max) r_max = r;
    }
    ember_conserved(y0, p, c0);   /* p_t, p_phi */
    ember_conserved(y, p, c1);
    ember_norm(y0, p, &n0);
    ember_norm(y, p, &n1);

    printf("spec = ember\n");
    printf("M = %.17g\n", p[EMBER_PARAM_M]);
    printf("R_surf = %.17g\n", p[EMBER_PARAM_R_surf]);
    printf("y0 =");
    for (i = 0; i < N; ++i)
        printf(" %.17g", y0[i]);
    printf("\nlam_end = %.17g\nrtol = %.17g\natol = %.17g\n", LAM_END, opt.rtol, opt.atol);
    printf("status = %s\n", status_name(status));
    printf("steps = %ld\n", steps);
    printf("lam = %.17g\n", lam);
    printf("t = %.17g\nr = %.17g\nphi = %.17g\n", y[0], y[1], y[2]);
    printf("orbits = %.6f\n", y[2] / (2.0 * acos(-1.0)));
    printf("samples = %d\nr_min = %.17g\nr_max = %.17g\n", got, r_min, r_max);
    printf("energy = %.17g\nangular_momentum = %.17g\n", -c0[0], c0[1]);
    printf("energy_drift = %.3e\nnorm_drift = %.3e\n", fabs(c1[0] - c0[0]), fabs(n1 - n0));
    return status == EMBER_STATUS_DONE ? EXIT_SUCCESS : EXIT_FAILURE;
}
