#!/usr/bin/env bash
# Browser test of report.html: installs Debian's chromium when missing, installs playwright-core
# (npm ci, from package-lock.json; no browser download), builds liftgate when needed, runs the
# bundled demo into a temporary report directory (or uses the report directory given as the
# first argument) and runs report.test.mjs. Screenshots and an A4 PDF go to
# tests/browser/screenshots/ (git-ignored). Exits non-zero on any failed check.
set -euo pipefail
here=$(cd "$(dirname "$0")" && pwd)
root=$(cd "$here/../.." && pwd)
# A report directory given as a relative path is read from the caller's directory, before this
# script changes directory.
given=""
if [ $# -ge 1 ]; then
  given=$(cd "$1" && pwd)
fi

if [ ! -x /usr/bin/chromium ]; then
  echo "== installing chromium (Debian package)"
  apt-get update
  DEBIAN_FRONTEND=noninteractive apt-get install -y chromium
fi
if ! command -v npm >/dev/null; then
  echo "== installing node and npm (Debian packages)"
  apt-get update
  DEBIAN_FRONTEND=noninteractive apt-get install -y nodejs npm
fi

echo "== npm ci (playwright-core, no browser download)"
cd "$here"
PLAYWRIGHT_SKIP_BROWSER_DOWNLOAD=1 npm ci --no-audit --no-fund --loglevel=error

bin="$root/target/release/liftgate"
if [ ! -x "$bin" ]; then
  echo "== building liftgate"
  (cd "$root" && cargo build --release --locked)
fi

work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
if [ -n "$given" ]; then
  demo=$given
else
  echo "== the bundled demo"
  set +e
  (cd "$root" && "$bin" vet --report "$work/demo" >"$work/vet.out" 2>"$work/vet.err")
  code=$?
  set -e
  if [ "$code" -ne 0 ] && [ "$code" -ne 1 ]; then
    echo "liftgate vet exited $code"; cat "$work/vet.err"; exit 1
  fi
  demo="$work/demo"
fi

echo "== browser test"
node "$here/report.test.mjs" --liftgate "$bin" --root "$root" --demo "$demo" --out "$here/screenshots"
