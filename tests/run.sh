#!/bin/sh
# Run the whole test suite: every $BUILD/tests/test_* program (cmocka) and
# every tests/cli/*.sh script.  Prints one line per program or script and a
# closing "N passed, N failed" line counting individual tests.
# CLEF_TEST_ONLY="test_sht spectrum.sh ..." runs only the named programs
# and scripts (tests/kernels.sh uses it).
BUILD=${1:-build}
top=$(cd "$(dirname "$0")/.." && pwd)
cd "$top" || exit 2
CLEF_BIN="$top/$BUILD/clef"; export CLEF_BIN
CLEF_PYTHON=${CLEF_PYTHON:-/usr/bin/python3}; export CLEF_PYTHON
CLEF_TEST_TMP=$(mktemp -d "${TMPDIR:-/tmp}/clef-check-XXXXXX"); export CLEF_TEST_TMP
CLEF_CACHE_DIR="$CLEF_TEST_TMP/cache"; export CLEF_CACHE_DIR
# Under the leak checker (make sanitize): fontconfig, used by cairo's text
# calls, never frees a few hundred bytes of its configuration and caches;
# that is not ours to fix.  Every program and script that draws needs it.
printf 'leak:libfontconfig.so\n' > "$CLEF_TEST_TMP/lsan.supp"
LSAN_OPTIONS="suppressions=$CLEF_TEST_TMP/lsan.supp${LSAN_OPTIONS:+:$LSAN_OPTIONS}"; export LSAN_OPTIONS
trap 'rm -rf "$CLEF_TEST_TMP"' EXIT
: "${OMP_NUM_THREADS:=2}"; export OMP_NUM_THREADS

selected() {
    [ -z "${CLEF_TEST_ONLY:-}" ] && return 0
    case " $CLEF_TEST_ONLY " in *" $1 "*) return 0 ;; esac
    return 1
}

pass=0; fail=0; failed_names=""
log="$CLEF_TEST_TMP/log"
for t in "$BUILD"/tests/test_*; do
    [ -x "$t" ] || continue
    name=$(basename "$t")
    selected "$name" || continue
    start=$(date +%s)
    if "$t" >"$log" 2>&1; then rc=0; else rc=$?; fi
    secs=$(( $(date +%s) - start ))
    np=$(sed -n 's/^\[  PASSED  \] \([0-9]*\) test.*/\1/p' "$log" | tail -n 1)
    nf=$(sed -n 's/^\[  FAILED  \] \([0-9]*\) test.*/\1/p' "$log" | tail -n 1)
    np=${np:-0}; nf=${nf:-0}
    if [ "$rc" -ne 0 ] && [ "$nf" -eq 0 ]; then nf=1; fi   # crashed before its summary
    pass=$((pass + np)); fail=$((fail + nf))
    if [ "$nf" -gt 0 ]; then
        echo "FAIL $name ($np passed, $nf failed, ${secs}s)"
        sed 's/^/    /' "$log" | grep -v '^    \[ \(RUN\|       OK\) ' | tail -n 40
        failed_names="$failed_names $name"
    else
        echo "ok   $name ($np passed, ${secs}s)"
    fi
done
for s in tests/cli/*.sh; do
    [ -f "$s" ] || continue
    name=$(basename "$s")
    selected "$name" || continue
    start=$(date +%s)
    if sh "$s" >"$log" 2>&1; then rc=0; else rc=$?; fi
    secs=$(( $(date +%s) - start ))
    if [ "$rc" -eq 0 ]; then
        pass=$((pass + 1)); echo "ok   $name (${secs}s)"
    else
        fail=$((fail + 1)); echo "FAIL $name (exit $rc, ${secs}s)"
        sed 's/^/    /' "$log" | tail -n 40
        failed_names="$failed_names $name"
    fi
done
[ -n "$failed_names" ] && echo "failed:$failed_names"
echo "$pass passed, $fail failed"
[ "$fail" -eq 0 ] && [ "$pass" -gt 0 ]
