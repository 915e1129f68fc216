#!/bin/sh
# Runs danpack-run-native (built with sanitizers) over awkward input on the test bundles: every run must end with
# exit status 0, 1 or 2 and one output record per input line (a sanitizer report fails the run with status 1 and
# is printed). Usage: run_program.sh PROGRAM BUNDLE_DIR
set -u
prog=$1
dir=$2
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
fail=0
printf 'The charger was slow!\n\n  \nCaf\xc3\xa9 \xff broken\r\nNUL\000byte\n\xef\xbb\xbfnot first\nlast line without newline' > "$work/plain.txt"
printf '{"text":"great fast charger","id":7,"line":1,"label":[1,2.50,{"a":null}]}\n{"text":5}\n[1,2]\n{"text":"\\ud800 lone"}\n{"id":"x"}\n{bad json\n{"text":"a","text":"b","x":1e400}\n{"text":"\\u0000"}\n' > "$work/records.jsonl"
awk 'BEGIN { for (i = 0; i < 3000; i++) printf "[" ; print "" }' > "$work/deep.jsonl"
head -c 300000 /dev/urandom > "$work/random.bin"
check() { # expected_lines status_ok args...
  want=$1; shift
  "$prog" "$@" > "$work/out" 2> "$work/err"
  status=$?
  got=$(wc -l < "$work/out")
  if [ "$status" -gt 2 ] || grep -q "Sanitizer\|runtime error" "$work/err"; then
    echo "FAIL: $* -> status $status"; cat "$work/err"; fail=1
  elif [ "$want" != "-" ] && [ "$got" -ne "$want" ]; then
    echo "FAIL: $* -> $got output lines, expected $want"; fail=1
  fi
}
for b in "$dir"/*.bundle; do
  check 7 "$b" "$work/plain.txt"
  check 8 "$b" "$work/plain.txt" --classify-empty --format tsv --header --top-k 2
  check 8 "$b" --jsonl "$work/records.jsonl"
  check 8 "$b" --jsonl "$work/records.jsonl" --format tsv --top-k 2 --lenient
  check 1 "$b" --jsonl "$work/deep.jsonl"
  check - "$b" "$work/random.bin" --max-line-bytes 100
  check - "$b" --jsonl "$work/random.bin"
  check 7 "$b" --max-line-bytes 5 "$work/plain.txt"
done
check 0 "$dir/missing.bundle" "$work/plain.txt"
check 0 "$dir" "$work/plain.txt"
check 0 --top-k 0 "$dir/base.bundle"
check 0 --no-such-option "$dir/base.bundle"
if [ "$fail" -ne 0 ]; then echo "danpack-run-native runs: FAILED"; exit 1; fi
echo "danpack-run-native runs: every run ended cleanly"
