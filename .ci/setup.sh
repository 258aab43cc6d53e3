#!/usr/bin/env bash
# One-time set-up on a fresh Debian 12 / Ubuntu machine (run as root or with sudo):
# FFmpeg development libraries and CLI, clang for bindgen, pkg-config, and the
# Python reference libraries the tests compare against.
set -euo pipefail
SUDO=""
if [ "$(id -u)" != "0" ]; then SUDO="sudo"; fi
export DEBIAN_FRONTEND=noninteractive
$SUDO apt-get update -qq
$SUDO apt-get install -y -qq --no-install-recommends \
  ffmpeg libavcodec-dev libavformat-dev libavutil-dev libswscale-dev \
  libswresample-dev libavfilter-dev libavdevice-dev \
  clang libclang-dev pkg-config ca-certificates curl unzip \
  python3 python3-pip chromium chromium-driver time bc >/dev/null
if ! command -v cargo >/dev/null; then
  curl -sSf https://sh.rustup.rs | sh -s -- -y --profile minimal
  . "$HOME/.cargo/env"
fi
PIP="python3 -m pip"
$PIP install -q --disable-pip-version-check $(grep -v '^#' .ci/requirements.txt) 2>/dev/null \
  || $PIP install -q --disable-pip-version-check --break-system-packages $(grep -v '^#' .ci/requirements.txt)
# Azurite, the Azure Storage emulator, for the az:// tests (3.33.0 declares
# Node.js >= 10; 3.37 needs 22 and this image has 20). From the npm registry.
if ! command -v azurite-blob >/dev/null; then
  if ! command -v npm >/dev/null; then
    $SUDO apt-get install -y -qq --no-install-recommends nodejs npm >/dev/null
  fi
  $SUDO npm install --silent --no-audit --no-fund --prefix /opt/azurite azurite@3.33.0
  $SUDO ln -sf /opt/azurite/node_modules/.bin/azurite-blob /usr/local/bin/azurite-blob
fi
