#!/usr/bin/env bash
# Runs the whole test suite. Makes sure the PostgreSQL server the store tests
# use is up first (127.0.0.1:5432, trust auth, database "test"); with CI=true
# the PostgreSQL tests fail instead of skipping when it cannot be reached.
set -euo pipefail
cd "$(dirname "$0")/.."

if command -v pg_isready >/dev/null 2>&1 && ! pg_isready -q -h 127.0.0.1 -p 5432; then
	if command -v pg_ctlcluster >/dev/null 2>&1 && [ -d /etc/postgresql ]; then
		echo "test.sh: starting PostgreSQL" >&2
		pg_ctlcluster --skip-systemctl-redirect "$(ls /etc/postgresql | head -n1)" main start || true
		for _ in $(seq 1 30); do
			pg_isready -q -h 127.0.0.1 -p 5432 && break
			sleep 1
		done
	fi
fi
if command -v psql >/dev/null 2>&1 && pg_isready -q -h 127.0.0.1 -p 5432; then
	psql -h 127.0.0.1 -U postgres -d postgres -tAc "SELECT 1 FROM pg_database WHERE datname='test'" | grep -q 1 ||
		psql -h 127.0.0.1 -U postgres -d postgres -c "CREATE DATABASE test" >/dev/null
fi
export FILTRATE_TEST_POSTGRES="${FILTRATE_TEST_POSTGRES:-postgres://postgres@127.0.0.1:5432/test?sslmode=disable}"

go test -count=1 "$@" ./...
