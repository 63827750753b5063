/* Minimal Cortex-M4F start-up: the vector table, and a reset handler that sets up C's memory
 * (.data copied from flash, .bss zeroed), enables the FPU, then calls main.
 *
 * The symbols come from mps2_an386.ld. With a vendor SDK you use its start-up file instead;
 * the one thing a float filter needs from it is the FPU enabled before the first float
 * instruction (most vendor start-ups do this in SystemInit). */
#include <stdint.h>

#include "platform.h"

extern uint32_t _sidata, _sdata, _edata, _sbss, _ebss, _estack;
int main(void);

/* Coprocessor Access Control Register (ARMv7-M ARM, B3.2.20): CP10 and CP11 full access. */
#define SCB_CPACR (*(volatile uint32_t *)0xE000ED88u)

void Reset_Handler(void);
void Default_Handler(void);

void Reset_Handler(void)
{
    uint32_t *src = &_sidata;
    uint32_t *dst = &_sdata;
    while (dst < &_edata) {
        *dst++ = *src++;
    }
    for (dst = &_sbss; dst < &_ebss; ++dst) {
        *dst = 0u;
    }
    SCB_CPACR |= (0xFu << 20);
    __asm__ volatile("dsb\n\tisb" ::: "memory"); /* the FPU is usable after these barriers */
    plat_exit(main());
}

/* Any fault ends the run with a failure status instead of hanging the test. */
void Default_Handler(void) { plat_exit(3); }

/* Initial stack pointer, then the handlers: reset, NMI, HardFault, MemManage, BusFault,
 * UsageFault. Nothing else is enabled, so no further entries are needed. */
__attribute__((section(".isr_vector"), used)) static const uintptr_t vectors[] = {
    (uintptr_t)&_estack,         (uintptr_t)Reset_Handler,   (uintptr_t)Default_Handler,
    (uintptr_t)Default_Handler,  (uintptr_t)Default_Handler, (uintptr_t)Default_Handler,
    (uintptr_t)Default_Handler,
};
