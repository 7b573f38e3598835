#!/bin/sh
# Installs the Debian packages tenon's build, tests, benchmarks and examples
# need. As root it installs what is missing; otherwise it prints the exact
# command to run and fails. This is the one list: a feature that needs a
# package adds it here in the same change.
# `sh cmake/deps.sh cross` installs, in addition, what the aarch64 and armhf
# presets need: Debian's cross toolchains (with their recommended packages,
# which bring the target's C library) and qemu-user to run the tests.
set -eu

packages="ninja-build g++ cmake
  xtensor-dev xtl-dev
  doctest-dev libbenchmark-dev
  libeigen3-dev zlib1g-dev libopenblas-dev
  libopenmpi-dev openmpi-bin
  dataset-fashion-mnist python3-vega-datasets"
recommends="--no-install-recommends"
if [ "${1:-}" = "cross" ]; then
  packages="$packages crossbuild-essential-arm64 crossbuild-essential-armhf qemu-user"
  recommends=""
fi

missing=""
for p in $packages; do
  if ! dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed"; then
    missing="$missing $p"
  fi
done

if [ -z "$missing" ]; then
  exit 0
fi

if [ "$(id -u)" = "0" ]; then
  echo "tenon: installing Debian packages:$missing" >&2
  export DEBIAN_FRONTEND=noninteractive
  apt-get update -qq
  # shellcheck disable=SC2086
  apt-get install -y -qq $recommends $missing >/dev/null
else
  echo "tenon: missing Debian packages. Run:" >&2
  echo "  sudo apt-get install -y$missing" >&2
  exit 1
fi
