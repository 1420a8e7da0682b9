#!/usr/bin/env bash
# Makes the base image docker/Dockerfile starts from when no image registry is
# reachable: a minimal Debian bookworm from Debian's own archive (debootstrap),
# imported under the name the Dockerfile's default BASE names.
# Usage: docker/base-image.sh [IMAGE]   (default localhost/debian:bookworm-slim)
# Does nothing when the image is already in local storage.
set -euo pipefail

image="${1:-localhost/debian:bookworm-slim}"
mirror="${DEBIAN_MIRROR:-http://deb.debian.org/debian}"

if podman image exists "$image"; then
    echo "base image $image: already present"
    exit 0
fi
root="$(mktemp -d /tmp/befit-base.XXXXXX)"
trap 'rm -rf "$root"' EXIT
echo "base image $image: debootstrap --variant=minbase bookworm from $mirror"
debootstrap --variant=minbase bookworm "$root" "$mirror" > "$root.log" 2>&1 || {
    tail -20 "$root.log" >&2
    exit 1
}
rm -f "$root.log"
# What a slim image leaves out: package lists and caches, documentation,
# manual pages and translations (dpkg keeps the copyright files).
rm -rf "$root"/var/lib/apt/lists/* "$root"/var/cache/apt/*.bin "$root"/var/cache/apt/archives/*.deb \
    "$root"/usr/share/man/* "$root"/usr/share/info/* "$root"/usr/share/locale/*
find "$root"/usr/share/doc -type f ! -name copyright -delete
tar -C "$root" -c . | podman import --change 'CMD ["/bin/bash"]' - "$image" > /dev/null
echo "base image $image: imported"
