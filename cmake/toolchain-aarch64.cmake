# Cross build for 64-bit ARM (aarch64, Linux) with Debian's cross compilers
# (crossbuild-essential-arm64; `sh cmake/deps.sh cross` installs them). Test
# programs run under qemu-user through CMAKE_CROSSCOMPILING_EMULATOR. tenon's
# dependencies are header-only, so their headers and CMake package files come
# from the build host (/usr/include, /usr/share); libraries are the target's.
set(CMAKE_SYSTEM_NAME Linux)
set(CMAKE_SYSTEM_PROCESSOR aarch64)
set(TENON_CROSS_TRIPLE aarch64-linux-gnu)
include("${CMAKE_CURRENT_LIST_DIR}/toolchain-common.cmake")
