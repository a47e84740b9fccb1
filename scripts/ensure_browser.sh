#!/usr/bin/env bash
# Make a headless Chromium available for the HTML report test; idempotent.
# Looked for, in order: $VELOMATCH_CHROMIUM, chromium, chromium-browser on PATH.
# On Debian/Ubuntu as root we install Debian's `chromium` package when none is found.
# Prints the path of the browser on stdout (nothing when none is available); exit 0
# either way, so callers decide whether a missing browser means skip or fail.
set -u
find_browser() {
  if [ -n "${VELOMATCH_CHROMIUM:-}" ] && [ -x "${VELOMATCH_CHROMIUM}" ]; then
    echo "$VELOMATCH_CHROMIUM"; return 0
  fi
  for name in chromium chromium-browser; do
    if command -v "$name" >/dev/null 2>&1; then command -v "$name"; return 0; fi
  done
  return 1
}

if find_browser; then exit 0; fi
if command -v apt-get >/dev/null 2>&1 && [ "$(id -u)" = 0 ]; then
  echo "Chromium: installing Debian's chromium package (about a minute) ..." >&2
  export DEBIAN_FRONTEND=noninteractive
  if ! apt-get install -y -qq --no-install-recommends chromium >/dev/null 2>&1; then
    apt-get update -qq >/dev/null 2>&1 || true
    apt-get install -y -qq --no-install-recommends chromium >/dev/null 2>&1 || true
  fi
  if find_browser; then exit 0; fi
  echo "Chromium: installing the chromium package failed." >&2
  exit 0
fi
cat >&2 <<'MSG'
Chromium: not found. Only the report-rendering test needs it.
  Debian/Ubuntu:  sudo apt-get install chromium
  or point the test at a Chromium binary:  export VELOMATCH_CHROMIUM=/path/to/chromium
MSG
exit 0
