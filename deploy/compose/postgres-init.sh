#!/usr/bin/env bash
# One login role and one database per keystrata node of deploy/compose.yaml.
#
# The postgres image runs the scripts in /docker-entrypoint-initdb.d once, when its
# data volume is first initialised, as the database superuser over the Unix socket.
# Each role gets the SCRAM-SHA-256 verifier that make_secrets.py wrote to the
# node-roles secret (lines "ROLE VERIFIER"; RFC 5802 section 3, RFC 7677), never the
# password itself: a verifier lets the server check a login but cannot be used to log
# in, and no password appears in a statement the server might log.
#
# A role may connect only to its own database and owns it; nothing is granted to
# PUBLIC. The node creates its tables with `keystrata node init` / `keystrata db upgrade`.
#
# No `set -u`: the image may source this file instead of running it (when it is not
# executable), and its own entrypoint must keep working afterwards.
set -eo pipefail

# The nodes' database roles: the node ID with "-" written as "_". Their databases are
# keystrata_<role>; the [database] url of each deploy/compose/<node>.toml names them.
KEYSTRATA_NODE_ROLES="relay_vela karsvik tollmere brenhaven"

keystrata_create_node_db() {
    local role="$1" roles_file="${KEYSTRATA_ROLES_FILE:-/run/secrets/node-roles}"
    local db="keystrata_$1" verifier
    verifier="$(awk -v r="$role" '$1 == r { print $2; exit }' "$roles_file")"
    case "$verifier" in
        'SCRAM-SHA-256$'*) ;;
        *)
            echo "keystrata: no SCRAM-SHA-256 verifier for role $role in $roles_file" >&2
            return 1
            ;;
    esac
    psql -v ON_ERROR_STOP=1 --no-psqlrc --quiet \
        --username "${POSTGRES_USER:-postgres}" --dbname "${POSTGRES_DB:-postgres}" \
        -v role="$role" -v db="$db" -v verifier="$verifier" <<'SQL'
CREATE ROLE :"role" LOGIN PASSWORD :'verifier'
    NOSUPERUSER NOCREATEDB NOCREATEROLE NOREPLICATION NOBYPASSRLS CONNECTION LIMIT 64;
CREATE DATABASE :"db" OWNER :"role";
REVOKE ALL ON DATABASE :"db" FROM PUBLIC;
SQL
    psql -v ON_ERROR_STOP=1 --no-psqlrc --quiet \
        --username "${POSTGRES_USER:-postgres}" --dbname "$db" -v role="$role" <<'SQL'
REVOKE ALL ON SCHEMA public FROM PUBLIC;
ALTER SCHEMA public OWNER TO :"role";
SQL
    echo "keystrata: created role $role and database $db"
}

for keystrata_role in $KEYSTRATA_NODE_ROLES; do
    keystrata_create_node_db "$keystrata_role"
done
