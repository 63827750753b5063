/* Host demo of the generated 15-state strapdown navigation filter: the IMU drives predict at
 * 100 Hz; position and velocity fixes at 10 Hz, barometer at 25 Hz, magnetic heading at 20 Hz.
 * Build:  cc -std=c99 -O2 -I ekf_float main.c ekf_float/nav_ekf.c -lm
 * The sensor values are invented demo values for a vehicle at rest, level, facing north. */
#include <stdio.h>

#include "nav_ekf.h"

int main(void)
{
    static nav_ekf_t flt;
    const nav_ekf_real dt = 0.01;
    int k, refused = 0;
    nav_ekf_init(&flt);
    for (k = 0; k < 1000; ++k) {
        /* gyro (rad/s) then accelerometer (m/s^2): at rest the accelerometer reads -g on z */
        const nav_ekf_real imu[NAV_EKF_NU] = {0.0, 0.0, 0.0, 0.0, 0.0, -9.81};
        refused += nav_ekf_predict(&flt, imu, dt) != NAV_EKF_OK;
        if (k % 10 == 9) {
            const nav_ekf_real pos[NAV_EKF_M_gnss_pos] = {0.0, 0.0, 0.0};
            const nav_ekf_real vel[NAV_EKF_M_gnss_vel] = {0.0, 0.0, 0.0};
            refused += nav_ekf_update_gnss_pos(&flt, pos) != NAV_EKF_OK;
            refused += nav_ekf_update_gnss_vel(&flt, vel) != NAV_EKF_OK;
        }
        if (k % 4 == 3) {
            const nav_ekf_real alt[NAV_EKF_M_baro] = {0.0};
            refused += nav_ekf_update_baro(&flt, alt) != NAV_EKF_OK;
        }
        if (k % 5 == 4) {
            const nav_ekf_real hdg[NAV_EKF_M_mag_heading] = {0.0};
            refused += nav_ekf_update_mag_heading(&flt, hdg) != NAV_EKF_OK;
        }
    }
    printf("refused calls: %d; down velocity %.4f m/s; accel z bias %.4f m/s^2\n", refused,
           (double)flt.x[nav_ekf_ix_vd], (double)flt.x[nav_ekf_ix_baz]);
    return 0;
}
