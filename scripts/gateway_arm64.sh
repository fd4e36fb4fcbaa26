#!/usr/bin/env bash
# Build (once per machine) a Debian arm64 userland that runs a bundle the way a gateway would:
# Debian's own python3.11 and python3-numpy packages, run under qemu-user-static.
#
#   scripts/gateway_arm64.sh [ROOT]     default ROOT: ${XDG_CACHE_HOME:-$HOME/.cache}/ganlet/arm64-root
#
# Then: qemu-aarch64-static -L ROOT -cpu cortex-a53 ROOT/usr/bin/python3.11 run.py check
# Needs Debian's apt and dpkg; root only for what changes the system (dpkg --add-architecture
# arm64, apt-get update, apt-get install qemu-user-static). Rerunning with ROOT built reuses
# it and only prints the versions. GANLET_NO_BUILD=1: never build, fail if ROOT is not ready.
# The last line is "versions: python=X numpy=Y paho-mqtt=Z" (tests/gateways.py reads it).
set -euo pipefail

ROOT="${1:-${XDG_CACHE_HOME:-$HOME/.cache}/ganlet/arm64-root}"
# The interpreter, numpy and the shared libraries they load (found by readelf NEEDED on
# python3.11, lib-dynload and numpy; curses/readline/dbm/nis are left out: the runtime uses
# none). python3-paho-mqtt is Architecture: all, the optional MQTT client.
ARM64_PACKAGES=(python3.11-minimal libpython3.11-minimal libpython3.11-stdlib python3-numpy
    libc6 zlib1g libexpat1 libffi8 libssl3 libbz2-1.0 liblzma5 libsqlite3-0 libuuid1
    libblas3 liblapack3 libgfortran5 libgcc-s1)
NOARCH_PACKAGES=(python3-paho-mqtt)
RECIPE="v1 ${ARM64_PACKAGES[*]} ${NOARCH_PACKAGES[*]}"
MARKER="$ROOT/.ganlet-arm64-ready"
# The smallest board profile is Cortex-A53: emulate its feature set so numpy picks the same
# SIMD kernels a real A53 would (qemu's default CPU has extensions an A53 lacks).
QEMU_CPU_MODEL=cortex-a53

die() { echo "gateway_arm64: $*" >&2; exit 1; }
as_root() {
    [ "$(id -u)" = 0 ] || die "needs root to run: $* (or ask an admin to run this script once)"
    "$@"
}

run_python() {
    qemu-aarch64-static -L "$ROOT" -cpu "$QEMU_CPU_MODEL" "$ROOT/usr/bin/python3.11" "$@"
}

SMOKE="$(cd "$(dirname "$0")" && pwd)/gateway_smoke.py"  # imports, one matmul, the versions line

ensure_host_tools() {
    if ! command -v apt-get >/dev/null || ! command -v dpkg-deb >/dev/null; then
        die "needs Debian's apt-get and dpkg-deb (this is not a Debian-based machine)"
    fi
    local need_update=0
    if ! dpkg --print-foreign-architectures | grep -qx arm64; then
        as_root dpkg --add-architecture arm64
        need_update=1
    fi
    apt-cache show python3.11-minimal:arm64 >/dev/null 2>&1 || need_update=1
    if [ "$need_update" = 1 ]; then
        as_root apt-get update -q >&2 || die "apt-get update failed (no network to Debian's registry?)"
        apt-cache show python3.11-minimal:arm64 >/dev/null 2>&1 \
            || die "no arm64 package lists after apt-get update (no network to Debian's registry?)"
    fi
    if ! command -v qemu-aarch64-static >/dev/null; then
        DEBIAN_FRONTEND=noninteractive as_root apt-get install -y -q qemu-user-static >&2 \
            || die "apt-get install qemu-user-static failed"
    fi
}

build_root() {
    DEBS="$(mktemp -d)"
    trap 'rm -rf "$DEBS"' EXIT
    local arm64=("${ARM64_PACKAGES[@]/%/:arm64}")
    echo "gateway_arm64: downloading ${#arm64[@]} arm64 packages + ${NOARCH_PACKAGES[*]}" >&2
    # apt-get download as root warns that the _apt user cannot write a mktemp folder; harmless
    (cd "$DEBS" && apt-get download -q "${arm64[@]}" "${NOARCH_PACKAGES[@]}" >&2) \
        || die "apt-get download failed (no network to Debian's registry, or a package is gone)"
    rm -rf "$ROOT"
    mkdir -p "$ROOT"
    touch "$ROOT/.ganlet-arm64-partial"
    for deb in "$DEBS"/*.deb; do dpkg-deb -x "$deb" "$ROOT"; done
    # update-alternatives would make these links on a real install; numpy links libblas.so.3
    local lib="$ROOT/usr/lib/aarch64-linux-gnu"
    ln -sf blas/libblas.so.3 "$lib/libblas.so.3"
    ln -sf lapack/liblapack.so.3 "$lib/liblapack.so.3"
    # Debian byte-compiles at install time (py3compile); without it every emulated start
    # compiles numpy from source (13 s instead of 2 s for "import numpy"). tests/ folders are
    # left out.
    echo "gateway_arm64: byte-compiling the standard library and numpy under emulation" >&2
    run_python -m compileall -q -j 0 -x '/tests?/' \
        "$ROOT/usr/lib/python3.11" "$ROOT/usr/lib/python3/dist-packages" >&2 \
        || die "byte-compiling under qemu failed"
}

mkdir -p "$(dirname "$ROOT")"
exec 9>"$ROOT.lock"
flock 9  # one builder at a time (parallel test sessions)

if [ "$(cat "$MARKER" 2>/dev/null)" != "$RECIPE" ]; then
    [ "${GANLET_NO_BUILD:-0}" = 1 ] && die "$ROOT is not built (GANLET_NO_BUILD=1); run $0"
    # never wipe a folder this script did not make (a mistyped ROOT)
    if [ -n "$(ls -A "$ROOT" 2>/dev/null)" ] && [ ! -e "$MARKER" ] \
        && [ ! -e "$ROOT/.ganlet-arm64-partial" ]; then
        die "$ROOT is not empty and was not made by this script; pass another folder"
    fi
    ensure_host_tools
    build_root
    run_python "$SMOKE" >/dev/null || die "the arm64 python or numpy does not start under qemu"
    echo "$RECIPE" >"$MARKER"
    rm -f "$ROOT/.ganlet-arm64-partial"
fi
command -v qemu-aarch64-static >/dev/null \
    || die "qemu-aarch64-static is missing (apt-get install qemu-user-static)"
echo "gateway_arm64: $ROOT (qemu $(qemu-aarch64-static --version | head -1 | awk '{print $3}'), cpu $QEMU_CPU_MODEL)" >&2
run_python "$SMOKE" || die "the arm64 python or numpy does not start under qemu"
