#!/usr/bin/env bash
# Set up livedyn on a Debian/Ubuntu machine and run it: safe to run again and again.
#
#   ./bootstrap.sh demo    install what is missing, then run the built-in rehearsal demo
#   ./bootstrap.sh test    install what is missing, then run the whole test suite
#   ./bootstrap.sh setup   install only
#
# System packages (PortAudio, the JACK server for headless real time, libsndfile) come from apt
# when they are missing: as root directly, otherwise through sudo if it is there. Python
# packages go into .venv/ beside this file. Extra arguments after `demo` / `test` are passed on
# to `livedyn demo` / pytest.
set -euo pipefail
cd "$(dirname "$0")"

APT_PACKAGES=(libportaudio2 jackd2 libsndfile1 python3-venv)
VENV=.venv
STAMP="$VENV/.livedyn-installed"

say() { printf 'bootstrap: %s\n' "$*" >&2; }

need_apt=()
for pkg in "${APT_PACKAGES[@]}"; do
  dpkg-query -W -f='${Status}' "$pkg" 2>/dev/null | grep -q "install ok installed" || need_apt+=("$pkg")
done
if [ ${#need_apt[@]} -gt 0 ]; then
  if [ "$(id -u)" = 0 ]; then SUDO=(); elif command -v sudo >/dev/null; then SUDO=(sudo); else SUDO=(none); fi
  if [ "${SUDO[*]}" = none ]; then
    say "missing system packages: ${need_apt[*]} (install them with apt as root, then run again)"
    exit 1
  fi
  say "installing system packages: ${need_apt[*]}"
  "${SUDO[@]}" env DEBIAN_FRONTEND=noninteractive apt-get update -qq
  "${SUDO[@]}" env DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends "${need_apt[@]}" >/dev/null
fi

PY=${PYTHON:-python3}
if ! "$PY" -c 'import sys; sys.exit(sys.version_info < (3, 10))' 2>/dev/null; then
  say "livedyn needs Python 3.10 or newer; $PY is $("$PY" --version 2>&1)"
  exit 1
fi
if [ ! -x "$VENV/bin/python" ]; then
  say "creating the virtual environment $VENV/"
  "$PY" -m venv "$VENV"
fi
want="$(sha256sum pyproject.toml | cut -d' ' -f1)"
if [ ! -f "$STAMP" ] || [ "$(cat "$STAMP")" != "$want" ]; then
  say "installing livedyn and its Python packages into $VENV/"
  "$VENV/bin/python" -m pip install -q --upgrade pip >/dev/null
  "$VENV/bin/python" -m pip install -q -e '.[test,plot]'
  echo "$want" > "$STAMP"
fi

what=${1:-setup}
[ $# -gt 0 ] && shift
case "$what" in
  setup) say "ready: $VENV/bin/livedyn --help" ;;
  demo) exec "$VENV/bin/livedyn" demo "$@" ;;
  test)
    set +e
    "$VENV/bin/python" -m pytest -q "$@"
    rc=$?
    if [ $rc -eq 5 ]; then say "pytest collected no tests: that is a failure"; exit 1; fi
    exit $rc
    ;;
  *) say "unknown command '$what': expected demo, test or setup"; exit 2 ;;
esac
