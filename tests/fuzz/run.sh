#!/bin/sh
# Run every fuzz harness in build-fuzz/fuzz/ (built by make fuzz-build).
#   sh tests/fuzz/run.sh ci SECONDS    each harness ~SECONDS over a copy of its
#                                      corpus (CI: make fuzz-ci, 20 s)
#   sh tests/fuzz/run.sh long SECONDS  each harness up to 10^6 executions or
#                                      SECONDS (make fuzz, default 1800), niced;
#                                      new inputs go to build-fuzz/corpus/
# One line per harness: executions, coverage (edges "cov", features "ft"),
# corpus size, and findings; exit 1 if any harness found a crash, leak,
# timeout or sanitizer report (the input is kept in build-fuzz/findings/).
# FUZZ_ONLY="map table" restricts the run to some harnesses.
set -u
mode=${1:-ci}; secs=${2:-20}
top=$(cd "$(dirname "$0")/../.." && pwd)
cd "$top" || exit 2
out=build-fuzz; mkdir -p "$out/findings" "$out/logs" "$out/corpus"
export OMP_NUM_THREADS=1
export ASAN_OPTIONS="detect_leaks=1:allocator_may_return_null=1"
export UBSAN_OPTIONS="print_stacktrace=1:halt_on_error=1"
bad=0
for bin in "$out"/fuzz/fuzz_*; do
    [ -x "$bin" ] || continue
    h=$(basename "$bin"); short=${h#fuzz_}
    if [ -n "${FUZZ_ONLY:-}" ]; then
        case " $FUZZ_ONLY " in *" $short "*) ;; *) continue ;; esac
    fi
    seeds="tests/fuzz/corpus/$h"
    dict=tests/fuzz/text.dict
    case "$short" in
    map|alm) dict=tests/fuzz/fits.dict ;;
    runfile) dict=tests/fuzz/run.dict ;;
    table|spectrum_text)   # text and FITS readers behind one entry point
        dict="$out/both.dict"; cat tests/fuzz/text.dict tests/fuzz/fits.dict > "$dict" ;;
    esac
    log="$out/logs/$h.log"
    if [ "$mode" = long ]; then
        work="$out/corpus/$h"; mkdir -p "$work"
        runs="-runs=1000000"; nice="nice -n 10"
    else
        work="$out/ci-corpus/$h"; rm -rf "$work"; mkdir -p "$work"; cp "$seeds"/* "$work"/ 2>/dev/null
        runs=""; nice=""
    fi
    start=$(date +%s)
    # shellcheck disable=SC2086
    $nice "$bin" "$work" "$seeds" -dict="$dict" -max_total_time="$secs" $runs \
        -max_len=65536 -timeout=20 -rss_limit_mb=2560 -malloc_limit_mb=2560 \
        -print_final_stats=1 -artifact_prefix="$out/findings/$h-" >"$log" 2>&1
    rc=$?
    took=$(( $(date +%s) - start ))
    execs=$(sed -n 's/^stat::number_of_executed_units: *//p' "$log" | tail -n 1)
    cov=$(grep -E '^#[0-9]+' "$log" | tail -n 1 | sed -n 's/.*cov: \([0-9]*\).*ft: \([0-9]*\).*corp: \([0-9]*\).*/edges \1, features \2, corpus \3/p')
    if [ "$rc" -eq 0 ]; then
        echo "ok   $h: ${execs:-?} executions in ${took}s, ${cov:-no coverage line}"
    else
        bad=1
        echo "FAIL $h: exit $rc after ${execs:-?} executions in ${took}s, ${cov:-}"
        grep -E 'ERROR|SUMMARY|runtime error|Test unit written' "$log" | head -n 8 | sed 's/^/    /'
    fi
    [ "$mode" = long ] || rm -rf "$work"
done
exit $bad
