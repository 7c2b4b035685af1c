#!/usr/bin/env bash
# The whole job on the built-in demo, end to end, with a local folder as the object store:
#   generate a messy legacy archive → survey → migrate → verify → publish → find → extract.
# Usage: bash examples/run_demo.sh [WORKDIR]   (needs `scanshelf` on PATH; `make demo` does that)
set -euo pipefail
work="${1:-demo-out}"
mkdir -p "$work"
work="$(cd "$work" && pwd)"
rm -rf "$work/source" "$work/shelf" "$work/published" "$work/subset.laz" "$work/report.html"

echo "== 1. generate the demo source archive (an invented site, two stations) =="
scanshelf demo "$work"

echo "== 2. survey it: the planted faults make the exit code 1, as they should =="
status=0
scanshelf survey "$work/source" --site "$work/site.toml" -o "$work/survey.parquet" -q || status=$?
[ "$status" -eq 1 ] || { echo "survey should report the planted faults (exit 1), got $status"; exit 1; }

echo "== 3. migrate every scan and grid into a shelf (faults listed, exit code 1 again) =="
status=0
scanshelf migrate "$work/source" "$work/shelf" --site "$work/site.toml" -q || status=$?
[ "$status" -eq 1 ] || { echo "migrate should list the skipped files (exit 1), got $status"; exit 1; }

echo "== 4. verify the catalog offline and every checksum =="
scanshelf verify "$work/shelf"

echo "== 5. publish to a local folder standing in for object storage =="
scanshelf publish "$work/shelf" "file://$work/published" -q

echo "== 6. find scans and extract a small area from the published copy =="
scanshelf find "$work/published" --station north --start 2026-09-27 --end 2026-10-03
scanshelf extract "$work/published" --station north --start 2026-09-27 --end 2026-09-29 \
    --bbox-fraction 0.1 -o "$work/subset.laz"

echo "== 7. health report =="
scanshelf report "$work/shelf" -o "$work/report.html"
echo "done: shelf in $work/shelf, published copy in $work/published, report in $work/report.html"
