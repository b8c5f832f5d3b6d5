/* Integrates the orbit of the demo satellite "Beacon-7" around the invented star "Orrin" with
 * the GNU Scientific Library's ODE driver (gsl_odeiv2, Prince-Dormand 8(9), rk8pd); the right-
 * hand side is the geodesic kernel metricc generated, in GSL's signature
 * (orrin_gsl_geodesic_rhs). Prints a few numbers as "key = value" lines. The scenario and all
 * its numbers are made up for the demo.
 *
 * The satellite starts at rho = RHO0 moving sideways (drho/dtau = 0) with angular rate
 * dphi/dtau = UPHI0; dt/dtau follows from g(u, u) = -1 with the metric kernel, using the
 * parameter values the spec declares (so editing the spec changes the orbit). */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>

#include <gsl/gsl_errno.h>
#include <gsl/gsl_odeiv2.h>

#include "orrin.h"

#define N (2 * ORRIN_DIM)     /* state: t, rho, phi, dt/dtau, drho/dtau, dphi/dtau */
#define RHO0 12.0             /* start radius (isotropic) */
#define UPHI0 0.0230          /* start angular rate dphi/dtau */
#define LAM_END 1200.0        /* proper time to integrate */
#define NOUT 200              /* output points for the radial range */
#define EPS 1e-13             /* GSL driver: absolute and relative tolerance */

int main(void)
{
    double p[ORRIN_NPARAMS], g[ORRIN_DIM * ORRIN_DIM], y0[N], y[N], c0[2], c1[2], n0, n1;
    double lam = 0.0, rho_min = INFINITY, rho_max = 0.0;
    int i, rc = GSL_SUCCESS;
    gsl_odeiv2_system sys;
    gsl_odeiv2_driver *driver;

    orrin_default_params(p);
    y0[0] = 0.0; y0[1] = RHO0; y0[2] = 0.0;
    y0[4] = 0.0; y0[5] = UPHI0;
    orrin_metric(y0, p, g);
    y0[3] = sqrt(-(1.0 + g[2 * ORRIN_DIM + 2] * UPHI0 * UPHI0) / g[0]);
    for (i = 0; i < N; ++i)
        y[i] = y0[i];

    sys.function = orrin_gsl_geodesic_rhs;   /* int f(double t, const double y[], double dydt[], void *params) */
    sys.jacobian = NULL;                     /* rk8pd is explicit: no Jacobian needed */
    sys.dimension = N;
    sys.params = p;                          /* the parameter vector double[ORRIN_NPARAMS] */
    driver = gsl_odeiv2_driver_alloc_y_new(&sys, gsl_odeiv2_step_rk8pd, 1e-3, EPS, EPS);
    gsl_set_error_handler_off();

    for (i = 1; i <= NOUT && rc == GSL_SUCCESS; ++i) {
        rc = gsl_odeiv2_driver_apply(driver, &lam, LAM_END * i / NOUT, y);
        if (y[1] < rho_min) rho_min = y[1];
        if (y[1] > rho_max) rho_max = y[1];
    }
    gsl_odeiv2_driver_free(driver);

    orrin_conserved(y0, p, c0);   /* p_t, p_phi */
    orrin_conserved(y, p, c1);
    orrin_norm(y0, p, &n0);
    orrin_norm(y, p, &n1);

    printf("spec = orrin\nM = %.17g\ny0 =", p[ORRIN_PARAM_M]);
    for (i = 0; i < N; ++i)
        printf(" %.17g", y0[i]);
    printf("\nlam_end = %.17g\neps = %.17g\n", LAM_END, EPS);
    printf("status = %s\n", rc == GSL_SUCCESS ? "done" : gsl_strerror(rc));
    printf("lam = %.17g\n", lam);
    printf("t = %.17g\nrho = %.17g\nphi = %.17g\n", y[0], y[1], y[2]);
    printf("r_areal = %.17g\n", y[1] * pow(1.0 + p[ORRIN_PARAM_M] / (2.0 * y[1]), 2));
    printf("rho_min = %.17g\nrho_max = %.17g\n", rho_min, rho_max);
    printf("energy = %.17g\nangular_momentum = %.17g\n", -c0[0], c0[1]);
    printf("energy_drift = %.3e\nnorm_drift = %.3e\n", fabs(c1[0] - c0[0]), fabs(n1 - n0));
    return rc == GSL_SUCCESS ? EXIT_SUCCESS : EXIT_FAILURE;
}
