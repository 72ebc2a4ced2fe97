#!/usr/bin/env bash
# One-time set-up used by `make demo` and `make test`: a .venv with buttress and its
# extras, and a fast CHOLMOD where the machine allows it. Safe to run again: it skips
# work already done (stamp file keyed on pyproject.toml).
set -u
cd "$(dirname "$0")/.."
PY=${PYTHON:-python3}
VENV=.venv
STAMP="$VENV/.buttress-installed-$(sha1sum pyproject.toml | cut -c1-12)"

if [ ! -x "$VENV/bin/python" ]; then
  echo "bootstrap: creating $VENV"
  "$PY" -m venv "$VENV" || { echo "bootstrap: could not create a virtual environment with $PY"; exit 1; }
fi
[ -f "$STAMP" ] && exit 0

# SuiteSparse headers and OpenBLAS from the system package manager (root only). CHOLMOD
# linked to the reference BLAS is several times slower than with OpenBLAS.
if [ ! -f /usr/include/suitesparse/cholmod.h ] && [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null; then
  echo "bootstrap: installing SuiteSparse headers and OpenBLAS (apt-get)"
  (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq libsuitesparse-dev libopenblas-dev) \
    >/tmp/buttress-apt.log 2>&1 || echo "bootstrap: apt-get failed (see /tmp/buttress-apt.log)"
fi

echo "bootstrap: installing buttress and its dependencies into $VENV"
"$VENV/bin/python" -m pip install -q --upgrade pip >/dev/null 2>&1
"$VENV/bin/python" -m pip install -q -e ".[dev]" || { echo "bootstrap: pip install failed"; exit 1; }

# scikit-sparse 0.4 builds against the SuiteSparse 5 headers of Debian 12.
if [ -f /usr/include/suitesparse/cholmod.h ]; then
  "$VENV/bin/python" -m pip install -q "scikit-sparse>=0.4.12,<0.5" >/tmp/buttress-cholmod.log 2>&1 \
    || echo "bootstrap: CHOLMOD (scikit-sparse) could not be built; continuing with the SciPy solver (see /tmp/buttress-cholmod.log)"
else
  echo "bootstrap: SuiteSparse headers not found; CHOLMOD unavailable, continuing with the SciPy solver"
fi
touch "$STAMP"
"$VENV/bin/buttress" --version | sed -n '2p' | sed 's/^/bootstrap: /'
