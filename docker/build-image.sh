#!/usr/bin/env bash
# Builds the befit image from docker/Dockerfile and the release binary built
# outside it (`make image` builds the binary first, then calls this).
#   IMAGE        the image's name (default localhost/befit:latest)
#   ORT_VERSION  the ONNX Runtime library version in .cache/onnxruntime/
#   BASE_IMAGE   the base image; default: debian:bookworm-slim with docker,
#                localhost/debian:bookworm-slim (made by base-image.sh from
#                Debian's archive when missing) with buildah
# With a docker daemon it uses docker; else buildah with chroot isolation,
# which builds (RUN steps included) where containers cannot be run.
set -euo pipefail
cd "$(dirname "$0")/.."

image="${IMAGE:-localhost/befit:latest}"
: "${ORT_VERSION:?set ORT_VERSION (make image does)}"
for f in target/release/befit ".cache/onnxruntime/libonnxruntime.so.${ORT_VERSION}"; do
    [[ -f "$f" ]] || { echo "build-image: $f is missing (make image builds it)" >&2; exit 1; }
done

if command -v docker > /dev/null && docker info > /dev/null 2>&1; then
    base="${BASE_IMAGE:-debian:bookworm-slim}"
    docker build -f docker/Dockerfile --build-arg "BASE=$base" \
        --build-arg "ORT_VERSION=$ORT_VERSION" -t "$image" .
else
    base="${BASE_IMAGE:-localhost/debian:bookworm-slim}"
    if [[ "$base" == localhost/* ]]; then
        docker/base-image.sh "$base"
    fi
    previous="$(podman image inspect --format '{{.Id}}' "$image" 2> /dev/null || true)"
    # docker format: OCI image configs have no HEALTHCHECK.
    buildah bud --isolation chroot --format docker --pull=never \
        -f docker/Dockerfile --build-arg "BASE=$base" \
        --build-arg "ORT_VERSION=$ORT_VERSION" -t "$image" .
    # The image this name pointed at before, now untagged: not kept.
    current="$(podman image inspect --format '{{.Id}}' "$image")"
    if [[ -n "$previous" && "$previous" != "$current" ]]; then
        podman rmi "$previous" > /dev/null 2>&1 || true
    fi
fi
echo "image: $image"
