#!/usr/bin/env bash
# The Python module's checks: build the wheel into a venv under target/ and run pytest against the CLI built by
# `cargo build --release`. Prints SKIPPED and exits 0 when pip cannot reach the package registry.
set -euo pipefail
cd "$(dirname "$0")"
ROOT=$(cd .. && pwd)
VENV="$ROOT/target/pyvenv"
if [ ! -x "$VENV/bin/python" ]; then
    python3 -m venv "$VENV"
fi
if ! "$VENV/bin/python" -c "import maturin, numpy, pytest, dask, distributed" 2>/dev/null; then
    if ! "$VENV/bin/pip" install -q maturin numpy pytest dask distributed; then
        echo "python: SKIPPED (pip cannot reach the package registry)"
        exit 0
    fi
fi
export PATH="$VENV/bin:$PATH"
cargo build --release --manifest-path "$ROOT/Cargo.toml" --bin convchain
# The extension builds into python/target (its own workspace); --no-build-isolation uses the venv's maturin.
CARGO_TARGET_DIR="$PWD/target" "$VENV/bin/pip" install -q --no-build-isolation --force-reinstall --no-deps .
# Run from tests/ so the installed package is imported, not the source folder.
cd tests && CONVCHAIN_BIN="$ROOT/target/release/convchain" "$VENV/bin/python" -m pytest -q -p no:cacheprovider .
