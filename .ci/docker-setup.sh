#!/usr/bin/env bash
# Make a Docker engine answer and build the shardsieve image offline, for the container tests.
#
# Idempotent: an engine that already answers is used as it is; packages already installed
# are not installed again; an existing base image is kept (the project image is rebuilt, as
# the code changed). Runs as root (CI does). Prints how long each step took.
#
# Environment: SHARDSIEVE_DOCKER_WAIT_S (engine start deadline, default 60),
#              SHARDSIEVE_DOCKERD_LOG (default /tmp/shardsieve-dockerd.log), plus those of
#              compose/make-offline-image.sh.
set -euo pipefail
cd "$(dirname "$0")/.."

wait_s="${SHARDSIEVE_DOCKER_WAIT_S:-60}"
dockerd_log="${SHARDSIEVE_DOCKERD_LOG:-/tmp/shardsieve-dockerd.log}"
say() { echo "== docker-setup: $*"; }
now() { date +%s; }
engine_answers() { timeout 10 docker info >/dev/null 2>&1; }

# Wait until `docker info` answers or the daemon with pid $1 exits or the deadline passes.
wait_for_engine() {
    local pid="$1" deadline=$(( $(now) + wait_s ))
    while [ "$(now)" -lt "$deadline" ]; do
        engine_answers && return 0
        kill -0 "$pid" 2>/dev/null || return 1
        sleep 0.5
    done
    return 1
}

start_dockerd() {
    # setsid: the daemon outlives this script and is not in the test runner's process group.
    setsid dockerd "$@" >>"$dockerd_log" 2>&1 < /dev/null &
    local pid=$!
    say "dockerd ${*:-(default options)} started (pid $pid, log $dockerd_log)"
    if wait_for_engine "$pid"; then
        return 0
    fi
    kill "$pid" 2>/dev/null || true
    return 1
}

t0=$(now)
if engine_answers; then
    say "a Docker engine already answers; using it"
else
    need=()
    command -v dockerd >/dev/null || need+=(docker.io)
    command -v docker-compose >/dev/null || need+=(docker-compose)
    command -v mmdebstrap >/dev/null || need+=(mmdebstrap)
    if [ ${#need[@]} -gt 0 ]; then
        if [ "$(id -u)" != 0 ]; then
            echo "docker-setup.sh: no Docker engine answers and installing ${need[*]} needs root" >&2
            exit 1
        fi
        say "installing ${need[*]}"
        export DEBIAN_FRONTEND=noninteractive
        apt-get update -qq
        apt-get install -y -qq "${need[@]}" >/dev/null
    fi
    t_install=$(now)
    say "packages ready in $((t_install - t0)) s"
    # The package may have started an engine itself (systemd hosts): then there is nothing to start.
    # Plain defaults first; where the kernel refuses iptables rules (some sandboxes) fall back
    # to no iptables management: published ports still work through docker-proxy.
    if engine_answers; then
        say "the installed package started an engine"
    elif ! start_dockerd; then
        say "dockerd did not answer within ${wait_s} s with defaults; retrying with --iptables=false"
        tail -n 20 "$dockerd_log" >&2 || true
        if ! start_dockerd --iptables=false --ip-masq=false; then
            echo "docker-setup.sh: dockerd did not answer within ${wait_s} s; last log lines:" >&2
            tail -n 40 "$dockerd_log" >&2 || true
            exit 1
        fi
    fi
fi
t1=$(now)
say "engine answering after $((t1 - t0)) s"

# mmdebstrap is needed only when the base image is missing.
if ! command -v mmdebstrap >/dev/null && ! docker image inspect "${SHARDSIEVE_BASE_IMAGE:-shardsieve-base:bookworm}" >/dev/null 2>&1; then
    say "installing mmdebstrap"
    DEBIAN_FRONTEND=noninteractive apt-get update -qq
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq mmdebstrap >/dev/null
fi
bash compose/make-offline-image.sh
t2=$(now)
say "images ready after $((t2 - t1)) s (total $((t2 - t0)) s)"
