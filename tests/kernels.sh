#!/bin/sh
# The part of the suite that runs the compute kernels (transforms,
# simulation, coupling, and the spectrum command end to end), again with
# each kernel narrower than the automatic choice forced through
# CLEF_KERNEL (include/clef/kernel.h), so that the AVX2 and baseline paths
# a CPU without AVX-512 (or without AVX) takes pass the same checks.  The
# whole suite thrice would take too long; test_spectrum's ensembles run
# with the automatic kernel only.  Kernels this machine cannot run are
# reported and skipped.
# Usage: sh tests/kernels.sh [build-dir]
BUILD=${1:-build}
top=$(cd "$(dirname "$0")/.." && pwd)
cd "$top" || exit 2
: "${CLEF_KERNEL_TESTS:=test_sht test_sim test_coupling spectrum.sh simulate.sh}"
have=$(env -u CLEF_KERNEL "$BUILD/clef" --version | sed -n 's/^kernels: \(.*\) (in use: \(.*\))$/\1/p')
auto=$(env -u CLEF_KERNEL "$BUILD/clef" --version | sed -n 's/^kernels: .* (in use: \(.*\))$/\1/p')
[ -n "$auto" ] || { echo "kernels.sh: cannot read the kernel list from $BUILD/clef --version"; exit 1; }
status=0
for k in avx2 base; do
    [ "$k" = "$auto" ] && continue
    case " $have " in
    *" $k "*) ;;
    *) echo "== kernel $k: not available on this CPU or build, skipped"; continue ;;
    esac
    echo "== kernel $k forced (CLEF_KERNEL=$k): $CLEF_KERNEL_TESTS"
    CLEF_KERNEL=$k CLEF_TEST_ONLY="$CLEF_KERNEL_TESTS" sh tests/run.sh "$BUILD" || status=1
done
exit $status
