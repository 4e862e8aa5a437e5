#!/usr/bin/env bash
# Start or stop a throwaway PostgreSQL server for the shared-logbook tests (see pg_server.py).
#   eval "$(bash tests/logbook_shared/pg_server.sh start --dir /tmp/tracer-pg)"   # exports TRACER_TEST_POSTGRES_URL
#   bash tests/logbook_shared/pg_server.sh stop --dir /tmp/tracer-pg
set -euo pipefail
PY=${PYTHON:-$(command -v python3.11 || command -v python3)}
exec "$PY" "$(dirname "$0")/pg_server.py" "$@"
