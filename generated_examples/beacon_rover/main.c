/* Host demo of the generated beacon-ranging rover filter: sensors at different rates and an
 * angle state. Build:  cc -std=c99 -O2 -I ekf_float main.c ekf_float/rover_ekf.c -lm
 * The ranges below are invented demo values for a rover parked near the origin. */
#include <stdio.h>

#include "rover_ekf.h"

int main(void)
{
    static rover_ekf_t flt;
    const rover_ekf_real dt = 0.1;
    int k;
    rover_ekf_init(&flt);
    for (k = 0; k < 200; ++k) {
        const rover_ekf_real u[ROVER_EKF_NU] = {0.0, 0.0};   /* acceleration, turn rate */
        int st = rover_ekf_predict(&flt, u, dt);
        if (st != ROVER_EKF_OK) {
            printf("predict refused: %d\n", st);
        }
        {
            const rover_ekf_real z[ROVER_EKF_M_range_a] = {20.0};
            st = rover_ekf_update_range_a(&flt, z);
            if (st == ROVER_EKF_GATED) {
                printf("range_a outlier rejected\n");
            }
        }
        if (k % 10 == 9) {
            const rover_ekf_real z[ROVER_EKF_M_compass] = {0.1};
            (void)rover_ekf_update_compass(&flt, z);
        }
    }
    printf("px = %.2f m, py = %.2f m, heading = %.3f rad\n", (double)flt.x[rover_ekf_ix_px],
           (double)flt.x[rover_ekf_ix_py], (double)flt.x[rover_ekf_ix_psi]);
    return 0;
}
