# sidetrend: the sidecar in a small image.
#
#   docker build -t sidetrend .
#   docker run --rm -e DATABASE_URL=postgres://user@host/db sidetrend run --http 0.0.0.0:9188
#
# The build stage runs scripts/docker-build-steps.sh, the same script
# `make`-less builds and the tests run, so the steps cannot drift apart.
# The runtime stage needs no network: the binary is static and embeds the
# migrations. It has no Postgres server, so `sidetrend run` needs a database
# (DATABASE_URL); see docker-compose.yml.

FROM golang:1.26 AS build
WORKDIR /src
# Dependencies first, so that a source change does not download them again.
COPY go.mod go.sum ./
RUN go mod download
COPY . .
ARG VERSION=devel
RUN VERSION="${VERSION}" bash scripts/docker-build-steps.sh /out

FROM debian:bookworm-slim
# ca-certificates for TLS connections to managed Postgres services.
RUN apt-get update \
 && apt-get install -y --no-install-recommends ca-certificates \
 && rm -rf /var/lib/apt/lists/* \
 && useradd --system --no-create-home --shell /usr/sbin/nologin sidetrend
COPY --from=build /out/sidetrend /usr/local/bin/sidetrend
USER sidetrend
# /metrics and /healthz when SIDETREND_HTTP is set (docker-compose.yml sets it).
EXPOSE 9188
ENTRYPOINT ["/usr/local/bin/sidetrend"]
CMD ["run"]
