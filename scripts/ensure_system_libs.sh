#!/usr/bin/env bash
# Open3D's wheels link the system library libusb-1.0. Install it when missing
# and we are root (Debian/Ubuntu); otherwise say exactly what to install.
set -euo pipefail
if ldconfig -p 2>/dev/null | grep -q 'libusb-1.0.so.0'; then
    exit 0
fi
if [ "$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then
    echo "installing libusb-1.0 (needed by Open3D)..."
    apt-get update -qq
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq libusb-1.0-0 >/dev/null
    exit 0
fi
echo "stereomesh set-up: the system library libusb-1.0 is missing (Open3D needs it)." >&2
echo "Install it, e.g. 'sudo apt-get install libusb-1.0-0' on Debian/Ubuntu," >&2
echo "'sudo dnf install libusb1' on Fedora, then run make again." >&2
exit 1
