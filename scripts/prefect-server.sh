#!/usr/bin/env bash
# Start a local Prefect server on 127.0.0.1 whose state lives in the store folder; used by `fleetsift serve`.
# Usage: scripts/prefect-server.sh STORE [PORT]
set -euo pipefail
STORE="$(cd "${1:?usage: prefect-server.sh STORE [PORT]}" 2>/dev/null && pwd || (mkdir -p "$1" && cd "$1" && pwd))"
PORT="${2:-4200}"
export PREFECT_HOME="$STORE/prefect"
export PREFECT_API_DATABASE_CONNECTION_URL="sqlite+aiosqlite:///$PREFECT_HOME/server.db"
export PREFECT_SERVER_ANALYTICS_ENABLED=false
export PREFECT_UI_ENABLED="${PREFECT_UI_ENABLED:-false}"
mkdir -p "$PREFECT_HOME"
HERE="$(cd "$(dirname "$0")/.." && pwd)"
PREFECT="${PREFECT:-$HERE/.venv/bin/prefect}"
echo "Prefect server on http://127.0.0.1:$PORT/api (state in $PREFECT_HOME); export PREFECT_API_URL to use it" >&2
exec "$PREFECT" server start --host 127.0.0.1 --port "$PORT"
