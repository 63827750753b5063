/* Host demo of the generated particle filter for the pier tag (invented readings).
 * Build:  cc -std=c99 -O2 -I pf_float main.c pf_float/pier_tag_pf.c -lm
 * The tag sits at (4, -7) m, on the far side of the pier line; the two pier ranges alone also fit
 * its mirror image (4, 7). The shadowed beacon (every 5th step) tells the sides apart. */
#include <math.h>
#include <stdio.h>

#include "pier_tag_pf.h"

int main(void)
{
    static pier_tag_pf_t flt; /* 1000 particles: keep it out of the stack */
    const pier_tag_pf_real dt = 0.5f;
    const double tx = 4.0, ty = -7.0;
    int k;
    pier_tag_pf_init(&flt); /* particles drawn from the initial_uniform box */
    for (k = 0; k < 60; ++k) {
        const pier_tag_pf_real ranges[PIER_TAG_PF_M_pier] = {
            (pier_tag_pf_real)sqrt((tx + 15.0) * (tx + 15.0) + ty * ty),
            (pier_tag_pf_real)sqrt((tx - 15.0) * (tx - 15.0) + ty * ty)};
        int st = pier_tag_pf_predict(&flt, NULL, dt);
        if (st != PIER_TAG_PF_OK) {
            printf("predict refused: %d\n", st);
        }
        st = pier_tag_pf_update_pier(&flt, ranges);
        if (st != PIER_TAG_PF_OK) {
            printf("pier update refused at %d: %d\n", k, st);
        }
        if (k % 5 == 4) {
            const pier_tag_pf_real shadow[PIER_TAG_PF_M_shadow] = {(pier_tag_pf_real)tanh(ty)};
            st = pier_tag_pf_update_shadow(&flt, shadow);
            if (st != PIER_TAG_PF_OK) {
                printf("shadow update refused at %d: %d\n", k, st);
            }
        }
        if (k == 3 || k == 59) {
            printf("step %2d: px = %6.2f m, py = %6.2f m (sd %.2f m)\n", k + 1, (double)flt.x[pier_tag_pf_ix_px],
                   (double)flt.x[pier_tag_pf_ix_py], sqrt((double)pier_tag_pf_cov(&flt, 1, 1)));
        }
    }
    return 0;
}
