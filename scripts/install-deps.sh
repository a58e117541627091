#!/bin/sh
# Install the Debian packages clef needs to build, test and draw figures.
# Idempotent: does nothing (and prints nothing) when every package is present.
# Must run as root to install; otherwise it only reports what is missing.
set -eu

PKGS="build-essential pkg-config
libchealpix-dev libcfitsio-dev libfftw3-dev
liblapacke-dev libopenblas-dev libgsl-dev
libcjson-dev libcairo2-dev libcmocka-dev nettle-dev libyaml-dev
libopenmpi-dev openmpi-bin
fitsverify poppler-utils
python3 python3-dev python3-numpy python3-pytest python3-astropy python3-scipy python3-colorspacious"
# --fuzz: only what the fuzz step needs (clang with libFuzzer and the
# sanitizer runtimes, LLVM's OpenMP runtime for clang builds).
if [ "${1:-}" = "--fuzz" ]; then
    PKGS="clang libclang-rt-14-dev libfuzzer-14-dev libomp-14-dev"
fi

missing=""
for p in $PKGS; do
    if ! dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed"; then
        missing="$missing $p"
    fi
done
[ -z "$missing" ] && exit 0

if [ "$(id -u)" -ne 0 ]; then
    echo "clef: missing Debian packages:$missing" >&2
    echo "clef: run 'sudo scripts/install-deps.sh' (or make deps as root) to install them" >&2
    exit 1
fi

echo "clef: installing Debian packages:$missing" >&2
export DEBIAN_FRONTEND=noninteractive
apt-get update -qq >/dev/null || apt-get update
# shellcheck disable=SC2086
apt-get install -y -qq --no-install-recommends $missing >/dev/null || \
    apt-get install -y --no-install-recommends $missing
