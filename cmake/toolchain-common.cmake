# Shared part of cmake/toolchain-<arch>.cmake: compilers, the emulator and the
# search rules for a Debian cross build (TENON_CROSS_TRIPLE set by the caller).
set(CMAKE_C_COMPILER ${TENON_CROSS_TRIPLE}-gcc)
set(CMAKE_CXX_COMPILER ${TENON_CROSS_TRIPLE}-g++)

# Test programs and POST_BUILD steps run under qemu-user with the target's
# C library (installed by the cross toolchain under /usr/<triple>).
if(CMAKE_SYSTEM_PROCESSOR STREQUAL "aarch64")
  set(_tenon_qemu qemu-aarch64)
else()
  set(_tenon_qemu qemu-arm)
endif()
find_program(TENON_QEMU ${_tenon_qemu} REQUIRED)
set(CMAKE_CROSSCOMPILING_EMULATOR "${TENON_QEMU};-L;/usr/${TENON_CROSS_TRIPLE}")

# Libraries of the target (zlib, if installed for it) are searched under
# /usr/<triple> and Debian's multiarch directories; header-only packages
# (xtensor, xtl, doctest, Eigen) are taken from the build host.
set(CMAKE_FIND_ROOT_PATH /usr/${TENON_CROSS_TRIPLE})
set(CMAKE_LIBRARY_ARCHITECTURE ${TENON_CROSS_TRIPLE})
set(CMAKE_FIND_ROOT_PATH_MODE_PROGRAM NEVER)
set(CMAKE_FIND_ROOT_PATH_MODE_LIBRARY BOTH)
set(CMAKE_FIND_ROOT_PATH_MODE_INCLUDE BOTH)
set(CMAKE_FIND_ROOT_PATH_MODE_PACKAGE BOTH)
# Debian installs xtensor's package files under the build host's multiarch
# directory.
list(APPEND CMAKE_PREFIX_PATH /usr/lib/${CMAKE_HOST_SYSTEM_PROCESSOR}-linux-gnu/cmake)
