/* Host demo of the generated conveyor-carriage filter: predict at 100 Hz, encoder every step,
 * speed pickup every fifth step, and what to do with each status.
 * Build:  cc -std=c99 -O2 -I ekf_float main.c ekf_float/cart_ekf.c -lm
 * The measurements are invented demo values. */
#include <stdio.h>

#include "cart_ekf.h"

int main(void)
{
    static cart_ekf_t flt;
    const cart_ekf_real dt = 0.01;
    cart_ekf_real pos = 0.0, vel = 0.0;
    int k;
    cart_ekf_init(&flt);
    flt.par.mass = 12.5;   /* parameters are plain fields: change them at run time */
    for (k = 0; k < 1000; ++k) {
        const cart_ekf_real force[CART_EKF_NU] = {(k % 400) < 100 ? 6.0 : 0.0};
        int st;
        vel += dt * force[0] / (cart_ekf_real)12.5;
        pos += dt * vel;
        st = cart_ekf_predict(&flt, force, dt);
        if (st == CART_EKF_BAD_DT || st == CART_EKF_BAD_INPUT) {
            continue;   /* fix the timer or driver; the filter is unchanged */
        }
        {
            const cart_ekf_real z[CART_EKF_M_encoder] = {pos};
            st = cart_ekf_update_encoder(&flt, z);
        }
        if (k % 5 == 4) {
            const cart_ekf_real z[CART_EKF_M_speed] = {vel};
            cart_ekf_real nis = 0;
            st = cart_ekf_update_speed_nis(&flt, z, &nis);   /* NIS for health monitoring */
        }
        if (st == CART_EKF_NOT_POSITIVE_DEFINITE || st == CART_EKF_NON_FINITE) {
            cart_ekf_init(&flt);   /* persistent numerical trouble: reset (or set_state) */
        }
    }
    printf("pos = %.4f m, vel = %.4f m/s, disturbance = %.3f N\n", (double)flt.x[cart_ekf_ix_pos],
           (double)flt.x[cart_ekf_ix_vel], (double)flt.x[cart_ekf_ix_dist]);
    return 0;
}
