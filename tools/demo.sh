#!/usr/bin/env bash
# The main job on the bundled demo data: sets up headroom (Debian packages when
# missing, then the build), qualifies two sound bundled kernels on the quick
# suite against their documented budgets, and replays the bundled corpus
# against every flawed specimen. Reports land in demo-out/.
# Exit 0 when every sound kernel passed and every specimen was caught.
set -uo pipefail
cd "$(dirname "$0")/.."
tools/setup.sh || exit 2
H=build/tools/headroom
out=demo-out
mkdir -p "$out"
status=0

for k in f16_f32acc i8_tokenwise; do
  echo "== qualify $k (quick suite; review report in $out/$k.md, $out/$k.html)"
  "$H" qualify --kernel "$k" --suite quick --budget budgets/bundled.toml \
      --json "$out/$k.json" --markdown "$out/$k.md" --html "$out/$k.html" --junit "$out/$k.junit.xml"
  rc=$?
  [ "$rc" -eq 0 ] || { echo "demo: sound kernel $k did not pass (exit $rc)"; status=1; }
done

echo "== replay the corpus against each flawed specimen (each must be caught: exit 1)"
for dir in corpora/*/; do
  k=$(basename "$dir")
  "$H" replay --kernel "$k" "$dir" --budget budgets/bundled.toml --time-limit 5 --quiet --json "$out/replay-$k.json" >/dev/null
  rc=$?
  faults=$(/usr/bin/python3 -c "import json,sys; r=json.load(open(sys.argv[1])); print(' '.join(f'{k}={v}' for k,v in sorted(r['faults'].items())) or 'error beyond budget')" "$out/replay-$k.json" 2>/dev/null)
  if [ "$rc" -eq 1 ]; then
    printf '  caught  %-22s %s\n' "$k" "$faults"
  else
    printf '  MISSED  %-22s (exit %s)\n' "$k" "$rc"
    status=1
  fi
done
echo "demo: reports and records in $out/ (a pass is evidence over the cases tried, not a proof)"
exit $status
