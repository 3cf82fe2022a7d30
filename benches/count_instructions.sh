#!/bin/sh
# Instructions per simulated second, counted by callgrind: the same from run to run and
# from day to day, unlike wall time on this machine class (which moves up to 3× between
# days). Runs the whole plant of the zero-export example (without and with a home
# battery) and `spillway simulate`'s two runs of it (the rules, and the no-diversion
# baseline), each for DAYS (default 28) and for 1 day; the difference divided by the
# extra simulated seconds leaves out start-up.
#
# Usage, from the repository root (needs valgrind):  sh benches/count_instructions.sh [DAYS]
set -eu
DAYS=${1:-28}
[ "$DAYS" -ge 2 ] || { echo "DAYS must be 2 or more (the 1-day run is subtracted)" >&2; exit 2; }
command -v valgrind >/dev/null || { echo "valgrind is needed (apt-get install valgrind)" >&2; exit 2; }
plant=$(cargo bench -p spillway-sim --bench plant --no-run 2>&1 | sed -n 's/.*Executable .* (\(.*\))$/\1/p')
simulate=$(cargo bench --bench simulate --no-run 2>&1 | sed -n 's/.*Executable .* (\(.*\))$/\1/p')

# count DAYS VAR=VALUE BINARY: instructions of one run (callgrind's "Collected" total).
count() {
    SPILLWAY_BENCH_DAYS=$1 env "$2" valgrind --tool=callgrind --callgrind-out-file=/dev/null "$3" --bench 2>&1 >/dev/null |
        sed -n 's/.*Collected : \([0-9]*\).*/\1/p'
}

per_second() { # label, VAR=VALUE choosing the run, binary
    long=$(count "$DAYS" "$2" "$3")
    short=$(count 1 "$2" "$3")
    echo "$1: $(( (long - short) / ((DAYS - 1) * 86400) )) instructions per simulated second"
}

per_second "whole plant" SPILLWAY_BENCH_ONCE=whole_plant "$plant"
per_second "whole plant with a battery" SPILLWAY_BENCH_ONCE=whole_plant_battery "$plant"
per_second "spillway simulate, the rules" SPILLWAY_BENCH_ONLY=Spillway "$simulate"
per_second "spillway simulate, the baseline" SPILLWAY_BENCH_ONLY=Baseline "$simulate"
