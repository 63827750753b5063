/* Host demo of the generated quaternion strapdown navigation filter (16 states, 15 in the
 * covariance): the IMU drives predict at 100 Hz; position and velocity fixes at 10 Hz, barometer
 * at 25 Hz, three-axis magnetometer at 20 Hz. The vehicle hangs nose-up (pitch +90 deg, where
 * Euler angles are singular) at rest; the filter keeps a unit quaternion throughout.
 * Build:  cc -std=c99 -O2 -I ekf_float main.c ekf_float/qnav_ekf.c -lm
 * The sensor values are invented demo values. */
#include <math.h>
#include <stdio.h>

#include "qnav_ekf.h"

int main(void)
{
    static qnav_ekf_t flt;
    const qnav_ekf_real dt = 0.01F;
    const qnav_ekf_real h = 0.70710678F; /* cos 45 deg = sin 45 deg: pitch +90 deg is q = (h, 0, h, 0) */
    qnav_ekf_real x0[QNAV_EKF_N];
    qnav_ekf_real P0[QNAV_EKF_NP];
    int k, i, refused = 0;
    qnav_ekf_init(&flt);
    for (i = 0; i < QNAV_EKF_N; ++i) {
        x0[i] = 0.0F;
    }
    x0[qnav_ekf_ix_q_w] = h;
    x0[qnav_ekf_ix_q_y] = h;
    for (i = 0; i < QNAV_EKF_NP; ++i) {
        P0[i] = flt.P[i];
    }
    refused += qnav_ekf_set_state(&flt, x0, P0) != QNAV_EKF_OK;
    for (k = 0; k < 1000; ++k) {
        /* gyro (rad/s) then accelerometer (m/s^2): nose up, the accelerometer reads -g on body x */
        const qnav_ekf_real imu[QNAV_EKF_NU] = {0.0F, 0.0F, 0.0F, -9.80665F, 0.0F, 0.0F};
        refused += qnav_ekf_predict(&flt, imu, dt) != QNAV_EKF_OK;
        if (k % 10 == 9) {
            const qnav_ekf_real pos[QNAV_EKF_M_gnss_pos] = {0.0F, 0.0F, 0.0F};
            const qnav_ekf_real vel[QNAV_EKF_M_gnss_vel] = {0.0F, 0.0F, 0.0F};
            refused += qnav_ekf_update_gnss_pos(&flt, pos) != QNAV_EKF_OK;
            refused += qnav_ekf_update_gnss_vel(&flt, vel) != QNAV_EKF_OK;
        }
        if (k % 4 == 3) {
            const qnav_ekf_real alt[QNAV_EKF_M_baro] = {0.0F};
            refused += qnav_ekf_update_baro(&flt, alt) != QNAV_EKF_OK;
        }
        if (k % 5 == 4) {
            /* the field (0.2 G north, 0.45 G down) seen from a nose-up body: x = -down, z = north */
            const qnav_ekf_real mag[QNAV_EKF_M_mag] = {-0.45F, 0.0F, 0.2F};
            refused += qnav_ekf_update_mag(&flt, mag) != QNAV_EKF_OK;
        }
    }
    printf("refused calls: %d; q = (%.4f, %.4f, %.4f, %.4f), |q| - 1 = %.2e\n", refused,
           (double)flt.x[qnav_ekf_ix_q_w], (double)flt.x[qnav_ekf_ix_q_x], (double)flt.x[qnav_ekf_ix_q_y],
           (double)flt.x[qnav_ekf_ix_q_z],
           sqrt((double)(flt.x[qnav_ekf_ix_q_w] * flt.x[qnav_ekf_ix_q_w] + flt.x[qnav_ekf_ix_q_x] * flt.x[qnav_ekf_ix_q_x]
                         + flt.x[qnav_ekf_ix_q_y] * flt.x[qnav_ekf_ix_q_y] + flt.x[qnav_ekf_ix_q_z] * flt.x[qnav_ekf_ix_q_z])) - 1.0);
    return 0;
}
