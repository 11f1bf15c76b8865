#!/bin/sh
# Run every fuzz target of the module for a while each.
#
#   scripts/fuzz.sh [SECONDS] [PACKAGE-PATTERN]     (default 30 s, every package)
#   KEEP=N scripts/fuzz.sh ...   also copy up to N new interesting inputs of
#                                each target into its testdata/fuzz/<Target>/
#                                (review, then commit them as seed corpus)
#
# `go test` alone runs each target's committed seed corpus (testdata/fuzz)
# and its f.Add seeds as ordinary tests; this script is for real fuzzing and
# is not part of the test suite. A failure stops the script; Go writes the
# failing input under testdata/fuzz/<Target>/ for `go test -run` to replay.
set -eu
secs=${1:-30}
pattern=${2:-./...}
keep=${KEEP:-0}
cd "$(dirname "$0")/.."
cache=$(go env GOCACHE)/fuzz
module=$(go list -m)

for pkg in $(go list "$pattern"); do
	dir=$(go list -f '{{.Dir}}' "$pkg")
	targets=$(go test -list '^Fuzz' "$pkg" 2>/dev/null | grep '^Fuzz' || true)
	for t in $targets; do
		echo "== $pkg $t (${secs}s)"
		go test "$pkg" -run '^$' -fuzz "^$t\$" -fuzztime "${secs}s"
		if [ "$keep" -gt 0 ] && [ -d "$cache/$pkg/$t" ]; then
			mkdir -p "$dir/testdata/fuzz/$t"
			ls -t "$cache/$pkg/$t" | head -n "$keep" | while read -r f; do
				cp "$cache/$pkg/$t/$f" "$dir/testdata/fuzz/$t/$f"
			done
		fi
	done
done
echo "fuzzing done ($module)"
