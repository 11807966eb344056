#!/usr/bin/env bash
# Offline checks of the deployment files in this folder (no network, no container build):
#   1. Containerfile: every path it COPYs from the build context exists and is let through by
#      Containerfile.dockerignore; every path that file lets through exists; the package and
#      binary it builds exist; its Rust version is at least the workspace's rust-version.
#   2. The Containerfile's HEALTHCHECK command, run as written against the real `consensor serve`
#      (listening where CONSENSOR_LISTEN says, the database at an absolute sqlite:/// path as the
#      image's ENV has it): it must succeed while the server runs and fail once it has stopped.
#   2b. postgres-replicas.toml and consensor.example.toml load as configurations.
#   3. systemd units: `systemd-analyze verify` must print nothing, and
#      `systemd-analyze security --offline=true` must rate each service's exposure at most 2.0.
#   4. consensor.sysusers: `systemd-sysusers --dry-run` into a scratch root.
#   5. nginx-consensor.conf: `nginx -t` inside a scratch prefix with a self-signed certificate.
# Steps whose tool is missing are reported as SKIPPED, loudly; anything else that fails makes the
# script exit 1. Usage: deploy/check.sh (builds the debug binary with cargo, honouring
# CARGO_TARGET_DIR), or DEPLOY_CHECK_BINARY=/path/to/consensor deploy/check.sh.
set -euo pipefail

root=$(cd "$(dirname "$0")/.." && pwd)
deploy=$root/deploy
work=$(mktemp -d)
server_pid=
cleanup() {
    if [ -n "$server_pid" ]; then kill "$server_pid" 2>/dev/null || true; fi
    rm -rf "$work"
}
trap cleanup EXIT

failures=0
pass() { echo "ok       $*"; }
fail() { echo "FAIL     $*"; failures=$((failures + 1)); }
skip() { echo "SKIPPED  $* (this check did not run)"; }

binary=${DEPLOY_CHECK_BINARY:-}
if [ -z "$binary" ]; then
    (cd "$root" && cargo build -q -p consensor-server --bin consensor)
    binary=${CARGO_TARGET_DIR:-$root/target}/debug/consensor
fi
[ -x "$binary" ] || { echo "no consensor binary at $binary" >&2; exit 1; }

# 1. The Containerfile's paths, package, binary and Rust version (Python 3.11 or later, for tomllib).
if ! python3 -c 'import tomllib' 2> /dev/null; then
    skip "Containerfile and its HEALTHCHECK: python3 (3.11 or later) is not installed"
else
python3 - "$root" "$work/healthcheck" <<'EOF' && pass "Containerfile paths, package, binary and Rust version" || fail "Containerfile (see above)"
import json, os, re, sys, tomllib
root, healthcheck_out = sys.argv[1], sys.argv[2]
text = open(os.path.join(root, "deploy/Containerfile")).read()
lines = re.sub(r"\\\n", " ", text).splitlines()
instructions = [l.strip() for l in lines if l.strip() and not l.strip().startswith("#")]
allow = [l.strip()[1:] for l in open(os.path.join(root, "deploy/Containerfile.dockerignore"))
         if l.strip().startswith("!")]
problems = []
for path in allow:
    if not os.path.exists(os.path.join(root, path)):
        problems.append(f"Containerfile.dockerignore lets through {path!r}, which does not exist")
args = {}
for line in instructions:
    word, _, rest = line.partition(" ")
    if word == "ARG" and "=" in rest:
        name, value = rest.split("=", 1)
        args[name.strip()] = value.strip()
    if word == "COPY" and not rest.startswith("--from"):
        parts = rest.split()
        for source in parts[:-1]:
            if not os.path.exists(os.path.join(root, source)):
                problems.append(f"COPY {source}: no such path in the build context")
            if not any(source == a or source.startswith(a.rstrip("/") + "/") for a in allow):
                problems.append(f"COPY {source}: excluded by Containerfile.dockerignore")
    if word == "HEALTHCHECK":
        command = json.loads(line.split(" CMD ", 1)[1])
        with open(healthcheck_out, "w") as out:
            out.write("\n".join(command) + "\n")
build = re.search(r"cargo build .*-p (\S+) --bin (\S+)", text)
manifest = os.path.join(root, "crates", build.group(1), "Cargo.toml")
if not os.path.exists(manifest):
    problems.append(f"package {build.group(1)} not found at {manifest}")
else:
    bins = [b["name"] for b in tomllib.load(open(manifest, "rb")).get("bin", [])]
    if build.group(2) not in bins:
        problems.append(f"{manifest} has no [[bin]] named {build.group(2)}")
workspace = tomllib.load(open(os.path.join(root, "Cargo.toml"), "rb"))
needed = tuple(int(x) for x in workspace["workspace"]["package"]["rust-version"].split("."))
given = tuple(int(x) for x in args["RUST_VERSION"].split("."))
if given < needed[: len(given)]:
    problems.append(f"RUST_VERSION {args['RUST_VERSION']} is below rust-version {needed}")
if not os.path.exists(healthcheck_out):
    problems.append("no HEALTHCHECK in exec form")
for p in problems:
    print("  " + p)
sys.exit(1 if problems else 0)
EOF
fi

# 2. The HEALTHCHECK command against the real server.
if [ -s "$work/healthcheck" ]; then
    mapfile -t healthcheck < "$work/healthcheck"
    mkdir "$work/data"
    CONSENSOR_LISTEN=127.0.0.1:0 CONSENSOR_DATABASE_URL="sqlite://$work/data/consensor.db" \
        RUST_LOG=warn "$binary" serve > "$work/serve.out" 2> "$work/serve.err" &
    server_pid=$!
    address=
    for _ in $(seq 300); do
        address=$(sed -n 's#^listening on http://##p' "$work/serve.out" | head -n 1)
        [ -n "$address" ] && break
        sleep 0.1
    done
    if [ -z "$address" ]; then
        fail "consensor serve did not start: $(cat "$work/serve.err")"
    else
        if CONSENSOR_LISTEN=$address timeout 10 "${healthcheck[@]}"; then
            pass "HEALTHCHECK succeeds against the running server ($address)"
        else
            fail "HEALTHCHECK failed against the running server ($address)"
        fi
        kill -TERM "$server_pid"
        wait "$server_pid" || true
        server_pid=
        if CONSENSOR_LISTEN=$address timeout 10 "${healthcheck[@]}" 2> /dev/null; then
            fail "HEALTHCHECK still succeeds after the server stopped"
        else
            pass "HEALTHCHECK fails once the server has stopped"
        fi
    fi
fi

# 2b. The configuration files load: `consensor backup` reads the configuration exactly as
# `serve` does, validating every key, before it looks at the database (which it then refuses:
# PostgreSQL for the replica file; a file that does not exist in a scratch directory for the
# example, whose database_url is relative).
output=$(cd "$work" && env -u CONSENSOR_DATABASE_URL -u CONSENSOR_CONFIG \
    CONSENSOR_LISTEN=127.0.0.1:8081 CONSENSOR_WORKER__ID=host-a \
    "$binary" backup --config "$deploy/postgres-replicas.toml" --to "$work/unused.db" 2>&1) || true
if grep -q "is a PostgreSQL database" <<< "$output"; then
    pass "postgres-replicas.toml loads as a configuration (with the replica environment)"
else
    fail "postgres-replicas.toml: $output"
fi
output=$(cd "$work" && env -u CONSENSOR_DATABASE_URL -u CONSENSOR_CONFIG \
    "$binary" backup --config "$deploy/consensor.example.toml" --to "$work/unused.db" 2>&1) || true
if grep -q "consensor.db does not exist" <<< "$output"; then
    pass "consensor.example.toml loads as a configuration"
else
    fail "consensor.example.toml: $output"
fi

# 3. systemd units, with ExecStart pointed at the binary just built (verify checks that it exists).
if command -v systemd-analyze > /dev/null; then
    mkdir "$work/units"
    for unit in "$deploy"/*.service "$deploy"/*.timer; do
        sed "s#/usr/local/bin/consensor#$binary#g" "$unit" > "$work/units/$(basename "$unit")"
    done
    # A template is verified through an instance of it.
    cp "$work/units/consensor-replica@.service" "$work/units/consensor-replica@a.service"
    for unit in consensor.service consensor-backup.service consensor-backup.timer \
        consensor-replica@a.service; do
        output=$(cd "$work/units" && systemd-analyze verify "./$unit" 2>&1) || true
        if [ -z "$output" ]; then
            pass "systemd-analyze verify $unit"
        else
            fail "systemd-analyze verify $unit: $output"
        fi
    done
    for unit in consensor.service consensor-backup.service consensor-replica@a.service; do
        level=$(cd "$work/units" && systemd-analyze security --offline=true "./$unit" 2>&1 |
            sed -n 's/.*Overall exposure level for [^:]*: \([0-9.]*\).*/\1/p')
        if [ -n "$level" ] && awk -v l="$level" 'BEGIN { exit !(l <= 2.0) }'; then
            pass "systemd-analyze security $unit: exposure $level"
        else
            fail "systemd-analyze security $unit: exposure ${level:-unknown} (at most 2.0)"
        fi
    done
else
    skip "systemd units: systemd-analyze is not installed"
fi

# 4. The sysusers entry.
if command -v systemd-sysusers > /dev/null; then
    if output=$(systemd-sysusers --dry-run --root="$work/sysroot" "$deploy/consensor.sysusers" 2>&1) &&
        grep -q "Creating user 'consensor'" <<< "$output"; then
        pass "systemd-sysusers --dry-run consensor.sysusers"
    else
        fail "systemd-sysusers consensor.sysusers: $output"
    fi
else
    skip "consensor.sysusers: systemd-sysusers is not installed"
fi

# 5. The nginx example, with its certificate paths pointed at a scratch self-signed pair.
nginx=$(command -v nginx || echo /usr/sbin/nginx)
if [ -x "$nginx" ] && command -v openssl > /dev/null; then
    mkdir -p "$work/nginx/logs"
    openssl req -x509 -newkey rsa:2048 -nodes -days 1 -subj "/CN=consensor.example.org" \
        -keyout "$work/nginx/privkey.pem" -out "$work/nginx/fullchain.pem" 2> /dev/null
    sed "s#/etc/ssl/consensor/#$work/nginx/#g" "$deploy/nginx-consensor.conf" > "$work/nginx/site.conf"
    cat > "$work/nginx/nginx.conf" <<EOF
pid $work/nginx/nginx.pid;
error_log $work/nginx/logs/error.log;
events {}
http {
    access_log off;
    include $work/nginx/site.conf;
}
EOF
    if output=$("$nginx" -t -q -p "$work/nginx" -c "$work/nginx/nginx.conf" 2>&1); then
        pass "nginx -t nginx-consensor.conf"
    else
        fail "nginx -t nginx-consensor.conf: $output"
    fi
else
    skip "nginx-consensor.conf: nginx or openssl is not installed"
fi

if [ "$failures" -gt 0 ]; then
    echo "$failures check(s) failed"
    exit 1
fi
echo "all deployment checks passed"
