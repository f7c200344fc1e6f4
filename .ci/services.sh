#!/usr/bin/env bash
# Start the database servers the test suite talks to, when they are not already up:
# PostgreSQL on 127.0.0.1:5432, MariaDB on 127.0.0.1:3306 and Redis on 127.0.0.1:6379 (the
# shared answer cache tests) — Debian packages on this machine.
set -uo pipefail

up() { (exec 3<>"/dev/tcp/127.0.0.1/$1") 2>/dev/null; }

wait_for() {  # port, name
  for _ in $(seq 1 60); do up "$1" && return 0; sleep 0.5; done
  echo "services: $2 did not come up on 127.0.0.1:$1" >&2
  return 1
}

if up 5432; then
  echo "services: PostgreSQL is up on 127.0.0.1:5432"
elif command -v pg_ctlcluster >/dev/null 2>&1; then
  echo "services: starting PostgreSQL"
  ver=$(ls /etc/postgresql | sort -V | tail -n 1)
  pg_ctlcluster --skip-systemctl-redirect "$ver" main start || true
  wait_for 5432 PostgreSQL || exit 1
else
  echo "services: PostgreSQL is not installed (apt-get install postgresql)" >&2
fi

if up 3306; then
  echo "services: MariaDB is up on 127.0.0.1:3306"
elif [ -x /usr/sbin/mariadbd ]; then
  echo "services: starting MariaDB"
  mkdir -p /run/mysqld && chown mysql:mysql /run/mysqld 2>/dev/null || true
  start-stop-daemon --start --oknodo --background --exec /usr/sbin/mariadbd -- --user=mysql || true
  wait_for 3306 MariaDB || exit 1
else
  echo "services: MariaDB is not installed (apt-get install mariadb-server)" >&2
fi
if up 6379; then
  echo "services: Redis is up on 127.0.0.1:6379"
elif command -v redis-server >/dev/null 2>&1; then
  echo "services: starting Redis"
  redis-server --bind 127.0.0.1 --port 6379 --daemonize yes --save '' --appendonly no || true
  wait_for 6379 Redis || exit 1
else
  echo "services: Redis is not installed (apt-get install redis-server)" >&2
fi
exit 0
