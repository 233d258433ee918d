#!/usr/bin/env bash
# blocksur's single entry point. It needs Python 3.10+ and cargo (Rust) and nothing else: no apt,
# no root. On a fresh clone it makes .venv, installs requirements-dev.txt there, builds the wheel
# with `pip wheel .` and installs that wheel (not the source tree) into .venv.
#   ./run.sh demo         set up, build, and run the demo on generated data
#   ./run.sh test         set up, build, and run the whole test suite: the Rust core (cargo test)
#                         and the Python suite against the installed wheel
#   ./run.sh build        set up, build the wheel, install it into .venv
#   ./run.sh bench        set up, build, and run the benchmarks (slow; see benchmarks/README.md)
#   ./run.sh test-lapack  the Rust core's tests on the optional LAPACK backend (cargo feature
#                         `lapack`; needs the system OpenBLAS and pkg-config: see README.md)
# PYTHON=python3.12 ./run.sh ... picks the interpreter .venv is made with (default: python3).
set -euo pipefail
cd "$(dirname "$0")"
ROOT=$PWD
VENV=$ROOT/.venv
PY=$VENV/bin/python
WHEELS=$ROOT/target/wheels

need_cargo() {
    command -v cargo >/dev/null 2>&1 || { echo "cargo (Rust) is required: https://rustup.rs" >&2; exit 1; }
}

setup_python() {
    if [ ! -x "$PY" ]; then
        local python=${PYTHON:-python3}
        "$python" -c 'import sys; sys.exit(sys.version_info < (3, 10))' 2>/dev/null \
            || { echo "Python 3.10 or later is required ($python: $("$python" --version 2>&1))" >&2; exit 1; }
        echo "== creating $VENV ($("$python" --version))"
        "$python" -m venv "$VENV"
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
    need_cargo
    setup_python
    echo "== building the wheel (pip wheel .: maturin, release; the first build compiles the Rust crates)"
    rm -f "$WHEELS"/blocksur-*.whl
    # A target directory of its own: the extension (feature `python`) and `cargo test` (default
    # features) both write target/release/deps/libblocksur.so (cargo names a cdylib without a hash),
    # so in one directory each would rebuild the crate after the other (a minute or more each time).
    CARGO_TARGET_DIR=$ROOT/target/wheel "$PY" -m pip wheel -q --no-deps -w "$WHEELS" .
    local wheel
    wheel=$(ls "$WHEELS"/blocksur-*.whl)
    echo "== installing $(basename "$wheel") into .venv"
    "$PY" -m pip install -q --no-deps --force-reinstall "$wheel"
    # The tests and the demo must import this wheel, never python/ from the source tree.
    "$PY" -c 'import blocksur, sys; print("== blocksur", blocksur.__version__, "from", blocksur.__file__)
if not blocksur.__file__.startswith(sys.prefix): sys.exit("blocksur is not imported from .venv")'
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
        echo "== Python tests (pytest, against the installed wheel)"
        "$PY" -m pytest -q "${@:2}"
        ;;
    build)
        build
        ;;
    bench)
        build
        "$PY" benchmarks/bench_core.py "${@:2}"
        ;;
    test-lapack)
        need_cargo
        if ! pkg-config --exists openblas 2>/dev/null; then
            echo "the lapack backend links the system OpenBLAS: install libopenblas-dev and pkg-config" >&2
            echo "(Debian/Ubuntu: sudo apt-get install libopenblas-dev pkg-config; see README.md)" >&2
            exit 1
        fi
        echo "== Rust core tests on the lapack backend (cargo test --features lapack)"
        cargo test --release -q --features lapack "${@:2}"
        ;;
    *)
        echo "usage: ./run.sh demo | test | build | bench | test-lapack" >&2
        exit 2
        ;;
esac
