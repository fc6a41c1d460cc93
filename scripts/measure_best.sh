# Sourced by the benchmark scripts: `measure CMD...` runs CMD $repeats
# times under /usr/bin/time and prints "cpu_seconds peak_kib" of the run
# with the least CPU (user + sys). Needs $work (a scratch folder) and
# $repeats set by the caller.
measure() {
    local best=""
    for _ in $(seq "$repeats"); do
        /usr/bin/time -f "%U %S %M" -o "$work/t" "$@" >/dev/null 2>&1
        read -r u s m < "$work/t"
        local cpu; cpu=$(echo "$u + $s" | bc)
        if [ -z "$best" ] || [ "$(echo "$cpu < ${best% *}" | bc)" = 1 ]; then best="$cpu $m"; fi
    done
    echo "$best"
}
