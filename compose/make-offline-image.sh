#!/usr/bin/env bash
# Build the shardsieve image on a host that cannot pull from any container registry.
#
#   1. base image: Debian bookworm with python3 (3.11) made by mmdebstrap, loaded with
#      `docker import` (skipped when the base image already exists);
#   2. wheelhouse: the project and its runtime dependencies as wheels, made on the host with
#      pip (compose/wheelhouse/, git-ignored);
#   3. project image: `docker build --build-arg BASE=<base>` from compose/, installing only
#      from the wheelhouse (no network inside the build).
#
# Usage: compose/make-offline-image.sh [--base NAME:TAG] [--image NAME:TAG] [--rebuild-base]
# Environment: SHARDSIEVE_BASE_IMAGE, SHARDSIEVE_IMAGE, PYTHON (host interpreter for pip),
#              DEBIAN_MIRROR (optional mirror URL for mmdebstrap).
# Needs: root (or rootless mmdebstrap), docker, mmdebstrap, python3 with pip.
set -euo pipefail

here="$(cd "$(dirname "$0")" && pwd)"
root="$(cd "$here/.." && pwd)"
base="${SHARDSIEVE_BASE_IMAGE:-shardsieve-base:bookworm}"
image="${SHARDSIEVE_IMAGE:-shardsieve:dev}"
python="${PYTHON:-python3}"
rebuild_base=0

# A host python3 without pip (plain Debian) gets a throwaway venv that has one.
if ! "$python" -m pip --version >/dev/null 2>&1; then
    pip_venv="$(mktemp -d)/pip-venv"
    "$python" -m venv "$pip_venv" || { echo "make-offline-image.sh: $python has neither pip nor venv" >&2; exit 1; }
    python="$pip_venv/bin/python"
fi

while [ $# -gt 0 ]; do
    case "$1" in
        --base) base="$2"; shift 2 ;;
        --image) image="$2"; shift 2 ;;
        --rebuild-base) rebuild_base=1; shift ;;
        -h|--help) sed -n '2,16p' "$0"; exit 0 ;;
        *) echo "make-offline-image.sh: unknown argument '$1' (see --help)" >&2; exit 2 ;;
    esac
done

say() { echo "== make-offline-image: $*"; }
# Run a chatty command with its output in a log; show the log only when it fails.
quietly() {
    local log rc=0
    log="$(mktemp)"
    "$@" >"$log" 2>&1 || rc=$?
    if [ "$rc" != 0 ]; then
        grep -v 'is ignored: it is neither a file nor a directory' "$log" >&2 || true
        echo "make-offline-image.sh: '$*' failed with exit code $rc" >&2
    fi
    rm -f "$log"
    return "$rc"
}
now() { date +%s; }

if ! docker info >/dev/null 2>&1; then
    echo "make-offline-image.sh: no Docker engine answers 'docker info'; start dockerd first" \
         "(.ci/docker-setup.sh does it)" >&2
    exit 1
fi

# 1. Base image.
t0=$(now)
if [ "$rebuild_base" = 0 ] && docker image inspect "$base" >/dev/null 2>&1; then
    say "base image $base exists; kept"
else
    command -v mmdebstrap >/dev/null || { echo "make-offline-image.sh: mmdebstrap is not installed" \
        "(apt-get install -y mmdebstrap)" >&2; exit 1; }
    work="$(mktemp -d)"
    trap 'rm -rf "$work"' EXIT
    say "mmdebstrap bookworm -> $base"
    # shellcheck disable=SC2086 # an empty mirror argument must vanish
    mmdebstrap --quiet --variant=apt --include=python3,python3-venv,ca-certificates \
        bookworm "$work/base.tar" ${DEBIAN_MIRROR:-}
    docker import --change 'CMD ["python3"]' "$work/base.tar" "$base" >/dev/null
    rm -f "$work/base.tar"
fi
t1=$(now)

# 2. Wheelhouse. The base's python is 3.11, so the wheels must be for CPython 3.11.
wheelhouse="$here/wheelhouse"
mkdir -p "$wheelhouse"
rm -f "$wheelhouse"/shardsieve-*.whl   # the project wheel always comes from the current tree
host_minor="$("$python" -c 'import sys; print("%d.%d" % sys.version_info[:2])')"
if [ "$host_minor" = "3.11" ]; then
    say "pip wheel . -> $wheelhouse"
    quietly "$python" -m pip wheel --quiet "$root" -w "$wheelhouse"
else
    # A different host Python: build the pure-Python project wheel, then fetch binary wheels
    # of its dependencies for CPython 3.11 on this architecture.
    say "host Python is $host_minor; fetching CPython 3.11 wheels for the image"
    quietly "$python" -m pip wheel --quiet --no-deps "$root" -w "$wheelhouse"
    arch="$(uname -m)"
    quietly "$python" -m pip download --quiet --only-binary=:all: --python-version 3.11 --implementation cp \
        --platform "manylinux_2_17_$arch" --platform "manylinux2014_$arch" \
        --platform "manylinux_2_28_$arch" --platform any \
        -d "$wheelhouse" "$wheelhouse"/shardsieve-*.whl
fi
t2=$(now)

# 3. Project image.
say "docker build $image (BASE=$base)"
quietly docker build --build-arg "BASE=$base" -t "$image" "$here"
t3=$(now)
say "done: base $((t1 - t0)) s, wheelhouse $((t2 - t1)) s, image $((t3 - t2)) s"
