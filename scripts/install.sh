#!/bin/sh
# Install tbminv with what it needs from Debian: the tetgen mesher (3D meshes through pyGIMLi),
# SuiteSparse headers (CHOLMOD through scikit-sparse; scipy's LU is used when that is missing)
# and poppler-utils (PDF pages to PNG in the report tests).
#   sh scripts/install.sh          # the toolkit
#   sh scripts/install.sh test     # the toolkit and the test extra
set -e
cd "$(dirname "$0")/.."
EXTRAS="fast"
[ "${1:-}" = "test" ] && EXTRAS="fast,test"
if command -v apt-get >/dev/null 2>&1; then
    SUDO=""
    [ "$(id -u)" -ne 0 ] && SUDO="sudo"
    $SUDO apt-get update -qq
    DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq tetgen libsuitesparse-dev \
        poppler-utils >/dev/null
fi
PIP="python3 -m pip install -q --disable-pip-version-check"
if ! $PIP -e ".[${EXTRAS}]"; then
    echo "install.sh: the 'fast' extra (scikit-sparse) did not build; installing without it" >&2
    $PIP -e ".[${EXTRAS#fast,}]" 2>/dev/null || $PIP -e .
fi
python3 -c "import tbminv; print('tbminv', tbminv.__version__, 'installed')"
