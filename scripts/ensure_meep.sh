#!/usr/bin/env bash
# Make Meep available for the FDTD cross-check, without touching the main environment.
# Meep is taken from, in order: $VELOMATCH_MEEP_PYTHON, /usr/bin/python3 (Debian's
# python3-meep). On Debian/Ubuntu as root we install python3-meep (and
# python3-matplotlib, which Meep's Python module imports). Anywhere else we explain.
set -u
have_meep() { "$1" -c 'import meep' >/dev/null 2>&1; }

if [ -n "${VELOMATCH_MEEP_PYTHON:-}" ]; then
  if have_meep "$VELOMATCH_MEEP_PYTHON"; then echo "Meep: using $VELOMATCH_MEEP_PYTHON"; exit 0; fi
  echo "Meep: VELOMATCH_MEEP_PYTHON=$VELOMATCH_MEEP_PYTHON cannot import meep" >&2
fi
if [ -x /usr/bin/python3 ] && have_meep /usr/bin/python3; then
  echo "Meep: found in /usr/bin/python3"; exit 0
fi
if command -v apt-get >/dev/null 2>&1 && [ "$(id -u)" = 0 ]; then
  echo "Meep: installing Debian's python3-meep (about 20 s) ..."
  export DEBIAN_FRONTEND=noninteractive
  apt-get update -qq >/dev/null 2>&1 || true
  if apt-get install -y -qq --no-install-recommends python3-meep python3-matplotlib >/dev/null 2>&1 \
     && have_meep /usr/bin/python3; then
    echo "Meep: installed for /usr/bin/python3"; exit 0
  fi
  echo "Meep: installing python3-meep failed; the FDTD cross-check will be unavailable." >&2
  exit 0
fi
cat >&2 <<'MSG'
Meep: not found. Everything except `velomatch crosscheck` works without it.
  To enable the cross-check, install Meep for some Python interpreter, e.g.
    Debian/Ubuntu:  sudo apt-get install python3-meep python3-matplotlib
    conda:          conda create -n meep -c conda-forge pymeep
  then point velomatch at that interpreter:
    export VELOMATCH_MEEP_PYTHON=/path/to/that/python
MSG
exit 0
