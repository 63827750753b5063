/* Host demo of the generated cell state-of-charge filter: the call sequence firmware uses.
 * Build (either precision):  cc -std=c99 -O2 -I ekf_float main.c ekf_float/cell_ekf.c -lm
 * The measurements below are invented demo values, not data from a real cell. */
#include <math.h>
#include <stdio.h>

#include "cell_ekf.h"

int main(void)
{
    static cell_ekf_t flt;                /* all filter state: static, no heap */
    const cell_ekf_real dt = 1.0;         /* seconds between predicts */
    int k;
    cell_ekf_init(&flt);                  /* x0, P0, parameter defaults */
    for (k = 0; k < 600; ++k) {
        const cell_ekf_real current[CELL_EKF_NU] = {2.0};   /* A, discharge positive */
        const cell_ekf_real volts[CELL_EKF_M_voltage] = {(cell_ekf_real)(3.95 - 0.0002 * k)};
        int st = cell_ekf_predict(&flt, current, dt);
        if (st != CELL_EKF_OK) {
            printf("predict refused: %d\n", st);   /* filter unchanged: keep going */
        }
        st = cell_ekf_update_voltage(&flt, volts);
        if (st != CELL_EKF_OK) {
            printf("update refused at step %d: %d\n", k, st);
        }
    }
    printf("soc = %.4f (1-sigma %.4f)\n", (double)flt.x[cell_ekf_ix_soc],
           sqrt((double)cell_ekf_cov(&flt, cell_ekf_ix_soc, cell_ekf_ix_soc)));
    return 0;
}
