#!/usr/bin/env bash
# Set up a fresh machine for the test suite and run it: system libraries,
# a virtual environment with the test, dask and recordings extras, then pytest.
# Extra arguments go to pytest (e.g. `bash scripts/test.sh -k scanlog`).
set -euo pipefail
cd "$(dirname "$0")/.."

need_apt=()
# open3d-cpu's wheel links against libusb at import time.
ldconfig -p 2>/dev/null | grep -q 'libusb-1\.0\.so\.0' || need_apt+=(libusb-1.0-0)
# The report's browser test uses Debian's headless Chromium when it can be had.
command -v chromium >/dev/null 2>&1 || need_apt+=(chromium)
if [ ${#need_apt[@]} -gt 0 ] && command -v apt-get >/dev/null 2>&1 && [ "$(id -u)" = 0 ]; then
    echo "installing system packages: ${need_apt[*]}"
    (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq "${need_apt[@]}" >/dev/null) \
        || echo "warning: could not install ${need_apt[*]}; dependent tests will fail or skip" >&2
fi

PY=${PYTHON:-python3}
[ -x .venv/bin/python ] || "$PY" -m venv .venv
.venv/bin/python -m pip install -q --upgrade pip
.venv/bin/python -m pip install -q -e ".[test,dask,recordings]"
exec .venv/bin/python -m pytest -q "$@"
