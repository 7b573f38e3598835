#!/usr/bin/env bash
# Runs the libFuzzer targets for a bounded time each and fails on any
# finding (crash, leak, timeout, out-of-memory, sanitizer report).
#
#   fuzz/run.sh BUILD_DIR [SECONDS] [TARGET...]
#
# BUILD_DIR was configured with clang and -DTENON_BUILD_FUZZERS=ON (see
# DEVELOPERS.md, "Fuzzing"); SECONDS defaults to 30; TARGET defaults to all
# (csv model_file plan_bytes cli_args). New interesting inputs go to
# BUILD_DIR/fuzz-work/TARGET (the committed corpus is only read); a finding
# is written to BUILD_DIR/fuzz-artifacts/TARGET/ and the run fails. Each
# target prints its executions from libFuzzer's final statistics.
set -uo pipefail
here="$(cd "$(dirname "$0")" && pwd)"
build="$(cd "${1:?usage: fuzz/run.sh BUILD_DIR [SECONDS] [TARGET...]}" && pwd)"
seconds="${2:-30}"
shift $(( $# >= 2 ? 2 : 1 ))
targets=("$@")
[ ${#targets[@]} -eq 0 ] && targets=(csv model_file plan_bytes cli_args)

failed=0
summary=""
for t in "${targets[@]}"; do
  binary="$build/fuzz/tenon_fuzz_$t"
  if [ ! -x "$binary" ]; then
    echo "fuzz: $binary is missing (configure with CXX=clang++ -DTENON_BUILD_FUZZERS=ON)" >&2
    exit 1
  fi
  work="$build/fuzz-work/$t"
  artifacts="$build/fuzz-artifacts/$t"
  log="$build/fuzz-$t.log"
  mkdir -p "$work" "$artifacts"
  echo "=== fuzz $t for ${seconds} s"
  # detect_leaks is on by default with AddressSanitizer; -timeout makes a
  # single input that runs longer than 10 s a finding (a hang).
  ASAN_OPTIONS="${ASAN_OPTIONS:-detect_leaks=1}" UBSAN_OPTIONS="${UBSAN_OPTIONS:-print_stacktrace=1:halt_on_error=1}" \
    "$binary" -max_total_time="$seconds" -rss_limit_mb=2048 -timeout=10 -print_final_stats=1 \
    -artifact_prefix="$artifacts/" "$work" "$here/corpus/$t" "$here/regressions/$t" >"$log" 2>&1
  status=$?
  executions=$(sed -n 's/^stat::number_of_executed_units: *//p' "$log" | tail -1)
  corpus=$(grep -Eo 'corp: [0-9]+/[0-9]+[a-zA-Z]*' "$log" | tail -1)
  line="$t: ${executions:-?} executions in ${seconds} s, ${corpus:-corp: ?}, exit status $status"
  echo "$line"
  summary="$summary$line"$'\n'
  if [ "$status" -ne 0 ] || ls "$artifacts" | grep -q .; then
    failed=1
    echo "fuzz $t: FINDING (log $log, inputs in $artifacts)" >&2
    grep -E 'ERROR|SUMMARY|==[0-9]+==|runtime error|deadly|leak' "$log" | head -20 >&2
  fi
done
echo "=== fuzz summary"
printf '%s' "$summary"
exit $failed
