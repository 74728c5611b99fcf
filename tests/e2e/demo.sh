#!/usr/bin/env bash
# tests/e2e/demo.sh BUILD_DIR: the simulated bench end to end (`make demo`).
#
# Starts stopcock-sim with the cider scenario, stopcockd on the config the
# simulator writes, queues the cider-acidity method on a demo sample, shows
# its progress, prints the endpoint and results, saves the curve (SVG) and
# the points (CSV) under BUILD_DIR/demo/, and stops everything. Traps make
# sure nothing is left running, on success, failure or Ctrl-C.
set -euo pipefail

build=${1:?usage: tests/e2e/demo.sh ABSOLUTE_BUILD_DIR}
bin=$build/bin
repo=$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)
cd "$repo"
for p in stopcock stopcockd stopcock-sim; do
	[ -x "$bin/$p" ] || { echo "demo: $bin/$p is missing; run 'make all' first" >&2; exit 1; }
done

out=$build/demo
mkdir -p "$out"
tmp=$(mktemp -d "${TMPDIR:-/tmp}/stopcock-demo.XXXXXX")
pids=()

stop_all() {
	local i pid
	# Newest first: the daemon halts its burette before the simulator goes.
	for ((i = ${#pids[@]} - 1; i >= 0; i--)); do
		pid=${pids[i]}
		kill -TERM "$pid" 2>/dev/null || continue
		for _ in $(seq 50); do kill -0 "$pid" 2>/dev/null || break; sleep 0.1; done
		kill -KILL "$pid" 2>/dev/null || true
		wait "$pid" 2>/dev/null || true
	done
	pids=()
}
cleanup() {
	local rc=$?
	stop_all
	if [ "$rc" -ne 0 ]; then
		echo "demo: failed (exit $rc); the last lines of the logs:" >&2
		for f in "$tmp"/sim.log "$tmp"/daemon.log; do
			[ -s "$f" ] && { echo "--- $(basename "$f")" >&2; tail -n 15 "$f" >&2; }
		done
		cp -f "$tmp"/*.log "$out"/ 2>/dev/null || true
	fi
	rm -rf "$tmp"
	exit "$rc"
}
trap cleanup EXIT
trap 'echo; echo "demo: interrupted" >&2; exit 130' INT TERM

# A long command runs in the background and is waited for, so that a signal
# to this script (not only Ctrl-C to the whole terminal) runs the traps at once.
run_waited() {
	"$@" &
	local p=$! rc=0
	pids+=("$p")
	wait "$p" || rc=$?
	unset 'pids[${#pids[@]}-1]'
	return "$rc"
}

free_port() {
	/usr/bin/python3 -c 'import socket
s = socket.socket()
s.bind(("127.0.0.1", 0))
print(s.getsockname()[1])'
}

scenario=config/scenarios/cider-acidity.yaml
[ -f "$scenario" ] || { echo "demo: $scenario is missing" >&2; exit 1; }
modbus_port=$(free_port)
http_port=$(free_port)
url=http://127.0.0.1:$http_port

say() { printf '\033[1m== %s\033[0m\n' "$*"; }
[ -t 1 ] || say() { printf '== %s\n' "$*"; }

say "simulated bench: $scenario (Modbus on 127.0.0.1:$modbus_port)"
"$bin/stopcock-sim" --scenario "$scenario" --modbus-tcp "127.0.0.1:$modbus_port" \
	--pump-link "$tmp/pump" --control "$tmp/ctl" --config-out "$tmp/stopcockd.yaml" \
	--state-dir "$tmp/state" --listen "127.0.0.1:$http_port" \
	>"$tmp/sim.out" 2>"$tmp/sim.log" &
pids+=($!)
for _ in $(seq 100); do
	grep -qx ready "$tmp/sim.out" 2>/dev/null && break
	kill -0 "${pids[0]}" 2>/dev/null || { echo "demo: stopcock-sim exited" >&2; exit 1; }
	sleep 0.1
done
grep -qx ready "$tmp/sim.out" || { echo "demo: stopcock-sim not ready after 10 s" >&2; exit 1; }

# A demo should be short: a buffer counts as stable after 4 s within 0.3 mV
# here (the daemon's default is 10 s within 0.1 mV, for real electrodes).
if ! grep -q '^calibration:' "$tmp/stopcockd.yaml"; then
	printf 'calibration:\n  stable: {drift_mv: 0.3, window_s: 4, min_s: 2, max_s: 90}\n' \
		>>"$tmp/stopcockd.yaml"
fi
say "daemon: stopcockd -c $tmp/stopcockd.yaml on $url"
"$bin/stopcockd" -c "$tmp/stopcockd.yaml" 2>"$tmp/daemon.log" &
pids+=($!)
export STOPCOCK_URL=$url STOPCOCK_TOKEN_FILE=$tmp/token
for _ in $(seq 100); do
	curl -fsS -m 1 "$url/v1/health" >/dev/null 2>&1 && break
	kill -0 "${pids[1]}" 2>/dev/null || { echo "demo: stopcockd exited" >&2; exit 1; }
	sleep 0.1
done
curl -fsS -m 1 "$url/v1/health" >/dev/null || { echo "demo: no /v1/health after 10 s" >&2; exit 1; }
"$bin/stopcock" status

# The cider method reads pH, and the simulated transmitter gives only mV:
# the electrode is calibrated first, in three buffers. Each buffer is a new
# beaker for the simulator (`stopcock-sim control SOCKET load FILE`), from the
# shipped config/scenarios/ph-buffer-*.yaml, which carry the cider scenario's
# electrode.
control() { "$bin/stopcock-sim" control "$tmp/ctl" "$@" >/dev/null; }

say "calibrate the electrode: buffers 4.01, 7.00, 10.01"
coproc CAL { "$bin/stopcock" calibrate --station sim1 --buffers 4.01,7.00,10.01 2>&1; }
cal_pid=$CAL_PID
pids+=("$cal_pid")
# bash drops CAL[] when the coprocess ends: keep our own copies of its pipes.
exec {cal_out}<&"${CAL[0]}" {cal_in}>&"${CAL[1]}"
while IFS= read -r line <&"$cal_out"; do
	echo "  $line"
	case $line in
	"Put the electrode in buffer "*)
		b=${line#Put the electrode in buffer }
		b=${b%% *}
		control load "config/scenarios/ph-buffer-$b.yaml"
		echo "  (the simulator now has buffer $b in the beaker)"
		echo >&"$cal_in"
		;;
	esac
done
cal_rc=0
wait "$cal_pid" || cal_rc=$?
unset 'pids[${#pids[@]}-1]'
exec {cal_out}<&- {cal_in}>&-
[ "$cal_rc" -eq 0 ] || { echo "demo: the calibration was not accepted" >&2; exit 1; }

# The titrant's titer, entered by hand from the bottle's certificate (docs/api.md,
# "Titrants"); a lab that standardizes its own titrant runs a standardization
# instead. The run record names the titer it used, with its date and reason.
say "titer: certified NaOH 0.1 mol/L, 1.000, entered by hand"
"$bin/stopcock" titrants set "NaOH 0.1 mol/L" --molarity 0.1000 --titer 1.000 \
	--reason "certified titrant: certificate of the bottle in use (demo)"

control load "$scenario"
sample=ORCHARD-LANE-0412
say "queue: cider-acidity on sample $sample, 10 mL"
run=$("$bin/stopcock" start --station sim1 --method cider-acidity --sample-id "$sample" --amount 10)
echo "run $run queued"

say "titrating (progress below; each addition waits for the electrode to settle, so the"
say "  cider method takes several minutes on this real-time bench)"
rc=0
run_waited "$bin/stopcock" wait "$run" --timeout 900 || rc=$?

say "run $run"
"$bin/stopcock" show "$run" --svg "$out/run-$run.svg"
"$bin/stopcock" show "$run" --csv >"$out/run-$run.csv"
"$bin/stopcock" status

stop_all
say "files"
echo "curve:  $out/run-$run.svg"
echo "points: $out/run-$run.csv ($(($(wc -l <"$out/run-$run.csv") - 1)) points)"
[ "$rc" -eq 0 ] || { echo "demo: run $run did not finish" >&2; exit 1; }
say "done; everything stopped"
