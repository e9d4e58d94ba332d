#!/usr/bin/env bash
# Checks docker-compose.yml and the Dockerfile without Docker: a Go test
# parses the compose file as YAML and checks the services, the healthcheck,
# depends_on and the demo profile, and checks the Dockerfile's stages. When
# Docker is installed, `docker compose config` checks the file as well.
set -euo pipefail
cd "$(dirname "$0")/.."
go test -count=1 -run 'TestComposeFile|TestDockerfile' ./cmd/sidetrend
if command -v docker >/dev/null 2>&1 && docker compose version >/dev/null 2>&1; then
  docker compose -f docker-compose.yml config --quiet
  echo "check-compose: docker compose config accepts docker-compose.yml"
fi
echo "check-compose: ok"
