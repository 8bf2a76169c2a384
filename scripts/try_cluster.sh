#!/usr/bin/env bash
# Try a shared deployment on one machine: PostgreSQL (a throwaway cluster in ./runs/pg),
# one API server that only queues searches, and two workers that run them, all on
# 127.0.0.1. Prints the URLs; Ctrl-C stops everything (the database stays in ./runs/pg
# for the next run; delete that folder to start afresh).
#
#   scripts/try_cluster.sh            # or: make cluster
#   CLUSTER_WORKERS=4 CLUSTER_API_PORT=8800 scripts/try_cluster.sh
#
# Needs .venv (make demo) and PostgreSQL's server binaries (Debian: apt-get install postgresql).
set -euo pipefail
cd "$(dirname "$0")/.."
ROOT=$(pwd)

PG_PORT=${CLUSTER_PG_PORT:-55432}
API_PORT=${CLUSTER_API_PORT:-8750}
WORKERS=${CLUSTER_WORKERS:-2}
RUN=$ROOT/runs/pg
BIN=$ROOT/.venv/bin
DB=stagefit

[ -x "$BIN/stagefit" ] || { echo "no .venv/bin/stagefit: run 'make demo' first" >&2; exit 1; }
PG_BIN=""
if compgen -G "/usr/lib/postgresql/*/bin/initdb" >/dev/null; then
    PG_BIN=/usr/lib/postgresql/$(ls /usr/lib/postgresql | sort -n | tail -n 1)/bin
elif command -v initdb >/dev/null; then
    PG_BIN=$(dirname "$(command -v initdb)")
fi
[ -n "$PG_BIN" ] || { echo "no PostgreSQL server binaries (initdb): apt-get install postgresql" >&2; exit 1; }

# The server refuses to run as root: as root, run it as the postgres user.
AS_PG=()
if [ "$(id -u)" = 0 ]; then AS_PG=(runuser -u postgres --); fi

mkdir -p "$RUN"
[ ${#AS_PG[@]} -eq 0 ] || chown postgres "$RUN"
pids=()
started_pg=""
stop_all() {
    trap - INT TERM EXIT
    echo
    echo "stopping..."
    for pid in "${pids[@]}"; do kill -TERM "$pid" 2>/dev/null || true; done
    for pid in "${pids[@]}"; do wait "$pid" 2>/dev/null || true; done
    if [ -n "$started_pg" ]; then
        "${AS_PG[@]}" "$PG_BIN/pg_ctl" -D "$RUN/data" -m fast -w stop >/dev/null || true
    fi
    echo "stopped (database kept in runs/pg)"
}
trap stop_all INT TERM EXIT

if [ ! -s "$RUN/data/PG_VERSION" ]; then
    echo "creating a PostgreSQL cluster in runs/pg/data"
    "${AS_PG[@]}" "$PG_BIN/initdb" -D "$RUN/data" -U postgres --auth=trust -E UTF8 --locale=C >/dev/null
fi
if "${AS_PG[@]}" "$PG_BIN/pg_ctl" -D "$RUN/data" status >/dev/null 2>&1; then
    echo "PostgreSQL already running in runs/pg/data: reusing it"
else
    "${AS_PG[@]}" "$PG_BIN/pg_ctl" -D "$RUN/data" -l "$RUN/server.log" -w \
        -o "-c listen_addresses=127.0.0.1 -p $PG_PORT -k $RUN" start >/dev/null
    started_pg=1
fi
PSQL=("${AS_PG[@]}" "$PG_BIN/psql" -X -q -h 127.0.0.1 -p "$PG_PORT" -U postgres)
if [ -z "$("${PSQL[@]}" -d postgres -tAc "SELECT 1 FROM pg_database WHERE datname = '$DB'")" ]; then
    "${PSQL[@]}" -d postgres -c "CREATE DATABASE $DB"
fi

STORAGE="postgresql://postgres@127.0.0.1:$PG_PORT/$DB"
export STAGEFIT_STORAGE="$STORAGE"

# The API server only queues searches; the workers run their trials.
STAGEFIT_QUEUE_ONLY=1 "$BIN/stagefit" serve --storage "$STORAGE" --host 127.0.0.1 --port "$API_PORT" \
    >"$ROOT/runs/api.log" 2>&1 &
pids+=($!)
for i in $(seq 1 "$WORKERS"); do
    "$BIN/stagefit" worker --storage "$STORAGE" >"$ROOT/runs/worker-$i.log" 2>&1 &
    pids+=($!)
done

for _ in $(seq 1 50); do  # up to ~10 s for the API to answer
    if "$BIN/python" - "$API_PORT" <<'PY' 2>/dev/null
import sys, urllib.request
urllib.request.urlopen(f"http://127.0.0.1:{sys.argv[1]}/healthz", timeout=1).read()
PY
    then break; fi
    for pid in "${pids[@]}"; do
        kill -0 "$pid" 2>/dev/null || { echo "a process exited early; see runs/api.log and runs/worker-*.log" >&2; exit 1; }
    done
    sleep 0.2
done

cat <<EOF

  PostgreSQL  $STORAGE   (data and log in runs/pg)
  API server  http://127.0.0.1:$API_PORT/v1/   (log: runs/api.log; queues only)
  workers     $WORKERS x stagefit worker --storage $STORAGE   (logs: runs/worker-N.log)

  Try:  curl -s -X POST -H 'Content-Type: application/yaml' --data-binary @specs/contact_pickup_buffer.yaml \\
             http://127.0.0.1:$API_PORT/v1/searches
        curl -s http://127.0.0.1:$API_PORT/v1/searches
        $BIN/stagefit worker --storage $STORAGE     # one more worker, from any shell

  Ctrl-C stops everything.
EOF
wait
