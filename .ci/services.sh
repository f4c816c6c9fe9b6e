#!/usr/bin/env bash
# Services for the engine tests (tests/engines): a throwaway PostgreSQL cluster and Java for Spark;
# and Chromium for the HTML report's browser test (tests/test_report_browser.py).
#
#   bash .ci/services.sh install        # Debian packages: PostgreSQL server, Java 17, Chromium
#                                       # (each only if missing)
#   eval "$(bash .ci/services.sh start)" # start PostgreSQL; prints the export lines to eval
#   bash .ci/services.sh stop           # stop the cluster named by INDB_SERVICES_DIR, delete it
#
# `start` prints INDB_TEST_POSTGRES_URL (read by tests/engines/conftest.py), JAVA_HOME (pyspark
# needs a JVM; Debian's java on PATH leaves JAVA_HOME unset) and INDB_SERVICES_DIR (what `stop`
# removes). Spark itself (local driver, standalone master + worker, Spark Connect server) is
# started and stopped by the test fixtures, from the pyspark package installed in .venv.
set -euo pipefail

log() { echo "services: $*" >&2; }

pg_bindir() {
    # newest server version installed by Debian's postgresql package
    local d
    d=$(ls -d /usr/lib/postgresql/*/bin 2>/dev/null | sort -V | tail -n 1 || true)
    if [[ -n "$d" && -x "$d/initdb" ]]; then
        echo "$d"
    elif command -v initdb >/dev/null 2>&1; then
        dirname "$(readlink -f "$(command -v initdb)")"
    fi
}

as_pg() {
    # initdb and pg_ctl refuse to run as root
    if [[ $(id -u) -eq 0 ]]; then runuser -u postgres -- "$@"; else "$@"; fi
}

install() {
    local pkgs=()
    [[ -n "$(pg_bindir)" ]] || pkgs+=(postgresql)
    command -v java >/dev/null 2>&1 || pkgs+=(openjdk-17-jre-headless)
    # the report's browser test loads it headless with networking off
    command -v chromium >/dev/null 2>&1 || command -v chromium-browser >/dev/null 2>&1 \
        || pkgs+=(chromium)
    if ((${#pkgs[@]})); then
        log "installing ${pkgs[*]}"
        export DEBIAN_FRONTEND=noninteractive
        apt-get update -qq >&2
        apt-get install -y -qq "${pkgs[@]}" >&2
        # the package may start its default cluster; the tests use their own
        if command -v pg_lsclusters >/dev/null 2>&1; then
            pg_lsclusters -h 2>/dev/null | while read -r ver name _port status _rest; do
                if [[ "$status" == online ]]; then pg_ctlcluster "$ver" "$name" stop || true; fi
            done
        fi
    fi
}

free_port() {
    python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])'
}

start() {
    local bin dir port
    bin=$(pg_bindir)
    [[ -n "$bin" ]] || { log "no PostgreSQL server binaries; run: bash .ci/services.sh install"; exit 1; }
    dir=$(mktemp -d /tmp/indb-services.XXXXXX)
    chmod 755 "$dir"
    mkdir "$dir/pgdata" "$dir/socket"
    [[ $(id -u) -ne 0 ]] || chown postgres: "$dir/pgdata" "$dir/socket"
    as_pg "$bin/initdb" -D "$dir/pgdata" -U postgres --auth=trust --encoding=UTF8 --no-locale \
        --no-sync >"$dir/initdb.log" 2>&1 || { cat "$dir/initdb.log" >&2; exit 1; }
    port=$(free_port)
    # throwaway cluster: loopback + private unix socket, no durability
    as_pg "$bin/pg_ctl" -D "$dir/pgdata" -l "$dir/socket/server.log" -w -t 60 \
        -o "-c listen_addresses=127.0.0.1 -p $port -k $dir/socket -c fsync=off \
            -c synchronous_commit=off -c full_page_writes=off" start >&2 \
        || { cat "$dir/socket/server.log" >&2; exit 1; }
    log "PostgreSQL $("$bin/postgres" --version | awk '{print $3}') on 127.0.0.1:$port ($dir)"
    echo "export INDB_SERVICES_DIR=$dir"
    echo "export INDB_TEST_POSTGRES_URL=postgresql://postgres@127.0.0.1:$port/postgres"
    if [[ -z "${JAVA_HOME:-}" ]] && command -v java >/dev/null 2>&1; then
        echo "export JAVA_HOME=$(dirname "$(dirname "$(readlink -f "$(command -v java)")")")"
    fi
}

stop() {
    local dir=${INDB_SERVICES_DIR:-}
    [[ -n "$dir" && -d "$dir" ]] || return 0
    if [[ -f "$dir/pgdata/postmaster.pid" ]]; then
        as_pg "$(pg_bindir)/pg_ctl" -D "$dir/pgdata" -m immediate -w stop >&2 || true
    fi
    rm -rf "$dir"
    log "stopped and removed $dir"
}

case "${1:-}" in
    install) install ;;
    start) start ;;
    stop) stop ;;
    *) echo "usage: $0 install|start|stop" >&2; exit 2 ;;
esac
