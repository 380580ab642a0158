#!/bin/sh
# Install the environment file with a freshly generated secret key (run once, as root, at install).
# Usage: deploy/make-env.sh [/etc/trialhouse/trialhouse.env]
set -eu
target=${1:-/etc/trialhouse/trialhouse.env}
here=$(dirname "$0")
if [ -e "$target" ]; then
    echo "make-env: $target exists; leaving it (and its key) alone" >&2
    exit 0
fi
key=$(python3 -c 'import secrets; print(secrets.token_urlsafe(48))')
umask 077
mkdir -p "$(dirname "$target")"
sed "s|^TRIALHOUSE_SECRET_KEY=.*|TRIALHOUSE_SECRET_KEY=$key|" "$here/trialhouse.env.example" > "$target"
chmod 600 "$target"
echo "make-env: wrote $target with a new secret key"
