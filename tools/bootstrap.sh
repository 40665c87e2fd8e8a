#!/usr/bin/env bash
# Set up rtstage on a Debian-like machine: system packages (when missing), a
# virtual environment in .venv inside the repository, and the project with its
# test and plot extras.  Idempotent: a second run changes nothing and is quick.
set -euo pipefail
cd "$(dirname "$0")/.."

packages=(libportaudio2 libsndfile1 jackd2 libjack-jackd2-dev libasound2 gcc systemd)
missing=()
for p in "${packages[@]}"; do
  dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed" || missing+=("$p")
done
if [ ${#missing[@]} -gt 0 ]; then
  as_root=()
  [ "$(id -u)" -eq 0 ] || as_root=(sudo)
  echo "bootstrap: installing ${missing[*]}" >&2
  "${as_root[@]}" env DEBIAN_FRONTEND=noninteractive apt-get update -qq >&2
  "${as_root[@]}" env DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends "${missing[@]}" >&2
fi

python=${PYTHON:-python3}
if [ ! -x .venv/bin/python ]; then
  echo "bootstrap: creating .venv" >&2
  "$python" -m venv .venv
fi
stamp=.venv/.rtstage-installed
if [ ! -f "$stamp" ] || [ pyproject.toml -nt "$stamp" ]; then
  echo "bootstrap: installing rtstage into .venv" >&2
  .venv/bin/python -m pip install -q --upgrade pip >&2
  .venv/bin/python -m pip install -q -e ".[test,plot]" >&2
  touch "$stamp"
fi

# The kernel built ahead of time (rtstage.kernel_aot), so offline commands start without numba.
# It is named by a fingerprint of the kernel's sources, the toolchain and the processor: a
# current build is kept (quick), a stale one rebuilt (about a minute).
if ! .venv/bin/python -m rtstage.kernel_aot --check >/dev/null; then
  echo "bootstrap: building the kernel ahead of time" >&2
  .venv/bin/python -m rtstage.kernel_aot >&2
fi
