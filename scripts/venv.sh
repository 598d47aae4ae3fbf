# Sourced by scripts/demo and scripts/test: find a Python >= 3.11, create the
# project's virtual environment in .venv (once) and put it first on the PATH.
# A stock Debian/Ubuntu Python is "externally managed" (PEP 668) and refuses
# `pip install` outside a virtual environment; pyenv Pythons work either way.
# Enter the environment by hand with `. .venv/bin/activate`.

VENV_DIR="${CORRAL_VENV:-.venv}"
SUDO=""
[ "$(id -u)" -ne 0 ] && SUDO="sudo"

_python_ok() {  # exit 0 when "$1" runs and is Python >= 3.11
  "$1" -c 'import sys; sys.exit(0 if sys.version_info >= (3, 11) else 1)' >/dev/null 2>&1
}

find_python() {
  local cand
  for cand in python3 python3.13 python3.12 python3.11 python; do
    if command -v "$cand" >/dev/null 2>&1 && _python_ok "$cand"; then
      command -v "$cand"
      return 0
    fi
  done
  return 1
}

ensure_venv() {
  if [ -x "$VENV_DIR/bin/python" ] && _python_ok "$VENV_DIR/bin/python" \
     && "$VENV_DIR/bin/python" -m pip --version >/dev/null 2>&1; then
    return 0
  fi
  local py
  if ! py="$(find_python)"; then
    echo "corral needs Python 3.11 or newer on the PATH (found: $(python3 --version 2>&1 || echo none)); install one, e.g. 'apt-get install python3' on Debian 12 or Ubuntu 24.04, or pyenv." >&2
    exit 1
  fi
  # Debian splits ensurepip (which venv needs to seed pip) into python3-venv.
  if ! "$py" -c 'import ensurepip' >/dev/null 2>&1; then
    local ver
    ver="$("$py" -c 'import sys; print(f"{sys.version_info[0]}.{sys.version_info[1]}")')"
    echo "Installing python${ver}-venv (the venv module's pip seed) with apt-get." >&2
    $SUDO apt-get update -qq
    $SUDO apt-get install -y -qq "python${ver}-venv" || $SUDO apt-get install -y -qq python3-venv
  fi
  rm -rf "$VENV_DIR"
  echo "Creating the project environment in $VENV_DIR with $py ($("$py" --version 2>&1))." >&2
  "$py" -m venv "$VENV_DIR"
}

ensure_venv
export VIRTUAL_ENV="$PWD/$VENV_DIR"
export PATH="$VIRTUAL_ENV/bin:$PATH"
PY="$VIRTUAL_ENV/bin/python"
