/* Replays a recorded scenario through one generated filter and prints the final state.
 *
 * This is also the template for putting a generated filter into firmware. Stripped of the
 * replay and the measuring, the whole integration is:
 *
 *     #include "tank_ekf.h"
 *     static tank_ekf_t flt;                   // all filter state: put it in static RAM
 *     tank_ekf_init(&flt);                     // once, at start-up
 *     // at every control tick, dt = seconds since the previous predict:
 *     if (tank_ekf_predict(&flt, u, dt) != 0) { ... }        // u = NULL when the model has no inputs
 *     // whenever a sensor has a new sample (any order, any rate):
 *     if (tank_ekf_update_level2(&flt, z) != 0) { ... }      // refused: flt is unchanged
 *     use(flt.x[0]);                           // the estimate, in the model's state order
 *
 * replay_data.h is written by `estgen replay`: it includes the generated
 * header and names the filter's type and functions (REPLAY_INIT, REPLAY_PREDICT and the table
 * replay_update[] of one update function per sensor) together with the recorded inputs,
 * time steps and measurements.
 *
 * Output, one "key values" record a line, read by estgen.cross.parse_replay_output:
 *   calib ITERS TICKS_N TICKS_2N      busy loop of 2*ITERS and 4*ITERS instructions
 *   overhead CALLS TICKS              empty timing brackets
 *   predict CALLS TICKS REFUSED STACK MAXTICKS   (MAXTICKS: the slowest single call)
 *   update SENSOR CALLS TICKS REFUSED STACK MAXTICKS
 *   x I HEXBITS                       final state, IEEE-754 bits of each element
 *   P I HEXBITS                       final covariance, packed upper triangle row by row
 *   end
 */
#include <stdint.h>
#include <string.h>

#include "platform.h"
#include "replay_data.h"

#ifndef STACK_PROBE_BYTES
#define STACK_PROBE_BYTES 0u /* 0: no stack high-water probe (hosted build) */
#endif
#define PAINT 0xA5C3E1F7u

static replay_filter_t flt; /* static: the filter lives in .bss, not on the stack */

/* ---- a small formatter: no printf, so the image stays small and allocation-free ---- */
static char line[96];
static unsigned line_len;

static void put_str(const char *s)
{
    while (*s != '\0' && line_len + 1u < sizeof line) {
        line[line_len++] = *s++;
    }
}

static void put_u32(uint32_t v)
{
    char buf[11];
    unsigned i = 0;
    do {
        buf[i++] = (char)('0' + (char)(v % 10u));
        v /= 10u;
    } while (v != 0u);
    while (i > 0u) {
        char c[2] = {buf[--i], '\0'};
        put_str(c);
    }
}

static void put_hex(uint64_t v, unsigned digits)
{
    static const char hex[] = "0123456789abcdef";
    char buf[17];
    unsigned i;
    for (i = 0; i < digits; ++i) {
        buf[i] = hex[(v >> (4u * (digits - 1u - i))) & 0xFu];
    }
    buf[digits] = '\0';
    put_str(buf);
}

static void put_sep(void) { put_str(" "); }

static void end_line(void)
{
    line[line_len++] = '\n';
    line[line_len] = '\0';
    plat_puts(line);
    line_len = 0;
}

static void put_real_bits(replay_real v)
{
    /* Bits, not decimal: the comparison on the host is then exact about what the target
     * computed. memcpy is the defined way to reinterpret a float in C99. */
    if (sizeof v == 4u) {
        uint32_t b;
        memcpy(&b, &v, sizeof b);
        put_hex(b, 8u);
    } else {
        uint64_t b;
        memcpy(&b, &v, sizeof b);
        put_hex(b, 16u);
    }
}

/* ---- stack high-water: paint below SP, call, find the deepest overwritten word ---- */
static void stack_paint(void)
{
    volatile uint32_t *p = (volatile uint32_t *)(plat_stack_pointer() & ~(uintptr_t)3u);
    uint32_t i;
    for (i = 1u; i <= STACK_PROBE_BYTES / 4u; ++i) {
        p[-(int32_t)i] = PAINT;
    }
}

static uint32_t stack_used(uintptr_t top)
{
    volatile uint32_t *p = (volatile uint32_t *)(top & ~(uintptr_t)3u);
    uint32_t i;
    for (i = STACK_PROBE_BYTES / 4u; i >= 1u; --i) {
        if (p[-(int32_t)i] != PAINT) {
            return 4u * i;
        }
    }
    return 0u;
}

typedef struct {
    uint32_t calls, ticks, refused, stack, max_ticks;
} stats_t;

static stats_t predict_stats;
static stats_t update_stats[REPLAY_NSENSORS];

static void record(stats_t *s, uint32_t t0, uint32_t t1, int status, uint32_t stack)
{
    const uint32_t dt = (t1 - t0) & 0x00FFFFFFu;
    s->calls += 1u;
    s->ticks += dt;
    s->max_ticks = dt > s->max_ticks ? dt : s->max_ticks;
    s->refused += (status != 0) ? 1u : 0u;
    s->stack = stack > s->stack ? stack : s->stack;
}

static void print_stats(const char *what, const char *sensor, const stats_t *s)
{
    put_str(what);
    if (sensor != NULL) {
        put_sep();
        put_str(sensor);
    }
    put_sep();
    put_u32(s->calls);
    put_sep();
    put_u32(s->ticks);
    put_sep();
    put_u32(s->refused);
    put_sep();
    put_u32(s->stack);
    put_sep();
    put_u32(s->max_ticks);
    end_line();
}

static void print_vector(const char *tag, const replay_real *v, uint32_t len)
{
    uint32_t i;
    for (i = 0; i < len; ++i) {
        put_str(tag);
        put_u32(i);
        put_sep();
        put_real_bits(v[i]);
        end_line();
    }
}

#define CALIB_ITERS 20000u

int main(void)
{
    uint32_t k, m = 0, i, t0, t1, overhead = 0;
    uintptr_t top;
    int st;

    plat_init();

    /* Instructions per tick: the difference of two loop lengths cancels the fixed cost. */
    {
        uint32_t c1 = plat_calibrate(CALIB_ITERS);
        uint32_t c2 = plat_calibrate(2u * CALIB_ITERS);
        put_str("calib ");
        put_u32(CALIB_ITERS);
        put_sep();
        put_u32(c1);
        put_sep();
        put_u32(c2);
        end_line();
    }
    for (i = 0; i < 256u; ++i) {
        t0 = plat_ticks();
        t1 = plat_ticks();
        overhead += (t1 - t0) & 0x00FFFFFFu;
    }
    put_str("overhead 256 ");
    put_u32(overhead);
    end_line();

    REPLAY_INIT(&flt);
    for (k = 0; k < REPLAY_STEPS; ++k) {
        top = plat_stack_pointer();
        if (STACK_PROBE_BYTES > 0u) {
            stack_paint();
        }
        t0 = plat_ticks();
        st = REPLAY_PREDICT(&flt, REPLAY_U(k), replay_dt[k]);
        t1 = plat_ticks();
        /* Read the high-water mark at once: record()'s own frame would overwrite paint. */
        record(&predict_stats, t0, t1, st, STACK_PROBE_BYTES > 0u ? stack_used(top) : 0u);

        /* The measurements recorded at this step, in the order they arrived. */
        while (m < REPLAY_NMEAS && replay_meas_step[m] == k) {
            unsigned s = replay_meas_sensor[m];
            if (STACK_PROBE_BYTES > 0u) {
                stack_paint();
            }
            t0 = plat_ticks();
            st = replay_update[s](&flt, &replay_z[replay_meas_offset[m]]);
            t1 = plat_ticks();
            record(&update_stats[s], t0, t1, st, STACK_PROBE_BYTES > 0u ? stack_used(top) : 0u);
            ++m;
        }
    }

    print_stats("predict", NULL, &predict_stats);
    for (i = 0; i < REPLAY_NSENSORS; ++i) {
        print_stats("update", replay_sensor_names[i], &update_stats[i]);
    }
    print_vector("x ", flt.x, REPLAY_NX);
    print_vector("P ", flt.P, REPLAY_NP);
    put_str("end");
    end_line();
    return 0;
}
