#!/bin/sh
# Entrypoint of the shiftsieve image.
#   run [FLAGS...]    `shiftsieve config check "$CONFIG"`, then exec `shiftsieve run --config "$CONFIG" FLAGS...`
#   anything else     exec `shiftsieve ARGS...` (produce, demo, replay, config check ...)
# CONFIG is the mounted TOML file (default /etc/shiftsieve/shiftsieve.toml); set CONFIG= (empty)
# to configure by environment variables alone. A bad configuration stops here with a one-line
# `shiftsieve: error: ...` and exit status 2, before anything connects.
set -eu

if [ "${1:-run}" != run ]; then
    exec shiftsieve "$@"
fi
if [ "$#" -gt 0 ]; then shift; fi

if [ -n "${CONFIG:-}" ]; then
    # Prints the effective values with their sources (secrets masked) into the log.
    shiftsieve config check "$CONFIG"
    exec shiftsieve run --config "$CONFIG" "$@"
fi
shiftsieve config check
exec shiftsieve run "$@"
