# Cross build for 32-bit ARM (ARMv7, hard-float ABI, Linux) with Debian's
# cross compilers (crossbuild-essential-armhf; `sh cmake/deps.sh cross`).
# Debian's armhf baseline is ARMv7-A with VFPv3-D16 and no NEON; tenon's NEON
# kernels are compiled with a function attribute and used only after a
# run-time check (core/simd.hpp). qemu-arm emulates a Cortex-A15-class CPU
# (NEON and VFPv4) by default.
set(CMAKE_SYSTEM_NAME Linux)
set(CMAKE_SYSTEM_PROCESSOR arm)
set(TENON_CROSS_TRIPLE arm-linux-gnueabihf)
include("${CMAKE_CURRENT_LIST_DIR}/toolchain-common.cmake")
# GCC notes that the ABI of some by-value arguments changed in GCC 7.1; tenon
# passes no such type across a library boundary.
set(CMAKE_CXX_FLAGS_INIT "-Wno-psabi")
