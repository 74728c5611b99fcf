#!/bin/bash
# HTTP load figure for `make bench`: requests/s and p99 latency of
# GET /v1/stations under wrk while a run proceeds on the simulated bench, and
# the run's scheduling jitter (how late the station thread woke for the
# engine's reading times, i.e. when additions go out) with and without that
# load. Targets: >= 10000 req/s, p99 <= 10 ms on 2 cores, jitter <= 5 ms.
# Usage: bash tests/speed/speed_http.sh BUILD_DIR
set -euo pipefail

BUILD=${1:?usage: speed_http.sh BUILD_DIR}
ROOT=$(cd "$(dirname "$0")/../.." && pwd)
BIN="$BUILD/bin"
WRK_S=${WRK_S:-5}      # seconds per wrk run
WRK_CONNS=${WRK_CONNS:-"8 64"} # connection counts, one wrk run each
TMP=$(mktemp -d /tmp/stopcock-speed-XXXXXX)
SIM_PID=""
D_PID=""

cleanup() {
	[ -n "$D_PID" ] && kill "$D_PID" 2>/dev/null && wait "$D_PID" 2>/dev/null || true
	[ -n "$SIM_PID" ] && kill "$SIM_PID" 2>/dev/null && wait "$SIM_PID" 2>/dev/null || true
	if [ -n "${KEEP_TMP:-}" ]; then echo "speed_http: kept $TMP"; else rm -rf "$TMP"; fi
}
trap cleanup EXIT

for t in wrk curl; do
	command -v $t >/dev/null || { echo "speed_http: $t is missing (make deps installs it)"; exit 1; }
done

free_port() { /usr/bin/python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1])'; }
PORT=$(free_port)
URL="http://127.0.0.1:$PORT"

"$BIN/stopcock-sim" --scenario "$ROOT/tests/data/daemon/wash-acid.yaml" --modbus-tcp "127.0.0.1:$(free_port)" \
	--pump-link "$TMP/pump" --control "$TMP/ctl" --config-out "$TMP/stopcockd.yaml" \
	--state-dir "$TMP/state" --listen "127.0.0.1:$PORT" >"$TMP/sim.out" 2>"$TMP/sim.log" &
SIM_PID=$!
for _ in $(seq 100); do grep -q ready "$TMP/sim.out" 2>/dev/null && break; sleep 0.1; done
grep -q ready "$TMP/sim.out" || { echo "speed_http: the simulator did not start"; cat "$TMP/sim.log"; exit 1; }
TOKEN=$(cut -d: -f2 "$TMP/token")
# wrk opens all its connections from one address: lift http.max_per_ip (32).
sed -i 's/^  read_needs_token: false$/&\n  max_per_ip: 0/' "$TMP/stopcockd.yaml"
grep -q "^  max_per_ip: 0" "$TMP/stopcockd.yaml" || { echo "speed_http: cannot set max_per_ip"; exit 1; }

start_daemon() {
	"$BIN/stopcockd" -c "$TMP/stopcockd.yaml" >>"$TMP/daemon.log" 2>&1 &
	D_PID=$!
	for _ in $(seq 150); do
		curl -sf "$URL/v1/stations" 2>/dev/null | grep -q '"state":"idle"' && return 0
		sleep 0.1
	done
	echo "speed_http: stopcockd did not come up"; tail "$TMP/daemon.log"; exit 1
}

stop_daemon() { kill "$D_PID"; wait "$D_PID" || true; D_PID=""; }

sim_ctl() { /usr/bin/python3 -c 'import socket,sys; s=socket.socket(socket.AF_UNIX); s.connect(sys.argv[1]); s.sendall((sys.argv[2]+"\n").encode()); print(s.makefile().readline().strip())' "$TMP/ctl" "$1"; }

start_run() {
	sim_ctl "load $ROOT/tests/data/daemon/wash-acid.yaml" >/dev/null
	curl -sf -H "Authorization: Bearer $TOKEN" -X POST "$URL/v1/runs" \
		-d "{\"station\":\"sim1\",\"method\":\"wash-acid-mv\",\"sample_id\":\"SPEED-$1\",\"amount\":10}" |
		sed -n 's/.*"id":\([0-9]*\).*/\1/p'
}

wait_run() {
	for _ in $(seq 1200); do
		s=$(curl -sf "$URL/v1/runs/$1" | sed -n 's/.*"state":"\([a-z]*\)".*/\1/p')
		case "$s" in finished | failed | aborted) echo "$s"; return 0 ;; esac
		sleep 0.1
	done
	echo timeout
}

# "count sum max" of the station's wake lateness, seconds
lateness() {
	curl -sf "$URL/metrics" | awk '
		/^stopcock_wake_lateness_seconds_count/ {c=$2}
		/^stopcock_wake_lateness_seconds_sum/ {s=$2}
		/^stopcock_wake_lateness_max_seconds/ {m=$2}
		END {print c, s, m}'
}

jitter_line() { # label count sum max
	awk -v l="$1" -v c="$2" -v s="$3" -v m="$4" 'BEGIN {
		mean = c > 0 ? 1000 * s / c : 0
		printf "  %-22s %4d wake-ups  mean %.3f ms  max %.3f ms  %s\n", l, c, mean, 1000 * m,
			(1000 * m <= 5.0 ? "(target <= 5 ms: met)" : "(target <= 5 ms: NOT met)") }'
}

echo "== HTTP load (GET /v1/stations under wrk, a run in progress; $(nproc) cores)"
start_daemon
curl -sf -H "Authorization: Bearer $TOKEN" -X PUT --data-binary "@$ROOT/tests/data/daemon/wash-acid-mv.yaml" \
	"$URL/v1/methods/wash-acid-mv" >/dev/null

# 1. A run without load.
RUN=$(start_run quiet)
STATE=$(wait_run "$RUN")
read -r C0 S0 M0 < <(lateness)
stop_daemon

# 2. A run under load (fresh daemon: the max starts from zero).
start_daemon
RUN=$(start_run loaded)
sleep 1
for c in $WRK_CONNS; do
	# wrk runs at the HTTP workers' niceness (+5): on one machine a load generator
	# that outranks the server measures the scheduler, not the server.
	nice -n 5 wrk -t2 -c"$c" -d"${WRK_S}s" --latency "$URL${WRK_PATH:-/v1/stations}" >"$TMP/wrk-$c.txt" 2>&1 || true
done
STATE2=$(wait_run "$RUN")
read -r C1 S1 M1 < <(lateness)
stop_daemon

for c in $WRK_CONNS; do
	W="$TMP/wrk-$c.txt"
	RPS=$(awk '/^Requests\/sec:/ {print $2}' "$W")
	P99=$(awk '$1 == "99%" {print $2}' "$W")
	P99_MS=$(echo "$P99" | awk '{v=$1; if (v ~ /us$/) {sub(/us$/,"",v); v/=1000} else if (v ~ /ms$/) {sub(/ms$/,"",v)} else if (v ~ /s$/) {sub(/s$/,"",v); v*=1000}; print v}')
	awk -v c="$c" -v r="$RPS" -v p="$P99_MS" 'BEGIN {
		printf "  wrk -t2 -c%-3d  %7.0f requests/s %s  p99 %.3f ms %s\n", c, r,
			(r >= 10000 ? "(>= 10000: met)" : "(>= 10000: NOT met)"), p,
			(p <= 10 ? "(<= 10 ms: met)" : "(<= 10 ms: NOT met)") }'
	grep -E "Non-2xx|Socket errors" "$W" | sed 's/^/    wrk: /' || true
done
echo "  load average: $(cut -d' ' -f1-3 /proc/loadavg) (other work on the machine skews these figures)"
echo "  run without load: $STATE; run under load: $STATE2"
if [ "$STATE" != finished ] || [ "$STATE2" != finished ]; then
	echo "  daemon log (faults):"
	grep -E "error|warning" "$TMP/daemon.log" | tail -5 | sed 's/^/    /'
fi
jitter_line "jitter without load" "$C0" "$S0" "$M0"
jitter_line "jitter under load" "$C1" "$S1" "$M1"
