# Toolchain file: bare-metal Cortex-M4 with the single-precision FPU (arm-none-eabi-gcc).
#   cmake -DCMAKE_TOOLCHAIN_FILE=cortex-m4f.cmake ...
set(CMAKE_SYSTEM_NAME Generic)
set(CMAKE_SYSTEM_PROCESSOR arm)
set(CMAKE_C_COMPILER arm-none-eabi-gcc)
# no hosted run-time to link a test program against while configuring
set(CMAKE_TRY_COMPILE_TARGET_TYPE STATIC_LIBRARY)
set(CMAKE_C_FLAGS_INIT "-mcpu=cortex-m4 -mthumb -mfpu=fpv4-sp-d16 -mfloat-abi=hard")
