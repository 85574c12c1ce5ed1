#!/usr/bin/env bash
# Byte-compare the result files of the demo, a generated horizon and a retune between two
# revisions (default: HEAD~1 and the working tree). summary.json / retune.json differ only in
# timings_s, which are compared with that key removed.
# Usage: scripts/compare_outputs.sh [OLD_REV]
set -euo pipefail
root="$(cd "$(dirname "$0")/.." && pwd)"
old_rev="${1:-HEAD~1}"
py="${PYTHON:-$root/.venv/bin/python}"
work="$(mktemp -d)"
trap 'git -C "$root" worktree remove --force "$work/old" >/dev/null 2>&1 || true; rm -rf "$work"' EXIT
git -C "$root" worktree add -q --detach "$work/old" "$old_rev"
cd "$work"  # python -m puts the current folder first on sys.path: not the tree under test
run() {  # $1 = source tree, $2 = output folder
  local src="$1" out="$2"
  cd "$work"  # python -m puts the current folder first on sys.path: run from a neutral one
  PYTHONPATH="$src" "$py" -m optreserve generate --units 60 --periods 8 --seed 3 --out "$out/gen-case" --quiet
  PYTHONPATH="$src" "$py" -m optreserve solve "$root/instances/demo-tri-valley" --out "$out/demo" --quiet
  PYTHONPATH="$src" "$py" -m optreserve solve "$out/gen-case" --out "$out/gen" --quiet
  PYTHONPATH="$src" "$py" -m optreserve retune "$root/instances/demo-tri-valley" --out "$out/retune" --quiet
}
cd "$work"  # python -m puts the current folder first on sys.path: never the tree under test
run "$work/old" "$work/a"
run "$root" "$work/b"
"$py" - "$work/a" "$work/b" <<'PY'
import json, pathlib, sys
a, b = map(pathlib.Path, sys.argv[1:])
bad = 0
for fa in sorted(p for p in a.rglob("*") if p.is_file()):
    fb = b / fa.relative_to(a)
    if not fb.exists():
        print("missing", fb.relative_to(b)); bad += 1; continue
    if fa.suffix == ".json":
        ja, jb = (json.loads(f.read_text()) for f in (fa, fb))
        for j in (ja, jb):
            j.pop("timings_s", None)
        same = ja == jb
    else:
        same = fa.read_bytes() == fb.read_bytes()
    if not same:
        print("differs", fa.relative_to(a)); bad += 1
print("identical" if not bad else f"{bad} file(s) differ")
sys.exit(1 if bad else 0)
PY
