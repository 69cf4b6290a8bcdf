#!/usr/bin/env bash
# Make sure what the test suite talks to is there: PostgreSQL on 127.0.0.1:5432, Debian's
# chromium for the dashboard's browser tests and Java 17 for Spark. Safe to run again.
set -euo pipefail

if ! pg_isready -h 127.0.0.1 -p 5432 -q 2>/dev/null; then
  if command -v pg_ctlcluster >/dev/null 2>&1; then
    pg_ctlcluster --skip-systemctl-redirect "$(ls /etc/postgresql | head -n 1)" main start
  fi
  for _ in $(seq 1 30); do pg_isready -h 127.0.0.1 -p 5432 -q && break; sleep 1; done
fi
pg_isready -h 127.0.0.1 -p 5432 || { echo "PostgreSQL is not reachable on 127.0.0.1:5432" >&2; exit 1; }

if ! command -v chromium >/dev/null 2>&1 || ! command -v chromedriver >/dev/null 2>&1; then
  if [ "$(id -u)" = 0 ]; then
    apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium chromium-driver
  else
    echo "chromium and chromium-driver are missing: sudo apt-get install chromium chromium-driver" >&2
    exit 1
  fi
fi

# Java 17 for the lake job's Spark tests (pyspark in local mode)
if ! command -v java >/dev/null 2>&1; then
  if [ "$(id -u)" = 0 ]; then
    apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq openjdk-17-jre-headless
  else
    echo "Java is missing: sudo apt-get install openjdk-17-jre-headless" >&2
    exit 1
  fi
fi
