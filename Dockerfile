# syntax=docker/dockerfile:1
#
# The live service's image: `deadspace serve` as a static binary on a
# distroless base, running as an unprivileged user, with its embedded store
# on a volume. Build with
#
#   docker build --build-arg VERSION=$(git describe --always --dirty) -t deadspace .
#
# The build stage runs on the builder's own platform and cross-compiles
# (GOOS/GOARCH from buildx's TARGETOS/TARGETARCH), since the binary has no cgo.

FROM --platform=$BUILDPLATFORM golang:1.26 AS build
WORKDIR /src
# No separate `go mod download` layer: it would fetch every module in go.mod,
# including the large test-only ones (the FHIR validator, Kubernetes and
# Prometheus types); `go build` fetches only what the binary imports, and the
# cache mounts keep that between builds.
COPY . .
ARG VERSION=dev
ARG TARGETOS
ARG TARGETARCH
RUN --mount=type=cache,target=/go/pkg/mod \
    --mount=type=cache,target=/root/.cache/go-build \
    VERSION="$VERSION" GOOS="$TARGETOS" GOARCH="$TARGETARCH" OUT=/out/deadspace bash .ci/build
# An empty, non-root-owned directory to copy in as the volume's mount point,
# so that a fresh anonymous or named volume starts owned by the service user.
RUN mkdir -p /out/data

# distroless/static carries CA certificates (for an https FHIR server),
# tzdata and a passwd entry for nonroot (65532), and no shell. Pin it by
# digest in a release pipeline.
FROM gcr.io/distroless/static-debian12:nonroot
COPY --from=build /out/deadspace /deadspace
COPY --from=build --chown=65532:65532 /out/data /var/lib/deadspace
# Inside a container the service must listen on every interface; the
# binary's own defaults (127.0.0.1) suit a developer's machine.
ENV DEADSPACE_LISTEN=0.0.0.0:8080 \
    DEADSPACE_GRPC_LISTEN=0.0.0.0:9090 \
    DEADSPACE_DATA_DIR=/var/lib/deadspace
USER 65532:65532
VOLUME /var/lib/deadspace
# 8080: webhook, /healthz, /readyz, /metrics. 9090: gRPC.
EXPOSE 8080 9090
# No HEALTHCHECK: the image has no shell or HTTP client to run one with;
# orchestrators probe /healthz and /readyz over HTTP (deploy/kubernetes).
ENTRYPOINT ["/deadspace", "serve"]
