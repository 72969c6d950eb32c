#!/usr/bin/env bash
# Open3D's wheels link the system library libusb-1.0. Install it when missing
# and we are root (Debian/Ubuntu); otherwise say exactly what to install.
# The batch contact sheet's test opens index.html in a headless Chromium: it is
# installed the same way, but its absence never stops the build (the test skips
# and says why).
set -euo pipefail
have_chromium() { command -v chromium >/dev/null 2>&1 || command -v chromium-browser >/dev/null 2>&1; }
updated=0
if ! ldconfig -p 2>/dev/null | grep -q 'libusb-1.0.so.0'; then
    if [ "$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then
        echo "installing libusb-1.0 (needed by Open3D)..."
        apt-get update -qq
        updated=1
        DEBIAN_FRONTEND=noninteractive apt-get install -y -qq libusb-1.0-0 >/dev/null
    else
        echo "stereomesh set-up: the system library libusb-1.0 is missing (Open3D needs it)." >&2
        echo "Install it, e.g. 'sudo apt-get install libusb-1.0-0' on Debian/Ubuntu," >&2
        echo "'sudo dnf install libusb1' on Fedora, then run make again." >&2
        exit 1
    fi
fi
if ! have_chromium; then
    if [ "$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then
        echo "installing chromium (the batch contact sheet's test opens it headless)..."
        [ "$updated" = "1" ] || apt-get update -qq || true
        DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null \
            || echo "chromium could not be installed: the contact sheet's browser test will skip" >&2
    else
        echo "stereomesh set-up: chromium not found; the contact sheet's browser test will" \
             "skip ('sudo apt-get install chromium' on Debian)." >&2
    fi
fi
exit 0
