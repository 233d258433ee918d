#!/usr/bin/env bash
# blocksur's single entry point. On a fresh machine it installs what it needs first.
#   ./run.sh demo    set up, build, and run the demo on generated data
#   ./run.sh test    set up, build, and run the whole test suite (Rust core + Python)
#   ./run.sh build   set up and build only
#   ./run.sh bench   set up, build, and run the benchmarks (slow; see benchmarks/README.md)
set -euo pipefail
cd "$(dirname "$0")"
ROOT=$PWD
VENV=$ROOT/.venv
PY=$VENV/bin/python

as_root() { if [ "$(id -u)" = 0 ]; then "$@"; else sudo "$@"; fi; }

setup_system() {
    # System OpenBLAS (BLAS + LAPACK) for the Rust core, and pkg-config to find it.
    if ! dpkg -s libopenblas-dev >/dev/null 2>&1 || ! command -v pkg-config >/dev/null 2>&1; then
        echo "== installing libopenblas-dev and pkg-config (apt)"
        as_root apt-get update -qq
        DEBIAN_FRONTEND=noninteractive as_root apt-get install -y -qq libopenblas-dev pkg-config >/dev/null
    fi
    command -v cargo >/dev/null 2>&1 || { echo "cargo (Rust) is required: https://rustup.rs" >&2; exit 1; }
}

setup_python() {
    if [ ! -x "$PY" ]; then
        echo "== creating $VENV"
        python3 -m venv "$VENV"
    fi
    local stamp=$VENV/.requirements.stamp
    if [ ! -f "$stamp" ] || ! cmp -s requirements-dev.txt "$stamp"; then
        echo "== installing Python packages (requirements-dev.txt)"
        "$PY" -m pip install -q --upgrade pip
        "$PY" -m pip install -q -r requirements-dev.txt
        cp requirements-dev.txt "$stamp"
    fi
}

build() {
    setup_system
    setup_python
    echo "== building the extension (maturin, release)"
    VIRTUAL_ENV=$VENV PATH=$VENV/bin:$PATH "$VENV/bin/maturin" develop --release -q 2>&1 | grep -v '^\s*$' | tail -n 3
}

case "${1:-}" in
    demo)
        build
        "$PY" -m blocksur.demo "${@:2}"
        ;;
    test)
        build
        echo "== Rust core tests (cargo test, no Python)"
        cargo test --release -q
        echo "== Python tests (pytest)"
        "$PY" -m pytest -q "${@:2}"
        ;;
    build)
        build
        ;;
    bench)
        build
        "$PY" benchmarks/bench_core.py "${@:2}"
        ;;
    *)
        echo "usage: ./run.sh demo | test | build | bench" >&2
        exit 2
        ;;
esac
