#!/usr/bin/env bash
# Install Debian's chromium package, which the report's browser test uses
# (headless screenshot). Idempotent and quiet. Always exits 0: where the
# install is not possible the browser test is skipped, and this script says
# why on stderr.
set -u

have_chromium() {
  command -v chromium >/dev/null 2>&1 || [ -x /usr/bin/chromium ]
}

if have_chromium; then
  exit 0
fi
if ! command -v apt-get >/dev/null 2>&1; then
  echo "install_chromium: apt-get is not available; chromium not installed (the browser test will be skipped)" >&2
  exit 0
fi
SUDO=()
if [ "$(id -u)" -ne 0 ]; then
  if command -v sudo >/dev/null 2>&1 && sudo -n true 2>/dev/null; then
    SUDO=(sudo -n)
  else
    echo "install_chromium: not root and no password-less sudo; chromium not installed (the browser test will be skipped)" >&2
    exit 0
  fi
fi
log="$(mktemp)"
if "${SUDO[@]}" env DEBIAN_FRONTEND=noninteractive apt-get update -qq >"$log" 2>&1 &&
   "${SUDO[@]}" env DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >>"$log" 2>&1 &&
   have_chromium; then
  echo "install_chromium: installed chromium"
else
  echo "install_chromium: could not install chromium (the browser test will be skipped); apt-get said:" >&2
  tail -n 5 "$log" >&2
fi
rm -f "$log"
exit 0
