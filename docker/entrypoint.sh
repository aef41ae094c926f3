#!/bin/sh
# Container entry point: `api`, `worker`, or any other grovekeeper command line.
set -eu

prestart() {
  # Creates or upgrades the schema (ours and Optuna's); safe to run from every container
  # at once, and waits for the database to accept connections.
  grovekeeper migrate --wait 60
}

case "${1:-api}" in
  api)
    shift || true
    prestart
    # Workers run in their own containers; --workers 0 keeps training out of the API.
    # Binding 0.0.0.0 needs an API key (see README, "Running it with Docker").
    exec grovekeeper serve --host 0.0.0.0 --port "${GROVEKEEPER_PORT}" --workers 0 "$@"
    ;;
  worker)
    shift || true
    prestart
    exec grovekeeper worker "$@"
    ;;
  *)
    exec grovekeeper "$@"
    ;;
esac
