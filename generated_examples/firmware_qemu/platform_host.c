/* The same replay on a hosted machine, so valgrind can count the filter's instructions.
 * No timer: callgrind does the counting, so plat_ticks() reads 0. */
#include <stdio.h>
#include <stdlib.h>

#include "platform.h"

void plat_init(void) {}

void plat_puts(const char *s) { fputs(s, stdout); }

uint32_t plat_ticks(void) { return 0u; }

uint32_t plat_calibrate(uint32_t iters)
{
    (void)iters;
    return 0u;
}

uintptr_t plat_stack_pointer(void)
{
    volatile char here = 0;
    return (uintptr_t)&here;
}

void plat_exit(int code)
{
    fflush(stdout);
    exit(code);
}
