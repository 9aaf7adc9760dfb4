#!/usr/bin/env bash
# Prepare a fresh machine for the test suite: Debian packages the tests use
# (a real MQTT broker, a pseudo-terminal pair, systemd-analyze, PulseAudio for
# the sound-card path, Chromium for the report check), then a virtualenv with
# the package and its test extras. Idempotent; run from the project root.
set -euo pipefail
cd "$(dirname "$0")/.."

pkgs=()
need() { command -v "$1" >/dev/null 2>&1 || pkgs+=("$2"); }
need mosquitto mosquitto
need mosquitto_sub mosquitto-clients
need mosquitto_passwd mosquitto
need socat socat
need openssl openssl
need systemd-analyze systemd
need pulseaudio pulseaudio
need chromium chromium
dpkg -s libportaudio2 >/dev/null 2>&1 || pkgs+=(libportaudio2)
dpkg -s libasound2-plugins >/dev/null 2>&1 || pkgs+=(libasound2-plugins)
if [ ${#pkgs[@]} -gt 0 ]; then
  if [ "$(id -u)" = 0 ]; then SUDO=""; else SUDO="sudo"; fi
  echo "installing Debian packages: ${pkgs[*]}"
  $SUDO apt-get update -qq
  DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq --no-install-recommends "${pkgs[@]}" >/dev/null
fi

python3 -m venv .venv
.venv/bin/python -m pip install -q --upgrade pip >/dev/null
.venv/bin/python -m pip install -q -e '.[test]'
