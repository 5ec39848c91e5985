#!/usr/bin/env bash
# Set up clearaudit in ./.venv on a Debian/Ubuntu machine with Python 3.11+.
# Installs the system libraries open3d and VTK need and, where missing, a C compiler and the
# Python headers (apt-get, when running as root; otherwise it prints the exact command), creates the virtual environment and installs the package with its
# test extras. Safe to run again: it skips what is already done.
set -euo pipefail
cd "$(dirname "$0")/.."

PYTHON=${PYTHON:-python3}
if ! "$PYTHON" -c 'import sys; sys.exit(0 if sys.version_info >= (3, 11) else 1)' 2>/dev/null; then
  echo "clearaudit needs Python 3.11 or newer (found: $("$PYTHON" --version 2>&1))." >&2
  exit 2
fi

# System libraries: open3d needs libusb-1.0 and libgomp; VTK (pyvista) needs GL/EGL/X libraries
# (Mesa EGL) for off-screen rendering without a GPU or display.
SYSTEM_PACKAGES="libusb-1.0-0 libgomp1 libgl1 libegl1 libegl-mesa0 libgl1-mesa-dri libgbm1 libxrender1 libxext6 libsm6 libx11-6"
if [ "${CLEARAUDIT_WITH_BROWSER:-0}" = "1" ]; then
  SYSTEM_PACKAGES="$SYSTEM_PACKAGES chromium"
fi
missing=""
for pkg in $SYSTEM_PACKAGES; do
  dpkg-query -W -f='${Status}' "$pkg" 2>/dev/null | grep -q "install ok installed" || missing="$missing $pkg"
done
if ! "$PYTHON" -m venv --help >/dev/null 2>&1 || ! "$PYTHON" -c 'import ensurepip' 2>/dev/null; then
  missing="$missing python3-venv"
fi
# A C compiler and the Python headers build the compiled kernels (clearaudit/*/*.pyx).
if ! command -v cc >/dev/null 2>&1 && ! command -v gcc >/dev/null 2>&1; then
  missing="$missing gcc libc6-dev"
fi
if ! "$PYTHON" -c 'import os, sysconfig; import sys; sys.exit(0 if os.path.exists(os.path.join(sysconfig.get_paths()["include"], "Python.h")) else 1)' 2>/dev/null; then
  # the headers of this Python's own version (python3-dev is the distribution's default one)
  missing="$missing python$("$PYTHON" -c 'import sys; print("%d.%d" % sys.version_info[:2])')-dev"
fi
if [ -n "$missing" ]; then
  if [ "$(id -u)" = "0" ] && command -v apt-get >/dev/null; then
    echo "Installing system packages:$missing"
    apt-get update -qq >/dev/null
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq $missing >/dev/null
  else
    echo "Missing system packages:$missing" >&2
    echo "Install them with:  sudo apt-get install -y$missing" >&2
    exit 2
  fi
fi

if [ ! -x .venv/bin/python ]; then
  "$PYTHON" -m venv .venv
fi
stamp=.venv/.clearaudit-installed
# reinstall (and rebuild the compiled kernel) when the metadata, the build or a kernel changes
want=$(cat pyproject.toml setup.py clearaudit/*/*.pyx | sha256sum | cut -d' ' -f1)
# (and when a kernel's build is missing: the built files are not in git)
shopt -s nullglob
kernels=(clearaudit/*/*.pyx)
built=(clearaudit/*/_*.so)
shopt -u nullglob
if [ ! -f "$stamp" ] || [ "$(cat "$stamp")" != "$want" ] || [ "${#built[@]}" -lt "${#kernels[@]}" ]; then
  .venv/bin/python -m pip install -q --upgrade pip >/dev/null
  # the build of the compiled kernel talks a lot: its log is shown only when it fails
  if ! .venv/bin/python -m pip install -q -e ".[test]" > .venv/install.log 2>&1; then
    cat .venv/install.log >&2
    echo "Installing clearaudit failed (log above, also in .venv/install.log)." >&2
    exit 1
  fi
  echo "$want" > "$stamp"
fi
