#!/bin/bash
# run.sh FUZZDIR SECONDS TARGET...: replay each target's regression inputs
# (tests/fuzz/regress/TARGET/), then fuzz each target for SECONDS from its
# seed corpus (tests/fuzz/corpus/TARGET/, read only; new inputs go to
# FUZZDIR/work/TARGET), two targets at a time (2 cores). Prints one line of
# figures per target; exits 1 if any input crashed (inputs kept under
# FUZZDIR/crashes/TARGET/: copy each to tests/fuzz/regress/TARGET/).
set -u
dir=$1 secs=$2
shift 2
fail=0
for t in "$@"; do
	reg=tests/fuzz/regress/$t
	if [ -d "$reg" ] && [ -n "$(ls -A "$reg")" ]; then
		if ! "$dir/bin/fuzz_$t" -runs=1 "$reg"/* >"$dir/regress-$t.log" 2>&1; then
			echo "fuzz $t: a regression input fails again; see $dir/regress-$t.log"
			fail=1
		else
			echo "fuzz $t: $(ls "$reg" | wc -l) regression inputs replayed, all pass"
		fi
	fi
done
run_one() {
	local t=$1
	mkdir -p "$dir/work/$t" "$dir/crashes/$t"
	"$dir/bin/fuzz_$t" -max_total_time="$secs" -timeout=60 -rss_limit_mb=2048 \
		-max_len=8192 -print_final_stats=1 -artifact_prefix="$dir/crashes/$t/" \
		"$dir/work/$t" "tests/fuzz/corpus/$t" >"$dir/$t.log" 2>&1
	echo $? >"$dir/$t.rc"
}
while [ $# -gt 0 ]; do
	run_one "$1" &
	if [ $# -gt 1 ]; then
		run_one "$2" &
		shift
	fi
	shift
	wait
done
total=0
for log in "$dir"/*.log; do
	t=$(basename "$log" .log)
	case $t in regress-*) continue ;; esac
	[ -f "$dir/$t.rc" ] || continue
	rc=$(cat "$dir/$t.rc")
	runs=$(sed -n 's/^stat::number_of_executed_units: *//p' "$log" | tail -1)
	cov=$(grep -o 'cov: [0-9]*' "$log" | tail -1 | cut -d' ' -f2)
	corp=$(ls "$dir/work/$t" | wc -l)
	printf 'fuzz %-9s %9s executions in %s s, coverage %s edges, %s inputs in the working corpus, %s\n' \
		"$t" "${runs:-?}" "$secs" "${cov:-?}" "$corp" \
		"$([ "$rc" = 0 ] && echo 'no crash' || echo "CRASH (rc $rc; $dir/crashes/$t)")"
	[ "$rc" = 0 ] || fail=1
	total=$((total + ${runs:-0}))
	rm -f "$dir/$t.rc"
done
echo "fuzz: $total executions in all"
exit $fail
