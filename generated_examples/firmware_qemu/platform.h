/* What the replay (main.c) needs from the board: text output, a cycle counter, and exit.
 *
 * Two implementations: platform_qemu.c (bare-metal Cortex-M4 under QEMU mps2-an386,
 * semihosting + SysTick) and platform_host.c (a hosted build of the same replay, used for
 * instruction counts under valgrind). In your own firmware you need none of this: the
 * generated filter needs no platform services at all. */
#ifndef PLATFORM_H
#define PLATFORM_H

#include <stdint.h>

/* Start the cycle counter (and anything else the board needs before main's work). */
void plat_init(void);
/* Write a NUL-terminated string to the console. */
void plat_puts(const char *s);
/* A free-running up-counter; differences are taken modulo PLAT_TICK_MASK + 1. */
uint32_t plat_ticks(void);
/* Ticks one known busy loop of 2 * iters instructions takes (0 when the host has no timer). */
uint32_t plat_calibrate(uint32_t iters);
/* Current stack pointer, for the stack high-water probe. */
uintptr_t plat_stack_pointer(void);
/* End the program with an exit code (0 = success). Does not return. */
void plat_exit(int code);

#endif
