#!/usr/bin/env bash
# Set up a virtual environment in .venv with plcube (the pmap package) and all its extras.
#   scripts/setup.sh          # pmap[all]
#   scripts/setup.sh --test   # also the system packages the tests need (Xvfb, Mesa, Qt's X libs,
#                             # headless Chromium for the HTML report)
set -euo pipefail
cd "$(dirname "$0")/.."

PY=${PYTHON:-python3}
want_test=0
[[ "${1:-}" == "--test" ]] && want_test=1

as_root() { [[ "$(id -u)" == 0 ]]; }

apt_install() {
    # Install Debian packages when running as root and apt-get exists; otherwise say what is missing.
    if as_root && command -v apt-get >/dev/null; then
        echo "setup: installing system packages: $*" >&2
        export DEBIAN_FRONTEND=noninteractive
        apt-get update -qq >/dev/null || true
        apt-get install -y -qq --no-install-recommends "$@" >/dev/null
    else
        echo "setup: please install these system packages: $*" >&2
    fi
}

if ! "$PY" -c 'import sys; sys.exit(sys.version_info < (3, 11))'; then
    echo "setup: pmap needs Python >= 3.11 (found $("$PY" --version 2>&1))" >&2
    exit 1
fi

if [[ ! -x .venv/bin/python ]]; then
    if ! "$PY" -m venv .venv 2>/dev/null; then
        rm -rf .venv
        apt_install python3-venv
        "$PY" -m venv .venv
    fi
fi

stamp=.venv/.pmap-installed
if [[ ! -f $stamp || pyproject.toml -nt $stamp ]]; then
    echo "setup: installing plcube (import pmap) with all extras into .venv (first time: a few minutes)" >&2
    log=.venv/pip-install.log
    # the distribution was called "pmap" before 0.2: drop it so its console script and
    # napari manifest do not linger beside plcube's
    .venv/bin/python -m pip uninstall -q -y pmap >/dev/null 2>&1 || true
    if ! { .venv/bin/python -m pip install -q --upgrade pip && \
           .venv/bin/python -m pip install -q -e ".[all]"; } >"$log" 2>&1; then
        tail -n 30 "$log" >&2
        echo "setup: pip install failed (full log: $log)" >&2
        exit 1
    fi
    .venv/bin/python -c 'import pmap, xarray, dask, zarr, napari' || { echo "setup: install failed" >&2; exit 1; }
    touch "$stamp"
    rm -f .venv/.pmap-kernels-warm
fi

# Compile pmap's numerical kernels into numba's cache now (a minute or two, once), so that a
# first `plcube process` or `plcube demo` does not wait for it; PMAP_NO_WARMUP=1 skips this
# (the first run then compiles them, and says so).
warm=.venv/.pmap-kernels-warm
if [[ ! -f $warm && -z "${PMAP_NO_WARMUP:-}" ]]; then
    if .venv/bin/python -m pmap warmup; then
        touch "$warm"
    else
        echo "setup: compiling the kernels in advance failed; the first run will compile them" >&2
    fi
fi

if (( want_test )); then
    # Xvfb and Mesa (software OpenGL) plus the X libraries Qt 5 loads, for the viewer tests.
    need=()
    command -v Xvfb >/dev/null || need+=(xvfb xauth)
    for lib in libGL.so.1 libEGL.so.1 libxkbcommon-x11.so.0 libxcb-icccm.so.4 libxcb-image.so.0 \
               libxcb-keysyms.so.1 libxcb-randr.so.0 libxcb-render-util.so.0 libxcb-xinerama.so.0 \
               libxcb-shape.so.0 libxcb-xfixes.so.0 libxcb-xkb.so.1 libfontconfig.so.1 libdbus-1.so.3; do
        ldconfig -p 2>/dev/null | grep -q "$lib" || { need+=(libgl1 libgl1-mesa-dri libegl1 libxkbcommon-x11-0 \
            libxcb-icccm4 libxcb-image0 libxcb-keysyms1 libxcb-randr0 libxcb-render-util0 libxcb-xinerama0 \
            libxcb-shape0 libxcb-xfixes0 libxcb-xkb1 libxcb-cursor0 libfontconfig1 libdbus-1-3 libglib2.0-0); break; }
    done
    if (( ${#need[@]} )); then apt_install "${need[@]}"; fi
    # Headless Chromium (the distribution's package) renders the HTML report in its test.
    if ! command -v chromium >/dev/null && ! command -v chromium-browser >/dev/null \
            && ! command -v google-chrome >/dev/null; then
        apt_install chromium
    fi
fi
