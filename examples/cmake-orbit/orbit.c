/* Integrates the orbits of three demo relay probes around the invented star "Tamsin" in one
 * batch call of the integrator metricc generated (tamsin_integrate), and prints the results
 * as "key = value" lines. The scenario and all its numbers are made up for the demo.
 *
 * Each probe starts in the star's equatorial plane (theta = pi/2) at its own radius, moving
 * sideways (dr/dtau = 0) with specific angular momentum L tilted by its inclination out of
 * the plane; dt/dtau follows from g(u, u) = -1 with the metric kernel, using the parameter
 * values the spec declares (so editing the spec changes the orbits). */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>

#include "tamsin.h"

#define D TAMSIN_DIM
#define N (2 * D)             /* state: t, r, theta, phi, then their tau-derivatives */
#define NPROBES 3
#define L_SPECIFIC 4.1        /* specific angular momentum of every probe */
#define LAM_END 1500.0        /* proper time to integrate */

static const char *const probe_names[NPROBES] = {"wren", "finch", "lark"};
static const double probe_r0[NPROBES] = {9.0, 11.0, 13.0};
static const double probe_incl_deg[NPROBES] = {20.0, 45.0, 70.0};

static const char *status_name(int s)
{
    switch (s) {
    case TAMSIN_STATUS_DONE: return "done";
    case TAMSIN_STATUS_DOMAIN: return "domain";
    case TAMSIN_STATUS_MAX_STEPS: return "max_steps";
    case TAMSIN_STATUS_STEP_UNDERFLOW: return "step_underflow";
    case TAMSIN_STATUS_NOT_FINITE: return "not_finite";
    case TAMSIN_STATUS_EVENT(TAMSIN_EVENT_surface): return "surface";
    default: return "unknown";
    }
}

int main(void)
{
    const double pi = acos(-1.0);
    double p[TAMSIN_NPARAMS], g[D * D], y0[NPROBES * N], y[NPROBES * N], lam[NPROBES];
    double c0[2], c1[2];
    int status[NPROBES], i, j, ok = 1;
    long steps[NPROBES];
    tamsin_integrator_options opt;

    tamsin_default_params(p);
    for (i = 0; i < NPROBES; ++i) {
        double *s = y0 + i * N, r0 = probe_r0[i], incl = probe_incl_deg[i] * pi / 180.0;
        s[0] = 0.0; s[1] = r0; s[2] = 0.5 * pi; s[3] = 0.0;
        s[5] = 0.0;
        s[6] = -L_SPECIFIC * sin(incl) / (r0 * r0);
        s[7] = L_SPECIFIC * cos(incl) / (r0 * r0);
        tamsin_metric(s, p, g);
        s[4] = sqrt(-(1.0 + g[2 * D + 2] * s[6] * s[6] + g[3 * D + 3] * s[7] * s[7]) / g[0]);
    }

    opt.rtol = 1e-11;
    opt.atol = 1e-12;
    opt.max_steps = 100000;
    opt.method = TAMSIN_METHOD_DOP853;
    opt.form = TAMSIN_FORM_GEODESIC;
    opt.event_mask = 1ul << TAMSIN_EVENT_surface;
    opt.threads = 0;   /* OpenMP default when built with OpenMP; serial otherwise */

    /* params_stride = 0: all probes share one parameter vector. */
    tamsin_integrate(NPROBES, y0, LAM_END, p, 0, &opt, 0, NULL, y, lam, status, steps, NULL);

    printf("spec = tamsin\nM = %.17g\nR_surf = %.17g\n", p[TAMSIN_PARAM_M], p[TAMSIN_PARAM_R_surf]);
    printf("lam_end = %.17g\nrtol = %.17g\natol = %.17g\n", LAM_END, opt.rtol, opt.atol);
    printf("probes =");
    for (i = 0; i < NPROBES; ++i)
        printf(" %s", probe_names[i]);
    printf("\n");
    for (i = 0; i < NPROBES; ++i) {
        const double *s0 = y0 + i * N, *s = y + i * N;
        tamsin_conserved(s0, p, c0);   /* p_t, p_phi */
        tamsin_conserved(s, p, c1);
        printf("%s.y0 =", probe_names[i]);
        for (j = 0; j < N; ++j)
            printf(" %.17g", s0[j]);
        printf("\n%s.status = %s\n%s.steps = %ld\n%s.lam = %.17g\n", probe_names[i],
               status_name(status[i]), probe_names[i], steps[i], probe_names[i], lam[i]);
        printf("%s.r = %.17g\n%s.theta = %.17g\n%s.phi = %.17g\n", probe_names[i], s[1],
               probe_names[i], s[2], probe_names[i], s[3]);
        printf("%s.energy = %.17g\n%s.energy_drift = %.3e\n%s.lz_drift = %.3e\n",
               probe_names[i], -c0[0], probe_names[i], fabs(c1[0] - c0[0]), probe_names[i],
               fabs(c1[1] - c0[1]));
        ok &= status[i] == TAMSIN_STATUS_DONE;
    }
    return ok ? EXIT_SUCCESS : EXIT_FAILURE;
}
