#!/usr/bin/env bash
# scripts/bench.sh [--quick] [--long] [--profile] [--record] [--out DIR]
#
# Measures qtally against this machine's ceilings, measured in the same run,
# and prints a markdown table of figures, ceilings, ratios and targets
# (BENCHMARKS.md explains each figure).
#
#   --quick    short runs (about 6 minutes instead of 20): a smoke check, noisy
#   --long     the mixed run lasts 10 minutes instead of 1
#   --profile  also take CPU profiles of the API under choose and post load
#   --record   write the table into BENCHMARKS.md
#   --out DIR  keep every result file there (default: bench-results/<time>)
#
# Environment: QTALLY_CEILINGS (the ceilings script, when it is not at
# ../shared/ceilings/run.sh), POST_WORKERS (posting clients, default 16),
# DRAIN_BATCH (the drain worker's --batch-episodes, default the worker's),
# MIXED_BASIS (post or drain: the figure the mixed rate is 80% of; post).
#
# It runs the ceilings script (--json) against a private durable PostgreSQL,
# then a fresh qtally on the same PostgreSQL: the API pinned to the first
# CPU like the ceilings' echo server, the load generator (qtally load, wrk)
# on the second, PostgreSQL and the training worker not pinned. The
# ceilings script is ../shared/ceilings/run.sh next to the repository, else
# $QTALLY_CEILINGS. Run nothing else meanwhile.
set -euo pipefail

ROOT=$(cd "$(dirname "$0")/.." && pwd)
QUICK=0 LONG=0 PROFILE=0 RECORD=0 OUT=
while [ $# -gt 0 ]; do
  case $1 in
    --quick) QUICK=1 ;;
    --long) LONG=1 ;;
    --profile) PROFILE=1 ;;
    --record) RECORD=1 ;;
    --out) OUT=${2:?--out needs a directory}; shift ;;
    -h|--help) sed -n '2,/^$/s/^# \{0,1\}//p' "$0"; exit 0 ;;
    *) echo "bench.sh: unknown argument $1 (try --help)" >&2; exit 2 ;;
  esac
  shift
done

# Durations (seconds) and sizes.
if [ "$QUICK" = 1 ]; then
  LOAD_S=3 MIXED_S=10 DRAIN_EPISODES=10000 MEMORY_PAIRS=250000 SUSTAIN_S=10 SUSTAIN_TRIALS=3 CEIL_ARGS=(--quick)
else
  LOAD_S=10 MIXED_S=60 DRAIN_EPISODES=50000 MEMORY_PAIRS=1000000 SUSTAIN_S=60 SUSTAIN_TRIALS=6 CEIL_ARGS=()
fi
[ "$LONG" = 1 ] && MIXED_S=600
POST_WORKERS=${POST_WORKERS:-16}   # concurrent posting clients
DRAIN_BATCH=${DRAIN_BATCH:-}       # the drain worker's --batch-episodes (empty: its default)
MIXED_BASIS=${MIXED_BASIS:-post}   # mixed runs at 80% of this figure: post or drain
DRAIN_STATES=25000                 # x 4 actions: about 100k distinct pairs
STATES=10000                       # states of the post, choose and mixed traffic
PAIRED_DIR=choose-in-turns         # wrk outputs of choose and the bare lookup in turns (load.FileChooseInTurns)

say() { echo "bench: $*" >&2; }

CEILINGS=$ROOT/../shared/ceilings/run.sh
if [ ! -x "$CEILINGS" ]; then
  CEILINGS=${QTALLY_CEILINGS:-}
  if [ -z "$CEILINGS" ] || [ ! -x "$CEILINGS" ]; then
    say "the ceilings script is neither at ../shared/ceilings/run.sh next to the repository nor in \$QTALLY_CEILINGS"
    exit 2
  fi
fi

OUT=${OUT:-$ROOT/bench-results/$(date +%Y%m%dT%H%M%S)}
mkdir -p "$OUT"
OUT=$(cd "$OUT" && pwd)

# --- cleanup: ends only what this script started, by PID ----------------------
WORK= DB_PID= API_PID= WORKER_PID= BARE_PID=
stop_pid() {   # stop_pid PID: SIGTERM, then wait up to 30 s, then SIGKILL
  local pid=$1
  [ -n "$pid" ] || return 0
  kill -TERM "$pid" 2>/dev/null || return 0
  for _ in $(seq 300); do kill -0 "$pid" 2>/dev/null || break; sleep 0.1; done
  kill -0 "$pid" 2>/dev/null && kill -KILL "$pid" 2>/dev/null
  wait "$pid" 2>/dev/null || true
}
cleanup() {
  set +e
  stop_pid "$BARE_PID"
  stop_pid "$WORKER_PID"
  stop_pid "$API_PID"
  stop_pid "$DB_PID"
  [ -n "$WORK" ] && rm -rf "$WORK"
}
trap cleanup EXIT
trap 'exit 130' INT
trap 'exit 143' TERM

WORK=$(mktemp -d "${TMPDIR:-/tmp}/qtally-bench.XXXXXX")
T0=$(date +%s)

say "building ..."
(cd "$ROOT" && go build -o "$WORK/qtally" ./cmd/qtally && go build -o "$WORK/benchdb" ./cmd/benchdb)
# go tool pprof may build itself on first use: not while profiling.
if [ "$PROFILE" = 1 ]; then go tool pprof -h >/dev/null 2>&1 || true; fi
QT=$WORK/qtally

# --- CPUs: the API on the first allowed CPU, the load generator on the next ----
CPUS=()
for part in $(awk '/^Cpus_allowed_list/{gsub(",", " ", $2); print $2}' /proc/self/status); do
  if [[ $part == *-* ]]; then CPUS+=($(seq "${part%-*}" "${part#*-}")); else CPUS+=("$part"); fi
done
API_PIN=() LOAD_PIN=()
if [ "${#CPUS[@]}" -ge 2 ] && command -v taskset >/dev/null; then
  API_PIN=(taskset -c "${CPUS[0]}") LOAD_PIN=(taskset -c "${CPUS[1]}")
  PLACEMENT="API on CPU ${CPUS[0]}, load generator on CPU ${CPUS[1]}, PostgreSQL and worker not pinned"
else
  PLACEMENT="not pinned (fewer than 2 CPUs or no taskset)"
fi
if ! command -v wrk >/dev/null && [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null; then
  say "installing wrk ..."
  export DEBIAN_FRONTEND=noninteractive
  apt-get install -y wrk >"$WORK/apt.log" 2>&1 ||
    { apt-get update >>"$WORK/apt.log" 2>&1 && apt-get install -y wrk >>"$WORK/apt.log" 2>&1; } || true
fi
command -v wrk >/dev/null || say "wrk is not installed: the wrk choose figure is skipped"

# wait_line FILE PREFIX: prints the rest of the first line of FILE that
# starts with PREFIX, waiting up to 2 minutes for it.
wait_line() {
  local line
  for _ in $(seq 1200); do
    line=$(grep -m1 "^$2" "$1" 2>/dev/null || true)
    if [ -n "$line" ]; then echo "${line#"$2"}"; return 0; fi
    sleep 0.1
  done
  say "timed out waiting for '$2' in $1"; return 1
}

# --- PostgreSQL, then the ceilings on it --------------------------------------
say "starting a private durable PostgreSQL ..."
"$WORK/benchdb" -url-file "$WORK/db.url" 2>"$OUT/postgres.log" &
DB_PID=$!
for _ in $(seq 1200); do [ -s "$WORK/db.url" ] && break; kill -0 "$DB_PID" 2>/dev/null || break; sleep 0.1; done
[ -s "$WORK/db.url" ] || { say "PostgreSQL did not start (see $OUT/postgres.log)"; exit 1; }
DB_URL=$(cat "$WORK/db.url")
# The PostgreSQL server process (benchdb's child): choose and recorded
# choose report its processor time a request beside the service's and the
# load generator's.
PG_ARGS=()
PG_PID=$(pgrep -P "$DB_PID" -x postgres | head -1 || true)
[ -n "$PG_PID" ] && PG_ARGS=(--postgres-pid "$PG_PID")
# qtally refuses a password on its command line (process listings show it):
# every qtally command below reads the URL from the environment.
export DATABASE_URL=$DB_URL

say "measuring the ceilings ($CEILINGS) on the same PostgreSQL ..."
CEIL_STATUS=0
DATABASE_URL=$DB_URL "$CEILINGS" "${CEIL_ARGS[@]}" --json "$OUT/ceilings.json" >"$OUT/ceilings.txt" || CEIL_STATUS=$?
cat "$OUT/ceilings.txt" >&2
[ -s "$OUT/ceilings.json" ] || { say "the ceilings script wrote no figures"; exit 1; }

# --- the service -----------------------------------------------------------------
# The service runs as in production, with tokens checked on every request;
# the per-token rate limit is off so that it does not cap the figures.
QTALLY_TOKEN_PEPPER=$(head -c 32 /dev/urandom | od -An -tx1 | tr -d ' \n')
export QTALLY_TOKEN_PEPPER
QTALLY_TOKEN=$("$QT" token create --label bench --scope ingest,choose,admin |
  sed -n 's/^secret: //p')
[ -n "$QTALLY_TOKEN" ] || { say "could not create an API token"; exit 1; }
export QTALLY_TOKEN
say "starting qtally serve --no-worker ($PLACEMENT) ..."
"${API_PIN[@]}" "$QT" serve --no-worker --listen 127.0.0.1:0 --token-rate 0 \
  --pprof-listen 127.0.0.1:0 --log-format text >"$OUT/api.out" 2>"$OUT/api.log" &
API_PID=$!
API=$(wait_line "$OUT/api.out" "qtally: listening on ")
PPROF=$(wait_line "$OUT/api.out" "qtally: profiles on ")
PPROF=${PPROF%/debug/pprof/}
# qtally_load SCENARIO ARGS...: the load generator, pinned.
qtally_load() { local sc=$1; shift; "${LOAD_PIN[@]}" "$QT" load "$sc" --url "$API" --json "$@"; }

start_worker() {
  "$QT" worker --listen 127.0.0.1:0 --log-format text >"$OUT/worker.out" 2>>"$OUT/worker.log" &
  WORKER_PID=$!
  wait_line "$OUT/worker.out" "qtally: listening on " >/dev/null
}

# json_field FILE FIELD: a top-level number of an indented JSON file.
json_field() { sed -n "s/^  \"$2\": \([-0-9.e+]*\),\{0,1\}$/\1/p" "$1" | head -1; }

# profile NAME SECONDS: a CPU profile of the API over the next SECONDS, in
# the background (the load to profile must start within a second and last
# longer); its top functions go to profile-NAME.txt, the profile itself
# beside it.
profile() {
  PPROF_TMPDIR=$OUT go tool pprof -top -nodecount=40 -seconds="$2" "$PPROF/debug/pprof/profile" \
    >"$OUT/profile-$1.txt" 2>"$OUT/profile-$1.log" &
  sleep 1
}

# 1. Training drain: a backlog stored with no worker, then one worker process
#    (started by qtally load, not pinned) trains it.
say "drain: $DRAIN_EPISODES episodes over $DRAIN_STATES states ..."
QTALLY_BATCH_EPISODES=$DRAIN_BATCH "$QT" load drain --url "$API" --json \
  --states "$DRAIN_STATES" --episodes "$DRAIN_EPISODES" >"$OUT/drain.json"

# 2. Posting episodes at the most the service takes, no worker running.
say "post: ${LOAD_S}s at the maximum, $POST_WORKERS clients ..."
qtally_load post --policy bench --states "$STATES" --workers "$POST_WORKERS" --duration "${LOAD_S}s" >"$OUT/post.json"
if [ "$PROFILE" = 1 ]; then
  profile post "$LOAD_S"
  qtally_load post --policy bench-profile --states "$STATES" --workers "$POST_WORKERS" --duration "$((LOAD_S + 3))s" >/dev/null
  wait $!
fi

# 3. A worker trains what was posted; every later step runs with it.
say "training what was posted ..."
start_worker
"$QT" load wait --url "$API" --json --policy bench --duration 30m >"$OUT/post-trained.json"
if [ "$PROFILE" = 1 ]; then
  "$QT" load wait --url "$API" --json --policy bench-profile --duration 30m >/dev/null
fi

# 4. Choose at the maximum with 64 connections: vegeta (qtally load), then
#    wrk -t1 -c64 as the ceiling is measured.
say "choose: ${LOAD_S}s with vegeta, 64 connections ..."
qtally_load choose --policy bench --states "$STATES" --workers 64 "${PG_ARGS[@]}" --duration "${LOAD_S}s" >"$OUT/choose.json"
say "recorded choose: ${LOAD_S}s with vegeta, 64 connections, each decision recorded in an open episode ..."
qtally_load recorded-choose --policy bench --states "$STATES" --workers 64 "${PG_ARGS[@]}" --duration "${LOAD_S}s" >"$OUT/recorded-choose.json"
say "choose and recorded choose again with 256 connections: ${LOAD_S}s each ..."
qtally_load choose --policy bench --states "$STATES" --workers 256 "${PG_ARGS[@]}" --duration "${LOAD_S}s" >"$OUT/choose-256.json"
qtally_load recorded-choose --policy bench --states "$STATES" --workers 256 "${PG_ARGS[@]}" --duration "${LOAD_S}s" >"$OUT/recorded-choose-256.json"
if command -v wrk >/dev/null; then
  say "choose: ${LOAD_S}s with wrk -t1 -c64 ..."
  CHOOSE_URL=$API/v1/policies/bench/choose
  CHOOSE_STATES=4096 "${LOAD_PIN[@]}" wrk -t1 -c64 -d1s -s "$ROOT/scripts/bench/choose.lua" "$CHOOSE_URL" >/dev/null
  CHOOSE_STATES=4096 "${LOAD_PIN[@]}" wrk -t1 -c64 -d"${LOAD_S}s" --latency -s "$ROOT/scripts/bench/choose.lua" \
    "$CHOOSE_URL" >"$OUT/choose-wrk.txt"
  if [ "$PROFILE" = 1 ]; then
    profile choose "$LOAD_S"
    CHOOSE_STATES=4096 "${LOAD_PIN[@]}" wrk -t1 -c64 -d"$((LOAD_S + 3))s" -s "$ROOT/scripts/bench/choose.lua" "$CHOOSE_URL" >/dev/null
    wait $!
  fi
fi

# 4b. Choose in turns with the ceilings' own bare echo server (built from
#     the ceilings' folder, on the API's CPU, the same wrk command as the
#     ceiling's): three rounds of both, so that each pair of the choose
#     ratio sees the same minutes of this shared machine, whose speed
#     moves between the ceilings at the start and the choose figure here.
if command -v wrk >/dev/null; then
  PAIR_S=$((LOAD_S < 5 ? LOAD_S : 5))
  say "choose in turns with the bare echo lookup: 3 rounds of ${PAIR_S}s each ..."
  if (cd "$(dirname "$CEILINGS")" && GOWORK=off go build -mod=readonly -buildvcs=false -o "$WORK/ceil" .); then
    BARE_PORT=$("$WORK/ceil" freeport)
    "${API_PIN[@]}" "$WORK/ceil" serve -addr "127.0.0.1:$BARE_PORT" >"$OUT/bare-server.log" 2>&1 &
    BARE_PID=$!
    BARE_URL="http://127.0.0.1:$BARE_PORT/v1/policies/1/action?state=s1234"
    for _ in $(seq 100); do (exec 3<>"/dev/tcp/127.0.0.1/$BARE_PORT") 2>/dev/null && break; sleep 0.05; done
    mkdir -p "$OUT/$PAIRED_DIR"
    "${LOAD_PIN[@]}" wrk -t1 -c64 -d1s "$BARE_URL" >/dev/null
    for r in 1 2 3; do
      "${LOAD_PIN[@]}" wrk -t1 -c64 -d"${PAIR_S}s" --latency "$BARE_URL" >"$OUT/$PAIRED_DIR/bare-$r.txt"
      CHOOSE_STATES=4096 "${LOAD_PIN[@]}" wrk -t1 -c64 -d"${PAIR_S}s" --latency -s "$ROOT/scripts/bench/choose.lua" \
        "$CHOOSE_URL" >"$OUT/$PAIRED_DIR/choose-$r.txt"
    done
    stop_pid "$BARE_PID"; BARE_PID=
  else
    say "the ceilings' echo server did not build: choose in turns is skipped"
  fi
fi

# 5. Memory: a fresh policy of MEMORY_PAIRS trained pairs, loaded by a choose.
say "memory: $MEMORY_PAIRS pairs ..."
qtally_load memory --pairs "$MEMORY_PAIRS" --pprof-url "$PPROF" >"$OUT/memory.json"

# 6. Mixed: 80% of the measured posting rate (or drain rate), one choose per
#    episode, 256 simulated clients (mostly waiting on their answers).
case $MIXED_BASIS in
  post) BASIS_STEPS=$(json_field "$OUT/post.json" units_per_s) ;;
  drain) BASIS_STEPS=$(json_field "$OUT/drain.json" steps_per_s) ;;
  *) say "MIXED_BASIS must be post or drain"; exit 2 ;;
esac
RATE=$(awk -v s="$BASIS_STEPS" 'BEGIN { r = int(0.8 * s / 20); print (r < 1 ? 1 : r) }')
say "mixed: ${MIXED_S}s at $RATE episodes/s (80% of the $MIXED_BASIS figure) ..."
qtally_load mixed --policy bench --states "$STATES" --rate "$RATE" --choose-every 20 --workers 256 --posters "$POST_WORKERS" \
  --duration "${MIXED_S}s" --pprof-url "$PPROF" >"$OUT/mixed.json"

# 7. Sustained loop: clients choose at every step and post finished episodes
#    in batches; SUSTAIN_TRIALS runs of SUSTAIN_S seconds find the highest
#    rate with a flat backlog, starting at a quarter of what the vegeta
#    choose figure allows at 20 chooses an episode.
#    The mixed run's backlog is trained first, so the worker serves only
#    the sustained loop.
"$QT" load wait --url "$API" --json --policy bench --duration 30m >/dev/null
CHOOSE_RPS=$(json_field "$OUT/choose.json" throughput_per_s)
START=$(awk -v c="$CHOOSE_RPS" 'BEGIN { r = int(0.25 * c / 20); print (r < 1 ? 1 : r) }')
say "sustained loop: $SUSTAIN_TRIALS runs of ${SUSTAIN_S}s from $START episodes/s ..."
qtally_load sustain --policy sustain --states "$STATES" --rate "$START" --choose-every 1 --workers 256 --posters "$POST_WORKERS" \
  --trials "$SUSTAIN_TRIALS" --duration "${SUSTAIN_S}s" >"$OUT/sustain.json"

# 8. Sustained loop with the episodes kept by qtally: every step's choose
#    recorded and its reward added, each episode ended; from a quarter of
#    what the recorded-choose figure allows at 20 recorded chooses an
#    episode.
"$QT" load wait --url "$API" --json --policy sustain --duration 30m >/dev/null
RECORDED_RPS=$(json_field "$OUT/recorded-choose.json" throughput_per_s)
KEPT_START=$(awk -v c="$RECORDED_RPS" 'BEGIN { r = int(0.25 * c / 20); print (r < 1 ? 1 : r) }')
say "sustained loop, episodes kept by qtally: $SUSTAIN_TRIALS runs of ${SUSTAIN_S}s from $KEPT_START episodes/s ..."
qtally_load sustain --keep-episodes --policy sustain-kept --states "$STATES" --rate "$KEPT_START" --workers 256 \
  --trials "$SUSTAIN_TRIALS" --duration "${SUSTAIN_S}s" >"$OUT/sustain-kept.json"

# 9. Mixed with the episodes kept by qtally: every step's choose recorded,
#    its reward added, the episode ended; 80% of the recorded-choose rate
#    (two requests a step) in episodes of 20 steps.
KEPT_RPS=$(json_field "$OUT/recorded-choose.json" throughput_per_s)
KEPT_RATE=$(awk -v s="$KEPT_RPS" 'BEGIN { r = int(0.8 * s / 40); print (r < 1 ? 1 : r) }')
say "mixed, episodes kept by qtally: ${MIXED_S}s at $KEPT_RATE episodes/s ..."
qtally_load mixed --keep-episodes --policy bench-kept --states "$STATES" --rate "$KEPT_RATE" --workers 256 \
  --duration "${MIXED_S}s" >"$OUT/mixed-kept.json"

stop_pid "$WORKER_PID"; WORKER_PID=
stop_pid "$API_PID"; API_PID=

# --- report ------------------------------------------------------------------------
mode=full; [ "$QUICK" = 1 ] && mode=quick
{
  echo "qtally bench, $mode, $(date -u +%Y-%m-%dT%H:%MZ), $(( $(date +%s) - T0 )) s: $(nproc) CPUs, $PLACEMENT"
  sed -n 3p "$OUT/ceilings.txt"
  echo
  "$QT" load report --dir "$OUT"
} >"$OUT/table.md"
cat "$OUT/table.md"
if [ "$PROFILE" = 1 ]; then
  for f in "$OUT"/profile-*.txt; do echo; echo "$(basename "$f"):"; sed -n '1,25p' "$f"; done
fi

if [ "$RECORD" = 1 ]; then
  awk -v table="$OUT/table.md" '
    /<!-- bench:begin -->/ { print; while ((getline line < table) > 0) print line; skip = 1; next }
    /<!-- bench:end -->/ { skip = 0 }
    !skip' "$ROOT/BENCHMARKS.md" >"$WORK/BENCHMARKS.md"
  cp "$WORK/BENCHMARKS.md" "$ROOT/BENCHMARKS.md"
  say "recorded the table in BENCHMARKS.md"
fi
say "results in $OUT"
exit "$CEIL_STATUS"
