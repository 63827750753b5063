/* Host demo of the generated valve filter (UKF: the model saturates, so the EKF refuses it).
 * Build:  cc -std=c99 -O2 -I ukf_float main.c ukf_float/valve_ukf.c -lm
 * The flow readings are invented demo values. */
#include <stdio.h>

#include "valve_ukf.h"

int main(void)
{
    static valve_ukf_t flt;
    const valve_ukf_real dt = 0.05;
    int k;
    valve_ukf_init(&flt);
    for (k = 0; k < 400; ++k) {
        const valve_ukf_real cmd[VALVE_UKF_NU] = {k < 200 ? 1.3 : 0.02};   /* beyond the stops */
        int st = valve_ukf_predict(&flt, cmd, dt);
        if (st != VALVE_UKF_OK) {
            printf("predict refused: %d\n", st);
        }
        {
            const valve_ukf_real flow[VALVE_UKF_M_flow] = {k < 200 ? 9.0 : 0.5};
            st = valve_ukf_update_flow(&flt, flow);
            if (st != VALVE_UKF_OK) {
                printf("flow update refused at %d: %d\n", k, st);
            }
        }
    }
    printf("opening = %.3f, dp = %.3f bar\n", (double)flt.x[valve_ukf_ix_opening], (double)flt.x[valve_ukf_ix_dp]);
    return 0;
}
