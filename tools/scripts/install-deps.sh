#!/usr/bin/env bash
# Installs the Debian packages lobit needs to build and test, skipping what is
# already installed. Runs unattended (no prompts); needs root or sudo.
set -euo pipefail

packages=(
  cmake ninja-build g++ make git pkg-config
  libboost-dev libeigen3-dev libfmt-dev libcli11-dev nlohmann-json3-dev
  libtomlplusplus-dev libmpfr-dev libgmp-dev doctest-dev librapidcheck-dev
  libbenchmark-dev python3 libzip-dev clang libclang-rt-14-dev
)

missing=()
for p in "${packages[@]}"; do
  if ! dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed"; then
    missing+=("$p")
  fi
done

if [ ${#missing[@]} -eq 0 ]; then
  echo "install-deps: all ${#packages[@]} packages already installed"
  exit 0
fi

echo "install-deps: installing ${missing[*]}"
SUDO=""
if [ "$(id -u)" -ne 0 ]; then
  if command -v sudo >/dev/null 2>&1; then SUDO="sudo"; else
    echo "install-deps: error: not root and no sudo; install these packages by hand: ${missing[*]}" >&2
    exit 2
  fi
fi
$SUDO env DEBIAN_FRONTEND=noninteractive apt-get update -q
$SUDO env DEBIAN_FRONTEND=noninteractive apt-get install -y -q --no-install-recommends "${missing[@]}"
