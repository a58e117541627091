#!/bin/sh
# The Python module (docs/python.md): tests/python/test_*.py under Debian's
# pytest with /usr/bin/python3 and the module of this build.  Skips, saying
# why, when /usr/bin/python3 lacks numpy, scipy or pytest (scripts/
# install-deps.sh installs them) and in sanitizer builds (an ASan library
# cannot be loaded into an uninstrumented python3).
set -u
top=$(cd "$(dirname "$0")/../.." && pwd)
build=$(dirname "$CLEF_BIN")
PY=${CLEF_PYTHON:-/usr/bin/python3}
if [ "${CLEF_SANITIZE:-0}" = 1 ]; then
    echo "python tests skipped: sanitizer build"
    exit 0
fi
if ! "$PY" -c "import numpy, scipy, pytest" 2>/dev/null; then
    echo "python tests skipped: $PY lacks numpy, scipy or pytest (install python3-numpy," \
        "python3-scipy, python3-pytest: scripts/install-deps.sh)"
    exit 0
fi
if ! ls "$build"/python/clef/_clef*.so >/dev/null 2>&1; then
    echo "FAIL: $build/python/clef has no extension module (run make python)"
    exit 1
fi
PYTHONPATH="$build/python" CLEF_BIN="$CLEF_BIN" CLEF_TOP="$top" \
    "$PY" -m pytest -q -p no:cacheprovider "$top/tests/python"
