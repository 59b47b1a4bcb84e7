#!/usr/bin/env bash
# Write a synthetic labeled file (20000 rows) and a pool file of M rows for the large-pool
# benchmarks of docs/streaming.md: predictions on a 0.001 grid (ties), outcome = prediction
# + noise, lognormal weights in column w (sigma 0.5), ids L<i> and U<j>. Seeded awk, so the
# same M gives the same files on one awk build (not a fixture: nothing compares them).
# Usage: tests/scripts/make_large_pool.sh M DIR   (then: weighbridge select --labeled
#   DIR/labeled.csv --pool DIR/pool.csv --threshold 0 --weight-column w --out DIR/out)
set -euo pipefail
m=${1:?pool size M}
dir=${2:?output folder}
mkdir -p "$dir"
gen='function normal() { return sqrt(-2 * log(1 - rand())) * cos(6.283185307179586 * rand()) }'
awk -v seed=11 "$gen"'
BEGIN {
    srand(seed); print "id,y,pred,w"
    for (i = 1; i <= 20000; i++) {
        p = normal(); y = p + normal()
        printf "L%d,%.4f,%.3f,%.6f\n", i, y, p, exp(0.5 * normal())
    }
}' > "$dir/labeled.csv"
awk -v seed=12 -v m="$m" "$gen"'
BEGIN {
    srand(seed); print "id,pred,w"
    for (j = 1; j <= m; j++) printf "U%d,%.3f,%.6f\n", j, normal() - 0.3, exp(0.5 * normal())
}' > "$dir/pool.csv"
