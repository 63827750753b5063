/* Board support for QEMU's mps2-an386 (Cortex-M4F): ARM semihosting for output and exit,
 * SysTick as the cycle counter.
 *
 * Semihosting (ARM "Semihosting for AArch32 and AArch64", version 2.0): on M-profile the
 * request is `bkpt 0xab` with the operation number in r0 and its argument in r1.
 * QEMU must be started with -semihosting-config enable=on,target=native. */
#include "platform.h"

#define SYS_WRITE0 0x04u
#define SYS_EXIT 0x18u
#define ADP_STOPPED_APPLICATION_EXIT 0x20026u /* the "normal exit" reason code */
#define ADP_STOPPED_RUN_TIME_ERROR 0x20023u

/* SysTick registers (ARMv7-M Architecture Reference Manual, B3.3). */
#define SYST_CSR (*(volatile uint32_t *)0xE000E010u)
#define SYST_RVR (*(volatile uint32_t *)0xE000E014u)
#define SYST_CVR (*(volatile uint32_t *)0xE000E018u)

static uint32_t semihost(uint32_t op, const void *arg)
{
    register uint32_t r0 __asm__("r0") = op;
    register const void *r1 __asm__("r1") = arg;
    __asm__ volatile("bkpt 0xab" : "+r"(r0) : "r"(r1) : "memory");
    return r0;
}

void plat_init(void)
{
    /* Reload 0xFFFFFF (the 24-bit maximum), clocked from the core clock (CLKSOURCE=1),
     * no interrupt: a free-running down-counter we only read. */
    SYST_RVR = 0x00FFFFFFu;
    SYST_CVR = 0u;
    SYST_CSR = 0x5u;
}

void plat_puts(const char *s) { (void)semihost(SYS_WRITE0, s); }

uint32_t plat_ticks(void)
{
    /* SysTick counts down; turn it into an up-counter so callers subtract end - start. */
    return 0x00FFFFFFu - (SYST_CVR & 0x00FFFFFFu);
}

uint32_t plat_calibrate(uint32_t iters)
{
    uint32_t t0 = plat_ticks();
    /* Exactly 2 instructions per iteration: SUBS and BNE (the last BNE falls through). */
    __asm__ volatile("1: subs %0, %0, #1\n\tbne 1b" : "+l"(iters) : : "cc");
    return (plat_ticks() - t0) & 0x00FFFFFFu;
}

uintptr_t plat_stack_pointer(void)
{
    uintptr_t sp;
    __asm__ volatile("mov %0, sp" : "=r"(sp));
    return sp;
}

void plat_exit(int code)
{
    /* The 32-bit SYS_EXIT passes only a reason: QEMU exits with status 0 for
     * ApplicationExit and 1 for anything else. */
    (void)semihost(SYS_EXIT, (const void *)(uintptr_t)(code == 0 ? ADP_STOPPED_APPLICATION_EXIT
                                                                  : ADP_STOPPED_RUN_TIME_ERROR));
    for (;;) {
    }
}
