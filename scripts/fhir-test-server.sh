#!/usr/bin/env bash
# The FHIR test server (sekmet-fhir 0.1.1, a general FHIR R4 test server) in its own
# virtualenv, .fhir-venv at the repository root (git-ignored).
#   scripts/fhir-test-server.sh install      create .fhir-venv if it is missing
#   scripts/fhir-test-server.sh run [PORT]   run it in the foreground on 127.0.0.1
# Tests do not need `run`: tests/fhir_server.py starts and stops its own instance.
set -euo pipefail
cd "$(dirname "$0")/.."
ROOT=$(pwd)
VENV=.fhir-venv
PYTHON=${PYTHON:-$(command -v python3.11 || command -v python3)}

install() {
    if [ ! -x "$VENV/bin/sekmet" ]; then
        "$PYTHON" -m venv "$VENV"
        "$VENV/bin/pip" install --quiet sekmet-fhir==0.1.1
    fi
}

case "${1:-install}" in
install) install ;;
run)
    install
    port=${2:-8090}
    dir=$(mktemp -d)
    trap 'rm -rf "$dir"' EXIT
    cat >"$dir/settings.yaml" <<YAML
base_url: http://127.0.0.1:$port/fhir
host: 127.0.0.1
port: $port
data_dir: $dir/data
own_private_key_path: $dir/keys/server.pem
simulator:
  enabled: false
YAML
    (cd "$dir" && "$ROOT/$VENV/bin/sekmet" serve -c "$dir/settings.yaml")
    ;;
*) echo "usage: $0 [install|run [PORT]]" >&2; exit 2 ;;
esac
