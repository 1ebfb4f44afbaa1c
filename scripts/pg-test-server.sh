#!/usr/bin/env bash
# Start a throwaway PostgreSQL server on loopback for packbench's tests (or
# to try `packbench sync`), and print its URL on stdout:
#
#   export PACKBENCH_TEST_PG=$(scripts/pg-test-server.sh)
#
# Needs Debian's PostgreSQL server package (apt-get install postgresql).
# The server runs from a new folder under /tmp (printed on stderr, with
# the command that stops it); trust authentication, loopback only.
set -euo pipefail
bin=$(ls -d /usr/lib/postgresql/*/bin 2>/dev/null | sort -V | tail -1 || true)
if [ -z "$bin" ] || [ ! -x "$bin/initdb" ]; then
    echo "no PostgreSQL server here: apt-get install postgresql" >&2
    exit 1
fi
dir=$(mktemp -d /tmp/packbench-pg.XXXXXX)
run=()
if [ "$(id -u)" = 0 ]; then
    # The server refuses to run as root: as the package's own user.
    id postgres >/dev/null 2>&1 || useradd --system --no-create-home postgres
    chown postgres "$dir"
    run=(runuser -u postgres --)
fi
"${run[@]}" "$bin/initdb" -D "$dir/data" -U packbench --auth=trust -E UTF8 --locale=C \
    >"$dir/initdb.log" 2>&1 || { cat "$dir/initdb.log" >&2; exit 1; }
# TLS too: a test root (data/root.crt, what a client checks the server
# against) and a server certificate it signed for 127.0.0.1, and a role
# that may only connect over TLS (tls_only), so a test can tell TLS was
# used.
(
    cd "$dir/data"
    openssl req -x509 -newkey rsa:2048 -nodes -days 7 -subj /CN=packbench-test-root \
        -keyout root.key -out root.crt
    openssl req -newkey rsa:2048 -nodes -subj /CN=localhost -keyout server.key -out server.csr
    printf '%s\n' "subjectAltName=IP:127.0.0.1,DNS:localhost" "basicConstraints=CA:FALSE" \
        "keyUsage=digitalSignature,keyEncipherment" "extendedKeyUsage=serverAuth" > server.ext
    openssl x509 -req -in server.csr -CA root.crt -CAkey root.key -CAcreateserial -days 7 \
        -extfile server.ext -out server.crt
    rm -f root.key server.csr server.ext root.srl
) >/dev/null 2>&1
[ "${#run[@]}" = 0 ] || chown postgres "$dir/data/server.key" "$dir/data/server.crt" "$dir/data/root.crt"
chmod 600 "$dir/data/server.key"
hba="$dir/data/pg_hba.conf"
{ echo "hostssl all tls_only 127.0.0.1/32 trust"; echo "host all tls_only 127.0.0.1/32 reject"; cat "$hba"; } > "$hba.new"
mv "$hba.new" "$hba"
[ "${#run[@]}" = 0 ] || chown postgres "$hba"
for port in $(seq "${PGTEST_PORT:-55432}" $(( ${PGTEST_PORT:-55432} + 20 ))); do
    if "${run[@]}" "$bin/pg_ctl" -D "$dir/data" -l "$dir/server.log" -w -t 30 \
        -o "-c listen_addresses=127.0.0.1 -p $port -k $dir -c max_connections=100 -c ssl=on" start >/dev/null 2>&1; then
        echo "PostgreSQL for the tests: $dir (stop: ${run[*]} $bin/pg_ctl -D $dir/data stop)" >&2
        "${run[@]}" "$bin/psql" -q -h 127.0.0.1 -p "$port" -U packbench -d postgres \
            -c "CREATE ROLE tls_only LOGIN SUPERUSER" >/dev/null
        echo "postgres://packbench@127.0.0.1:$port/postgres"
        exit 0
    fi
done
tail -20 "$dir/server.log" >&2
echo "could not start PostgreSQL on any port from ${PGTEST_PORT:-55432}" >&2
exit 1
