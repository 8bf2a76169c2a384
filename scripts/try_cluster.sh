#!/usr/bin/env bash
# A shared deployment on one machine, end to end: a Redis server (Debian's redis-server, data and
# append-only file in ./runs/redis), CLUSTER_WORKERS `stagefit worker` processes, and one search
# queued on it. Waits until the workers have finished the search, prints the trials/s of the whole
# and per worker, checks every log for a traceback, then stops everything it started.
#
#   scripts/try_cluster.sh            # or: make cluster
#   CLUSTER_WORKERS=4 CLUSTER_TRIALS=4000 CLUSTER_SPEC=specs/bench_stock_preamp.yaml scripts/try_cluster.sh
#   CLUSTER_KEEP=1 scripts/try_cluster.sh   # leave Redis running afterwards (for more workers, the API server)
#
# Needs .venv (make demo) and redis-server (Debian's package; installed here when run as root with apt-get).
# Workers on other machines: DEVELOPERS.md, "Shared deployments".
set -euo pipefail
cd "$(dirname "$0")/.."
ROOT=$(pwd)

PORT=${CLUSTER_REDIS_PORT:-56379}
WORKERS=${CLUSTER_WORKERS:-2}
SPEC=${CLUSTER_SPEC:-benchmarks/specs/bs_e96_divider_buffer.yaml}  # E96, Monte Carlo screen on
TRIALS=${CLUSTER_TRIALS:-2000}
RUN=$ROOT/runs/redis
BIN=$ROOT/.venv/bin

[ -x "$BIN/stagefit" ] || { echo "no .venv/bin/stagefit: run 'make demo' first" >&2; exit 1; }
if ! command -v redis-server >/dev/null; then
    # as root on a Debian machine (a fresh CI-like box), install it as .ci/run does; otherwise say how
    if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null; then
        echo "redis-server not found: installing Debian's redis-server (apt-get)"
        export DEBIAN_FRONTEND=noninteractive
        apt-get update -qq && apt-get install -y -qq redis-server >/dev/null \
            || { echo "apt-get could not install redis-server" >&2; exit 1; }
    else
        echo "no redis-server: install Debian's package (sudo apt-get install redis-server), then run this again" >&2
        exit 1
    fi
fi

mkdir -p "$RUN"
pids=()
redis_pid=""
stop_all() {
    trap - INT TERM EXIT
    for pid in "${pids[@]}"; do kill -TERM "$pid" 2>/dev/null || true; done
    for pid in "${pids[@]}"; do wait "$pid" 2>/dev/null || true; done
    if [ -n "$redis_pid" ] && [ -z "${CLUSTER_KEEP:-}" ]; then
        kill -TERM "$redis_pid" 2>/dev/null || true
        wait "$redis_pid" 2>/dev/null || true
    fi
}
trap stop_all INT TERM EXIT

# Redis with the append-only file on (fsync every second): the storage survives a restart.
redis-server --port "$PORT" --bind 127.0.0.1 --dir "$RUN" --appendonly yes --appendfsync everysec \
    --save "" --daemonize no --logfile "$RUN/redis.log" &
redis_pid=$!
STORAGE="redis://127.0.0.1:$PORT/0"
for _ in $(seq 1 100); do
    redis-cli -p "$PORT" ping >/dev/null 2>&1 && break
    kill -0 "$redis_pid" 2>/dev/null || { echo "redis-server exited; see runs/redis/redis.log" >&2; exit 1; }
    sleep 0.1
done

# One search queued on the shared storage (the workers run it), a fresh seed-0 copy each time.
SEARCH=$("$BIN/python" - "$STORAGE" "$SPEC" "$TRIALS" <<'PY'
import sys, uuid
from optimizer.search import create_search, open_storage, with_search
from optimizer.spec import load_spec
storage, spec, trials = sys.argv[1], sys.argv[2], int(sys.argv[3])
print(create_search(with_search(load_spec(spec), trials=trials, seed=0), open_storage(storage),
                    search_id=f"cluster-{uuid.uuid4().hex[:8]}"))
PY
)
echo "search $SEARCH ($SPEC, $TRIALS trials) queued on $STORAGE; starting $WORKERS workers"

start=$(date +%s.%N)
for i in $(seq 1 "$WORKERS"); do
    "$BIN/stagefit" worker --storage "$STORAGE" --once --poll 0.2 >"$ROOT/runs/worker-$i.log" 2>&1 &
    pids+=($!)
done
status=0
for pid in "${pids[@]}"; do wait "$pid" || status=$?; done
pids=()
end=$(date +%s.%N)

"$BIN/python" - "$STORAGE" "$SEARCH" "$start" "$end" "$WORKERS" "$status" <<'PY'
import optuna, pathlib, re, sys
from optimizer.search import open_storage, search_status
storage, search, start, end, workers, status = sys.argv[1], sys.argv[2], float(sys.argv[3]), float(sys.argv[4]), int(sys.argv[5]), int(sys.argv[6])
state = search_status(open_storage(storage), search)
told = optuna.load_study(study_name=search, storage=open_storage(storage)).get_trials(
    deepcopy=False, states=(optuna.trial.TrialState.COMPLETE,))
phase = (max(t.datetime_complete for t in told) - min(t.datetime_start for t in told)).total_seconds() if told else 0.0
wall, done = end - start, state["trials_done"]
print(f"search {search}: {state['status']}, {done} trials; trial phase {phase:.1f} s: {done / (phase or 1):.1f} trials/s "
      f"with {workers} workers; {wall:.1f} s in all (worker start-up and ranking the search included)")
logs = [pathlib.Path(f"runs/worker-{i}.log") for i in range(1, workers + 1)]
for log in logs:  # each worker's own figures, from the line it logs when it stops
    found = re.search(r"stopping: (.*)", log.read_text())
    print(f"  {log}: " + (found[1] if found else "no summary line (did it stop cleanly?)"))
bad = [str(p) for p in logs if "Traceback" in p.read_text()]
print("worker logs: " + ("no traceback" if not bad else "TRACEBACK in " + ", ".join(bad)))
sys.exit(1 if bad or status or state["status"] != "done" else 0)
PY
