#!/bin/sh
# Build step of docker/Dockerfile (mounted for the step, never in a layer):
# pip install into the image's virtual environment /opt/sounding.
#   pip-install.sh torch SPEC     the pinned CPU torch
#   pip-install.sh dependencies   sounding's dependencies from pyproject.toml
#   pip-install.sh sounding       sounding itself, without dependencies
# pip trusts the CA bundle of the secret ca and reads the configuration of
# the secret pip.conf when they are given; docker/wheels/ is a find-links folder.
set -eu
here=/run/sounding-build
venv=/opt/sounding
if [ -s /run/secrets/ca ]; then export PIP_CERT=/run/secrets/ca; fi
if [ -s /run/secrets/pip.conf ]; then export PIP_CONFIG_FILE=/run/secrets/pip.conf; fi
if [ -n "${PACKAGE_INDEX_URL:-}" ]; then export PIP_INDEX_URL="$PACKAGE_INDEX_URL"; fi
export PIP_NO_CACHE_DIR=1 PIP_DISABLE_PIP_VERSION_CHECK=1 PIP_NO_INPUT=1 PIP_ROOT_USER_ACTION=ignore

pip_install() {
    "$venv/bin/python" -m pip install --find-links "$here/wheels" "$@"
}

case "$1" in
torch)
    if [ -n "${TORCH_INDEX_URL:-}" ]; then
        pip_install --index-url "$TORCH_INDEX_URL" "$2"
    else
        pip_install "$2"
    fi
    # Torch's C++ headers, its C++ test programs and protoc serve only to build and
    # test extensions; the service never uses them (about 190 MB). torch_shm_manager
    # stays: `import torch` needs it.
    torch_dir="$("$venv/bin/python" -c 'import sysconfig; print(sysconfig.get_paths()["purelib"])')/torch"
    rm -rf "$torch_dir/include" "$torch_dir/test"
    find "$torch_dir/bin" -mindepth 1 ! -name torch_shm_manager -exec rm -rf {} +
    ;;
dependencies)
    "$venv/bin/python" - "$here/pyproject.toml" >/tmp/sounding-requirements.txt <<'PY'
import sys
import tomllib

with open(sys.argv[1], "rb") as f:
    print("\n".join(tomllib.load(f)["project"]["dependencies"]))
PY
    pip_install -r /tmp/sounding-requirements.txt
    rm -f /tmp/sounding-requirements.txt
    ;;
sounding)
    pip_install --no-deps "$here/src"
    ;;
*)
    echo "pip-install.sh: unknown step $1" >&2
    exit 2
    ;;
esac
# No byte-code or build leftovers outside the venv; pip's cache is off.
rm -rf /tmp/pip-* /root/.cache
