#!/usr/bin/env bash
# Create .venv with volmag and its dependencies, on a machine that has only
# Python 3.11. gmsh's wheel links to a few system graphics libraries; when they
# are missing and we may use apt-get, install them.
set -euo pipefail
cd "$(dirname "$0")/.."
PY=${PYTHON:-python3}
[ -x .venv/bin/python ] || "$PY" -m venv .venv
.venv/bin/python -m pip install --quiet --upgrade pip
.venv/bin/python -m pip install --quiet -e ".[test,viz]"
if ! .venv/bin/python -c "import gmsh" 2>/dev/null; then
  if command -v apt-get >/dev/null && [ "$(id -u)" = 0 ]; then
    apt-get update -qq && apt-get install -y -qq libglu1-mesa libxcursor1 libxft2 libxinerama1 libgomp1 >/dev/null
  fi
  .venv/bin/python -c "import gmsh" || { echo "gmsh cannot be imported: install libGLU, libXcursor, libXft, libXinerama" >&2; exit 1; }
fi
# Off-screen pictures (volmag view/report): VTK draws through EGL when there
# is no display. Optional steps below never fail the set-up.
can_apt() { command -v apt-get >/dev/null && [ "$(id -u)" = 0 ]; }
if ! .venv/bin/python -c "import pyvista as pv; p = pv.Plotter(off_screen=True, window_size=(8, 8)); p.screenshot()" >/dev/null 2>&1; then
  if can_apt; then
    { apt-get update -qq && apt-get install -y -qq libegl1 libegl-mesa0 libgl1 >/dev/null; } \
      || echo "note: could not install EGL; off-screen views may fail" >&2
  fi
fi
# Headless Chromium for the test that renders the HTML report (skipped without it).
if [ ! -x /usr/bin/chromium ] && can_apt; then
  { apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null; } \
    || echo "note: chromium not installed; the report-rendering test will be skipped" >&2
fi
