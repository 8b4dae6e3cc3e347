#!/usr/bin/env bash
# The archive as a Slurm job array (contrib/slurm/archive.sbatch) on the one-node cluster
# `.ci/slurm start` runs, into a database of its own on the throwaway PostgreSQL server
# `.ci/postgres start` runs: four nights of rendered frames in eight folders, archived in
# 4 shares; one task's subwatch is killed with SIGKILL mid-way, and its script puts the
# task back in the queue. Then: every frame recorded once, every light judged, the task
# requeued, and the site's report of the target identical to a single-machine archive of
# the same folders into an SQLite store.
#
#   bash tests/slurm/archive_array.sh target/release/subwatch
set -euo pipefail

bin=$(realpath "${1:?give the subwatch program}")
: "${SLURM_CONF:?start the test cluster first: eval \"\$(.ci/slurm start)\"}"
: "${SUBWATCH_TEST_POSTGRES:?start PostgreSQL first: eval \"\$(.ci/postgres start)\"}"
repo=$(cd "$(dirname "$0")/../.." && pwd)
started=$(date +%s)
work=$(mktemp -d "${TMPDIR:-/tmp}/subwatch-slurm-test.XXXXXX")
chmod 755 "$work"
db=subwatch_slurm_$$
url="${SUBWATCH_TEST_POSTGRES%/*}/$db"
job=""
cleanup() {
  if [ -n "$job" ]; then scancel "$job" 2>/dev/null || true; fi
  psql -q "$SUBWATCH_TEST_POSTGRES" -c "DROP DATABASE IF EXISTS $db WITH (FORCE)" >/dev/null 2>&1 || true
  rm -rf "$work"
}
trap cleanup EXIT
fail() {
  echo "slurm test FAILED: $*" >&2
  for log in "$work"/task-*.log; do
    [ -f "$log" ] && { echo "--- $log" >&2; tail -n 20 "$log" >&2; }
  done
  exit 1
}
sql() { psql -qAt "$url" -c "$1"; }

# Four nights of Kestrel Field A, each in two folders named as a disk names them.
root="$work/archive"
for n in 1 2 3 4; do
  night="$root/2026-02-0$n"
  "$bin" render-night --out "$night" --seed "$n" --frames 16 --size 1024 --stars 300 --quiet \
    --start "2026-02-0${n}T20:30:00" >/dev/null
  rm -f "$night/truth.json"
  mkdir -p "$night/part 2"
  for f in "$night"/*_0{09..16}.fits; do mv "$f" "$night/part 2/"; done
done
files=$(find "$root" -name '*.fits' | wc -l)

psql -q "$SUBWATCH_TEST_POSTGRES" -c "CREATE DATABASE $db" >/dev/null
cat >"$work/site.toml" <<EOF
[watch]
folders = ["$root"]
[store]
url = "$url"
EOF
cat >"$work/single.toml" <<EOF
[watch]
folders = ["$root"]
[store]
path = "$work/single.db"
EOF

# Each share's folders and frames; the task killed is the one with the most frames.
declare -a share_frames
victim=1
for k in 1 2 3 4; do
  share_frames[k]=$("$bin" archive "$root" --config "$work/site.toml" --shard "$k/4" --list \
    | awk -F'\t' '{ s += $2 } END { print s + 0 }')
  if [ "${share_frames[k]}" -gt "${share_frames[victim]}" ]; then victim=$k; fi
done
[ "${share_frames[victim]}" -ge 6 ] || fail "no share has frames enough to be killed mid-way"
victim_folders=$("$bin" archive "$root" --config "$work/site.toml" --shard "$victim/4" --list | cut -f1)

# The array: one CPU a task, so two run at once on a 2-core node.
job=$(sbatch --parsable --array=1-4 --cpus-per-task=1 --output="$work/task-%a.log" \
  --export=ALL,SUBWATCH="$bin" "$repo/contrib/slurm/archive.sbatch" "$root" "$work/site.toml")
echo "job array $job: $files frames in 4 shares (${share_frames[1]}/${share_frames[2]}/${share_frames[3]}/${share_frames[4]} frames); share $victim will be killed"

# Count the victim share's frames in the store.
victim_count() {
  local where=""
  while IFS= read -r folder; do
    where="$where OR path LIKE '$root/$folder/%' AND path NOT LIKE '$root/$folder/%/%'"
  done <<<"$victim_folders"
  sql "SELECT COUNT(*) FROM frames WHERE false $where" 2>/dev/null || echo 0
}
# Kill the victim's subwatch once it has recorded a few of its frames.
killed_at=""
deadline=$(($(date +%s) + 300))
while [ -z "$killed_at" ]; do
  [ "$(date +%s)" -lt "$deadline" ] || fail "share $victim did not start within 300 s"
  done_now=$(victim_count)
  if [ "$done_now" -ge 2 ]; then
    [ "$done_now" -lt "${share_frames[victim]}" ] || fail "share $victim finished before it could be killed"
    task=$(squeue -h -j "${job}_${victim}" -o %A 2>/dev/null || true)
    for pid in $( [ -n "$task" ] && scontrol listpids "$task" 2>/dev/null | awk 'NR > 1 { print $1 }'); do
      if tr '\0' ' ' <"/proc/$pid/cmdline" 2>/dev/null | grep -q -- "archive .* --shard $victim/4"; then
        kill -KILL "$pid"
        killed_at=$(victim_count)
        break
      fi
    done
  fi
  sleep 0.05
done
echo "share $victim killed with SIGKILL after $killed_at of its ${share_frames[victim]} frames"

# The array ends (the killed task requeued and finished). Slurm holds a requeued task
# for two minutes before it may start again; the test lets it start at once.
deadline=$(($(date +%s) + 600))
released=""
while [ -n "$(squeue -h -j "$job" 2>/dev/null)" ]; do
  [ "$(date +%s)" -lt "$deadline" ] || fail "the array did not finish within 600 s"
  if [ -z "$released" ] && squeue -h -j "${job}_${victim}" -o '%T %r' 2>/dev/null | grep -q '^PENDING BeginTime'; then
    scontrol update JobId="${job}_${victim}" StartTime=now
    released=yes
  fi
  sleep 0.5
done
restarts=$(scontrol show job "${job}_${victim}" | grep -o 'Restarts=[0-9]*' | cut -d= -f2)
[ "${restarts:-0}" -ge 1 ] || fail "share $victim was not requeued (Restarts=${restarts:-?})"
grep -q "back in the queue" "$work/task-$victim.log" || fail "share $victim's script did not requeue it"
for k in 1 2 3 4; do
  state=$(scontrol show job "${job}_${k}" | grep -o 'JobState=[A-Z]*' | cut -d= -f2)
  [ "$state" = COMPLETED ] || fail "share $k ended $state"
done

# Every frame once, every light judged.
read -r rows paths unjudged <<<"$(sql "SELECT COUNT(*), COUNT(DISTINCT path), COUNT(CASE WHEN verdict IS NULL AND status != 'skipped' THEN 1 END) FROM frames" | tr '|' ' ')"
[ "$rows" = "$files" ] && [ "$paths" = "$files" ] || fail "$rows records of $paths paths for $files frames"
[ "$unjudged" = 0 ] || fail "$unjudged lights without a verdict"

# The site's report of the target, as one archive of the same folders on one machine gives it.
"$bin" archive "$root" --config "$work/single.toml" --json >"$work/single-archive.json"
"$bin" report --config "$work/site.toml" --site --target "Kestrel Field A" --json >"$work/site.json"
"$bin" report --config "$work/single.toml" --target "Kestrel Field A" --json >"$work/single.json"
cmp -s "$work/site.json" "$work/single.json" \
  || fail "the site's target report differs from a single archive's: $(diff <(tr ',' '\n' <"$work/site.json") <(tr ',' '\n' <"$work/single.json") | head -n 10)"
usable=$(python3 -c 'import json,sys; d=json.load(open(sys.argv[1])); f=d["frames"]; print("%.2f h usable; %d ok, %d warn, %d reject" % (d["usable_s"] / 3600, f["ok"], f["warn"], f["reject"]))' "$work/site.json")

echo "slurm test passed in $(($(date +%s) - started)) s: $files frames of 4 nights in 8 folders, 4 shares (${share_frames[1]}/${share_frames[2]}/${share_frames[3]}/${share_frames[4]}); share $victim killed after $killed_at of ${share_frames[victim]} frames and requeued (Restarts=$restarts); $rows records of $paths paths, every light judged; the site's target report ($usable) identical to a single archive's"
