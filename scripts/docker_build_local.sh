#!/usr/bin/env bash
# Build the streamguard image where no image registry can be reached. docker/Dockerfile starts FROM
# python:3.11-slim; this script makes a stand-in for it from a minimal Debian bookworm rootfs (debootstrap,
# from the Debian mirror apt already uses: bookworm's python3 is 3.11), imports it as streamguard-base:local,
# tags it python:3.11-slim in the local daemon, then builds docker/Dockerfile unchanged. If the daemon
# already holds a real python:3.11-slim (one this script did not make), that one is used and nothing is
# made. With a registry, plain `docker build -f docker/Dockerfile -t streamguard:local .` is all it takes.
#
# Needs root, a running Docker daemon, and debootstrap (apt-get install -y debootstrap). A daemon for a
# sandbox without a network bridge can be started with, for example:
#   dockerd --iptables=false --ip6tables=false --bridge=none --storage-driver=vfs >/tmp/dockerd.log 2>&1 &
# (hence --network=host for the build below: the RUN steps reach PyPI through the host's network).
#
# Environment:
#   IMAGE          tag of the built image                (default streamguard:local)
#   MIRROR         Debian mirror for debootstrap         (default: the first active Debian URI apt uses)
#   ROOTFS         where the rootfs is made               (default /var/tmp/streamguard-base-rootfs)
#   EXTRA_CA_DIR   CA certificates to add to the base     (default /usr/local/share/ca-certificates; empty: none)
#   REBUILD_BASE=1 make the stand-in base again even if it exists
set -euo pipefail
cd "$(dirname "$0")/.."

IMAGE=${IMAGE:-streamguard:local}
BASE=python:3.11-slim
LOCAL_BASE=streamguard-base:local
LABEL=org.streamguard.local-base
ROOTFS=${ROOTFS:-/var/tmp/streamguard-base-rootfs}
if [ -z "${MIRROR:-}" ]; then
  # Active lines only ("URIs: ..." in deb822 .sources, "deb URL ..." in .list), not the security archive.
  MIRROR=$(cat /etc/apt/sources.list /etc/apt/sources.list.d/*.sources /etc/apt/sources.list.d/*.list 2>/dev/null \
             | grep -E '^(URIs:|deb )' | grep -oE 'https?://[^ ]+/debian/?( |$)' | tr -d ' ' | head -n 1 || true)
  MIRROR=${MIRROR:-http://deb.debian.org/debian}
fi

if ! docker info >/dev/null 2>&1; then
  echo "docker_build_local: no Docker daemon answers (see the dockerd example at the top of this script)" >&2
  exit 1
fi

ours() { [ "$(docker image inspect "$1" --format "{{index .Config.Labels \"$LABEL\"}}" 2>/dev/null)" = 1 ]; }

if docker image inspect "$BASE" >/dev/null 2>&1 && ! ours "$BASE"; then
  echo "== using the daemon's own $BASE"
else
  if [ "${REBUILD_BASE:-0}" = 1 ] || ! ours "$LOCAL_BASE"; then
    command -v debootstrap >/dev/null || { echo "docker_build_local: apt-get install -y debootstrap" >&2; exit 1; }
    echo "== debootstrap bookworm from $MIRROR into $ROOTFS"
    rm -rf "$ROOTFS"
    # What the Dockerfile uses from python:3.11-slim: python (python-is-python3), venv, pip, CA certificates
    # (pip over HTTPS), groupadd/useradd (passwd, in minbase).
    debootstrap --variant=minbase \
      --include=python3,python3-venv,python3-pip,python-is-python3,ca-certificates \
      bookworm "$ROOTFS" "$MIRROR"
    # A sandbox whose HTTPS egress goes through an inspecting proxy trusts that proxy's CA in the host's
    # local store; without it pip in the build fails with CERTIFICATE_VERIFY_FAILED. Copy the host's local
    # CAs (public certificates) into the base. An image built this way is for local use, not for publishing.
    EXTRA_CA_DIR=${EXTRA_CA_DIR-/usr/local/share/ca-certificates}
    if [ -n "$EXTRA_CA_DIR" ] && compgen -G "$EXTRA_CA_DIR/*.crt" >/dev/null; then
      cp "$EXTRA_CA_DIR"/*.crt "$ROOTFS/usr/local/share/ca-certificates/"
      chroot "$ROOTFS" update-ca-certificates
    fi
    # Slim it: apt lists and caches, docs, man pages.
    rm -rf "$ROOTFS"/var/lib/apt/lists/* "$ROOTFS"/var/cache/apt/*.bin "$ROOTFS"/var/cache/apt/archives/*.deb \
           "$ROOTFS"/usr/share/doc/* "$ROOTFS"/usr/share/man/* "$ROOTFS"/usr/share/info/*
    echo "== import $LOCAL_BASE"
    tar -C "$ROOTFS" --numeric-owner -c . | docker import \
      --change 'ENV PATH=/usr/local/sbin:/usr/local/bin:/usr/sbin:/usr/bin:/sbin:/bin' \
      --change 'ENV LANG=C.UTF-8' \
      --change "LABEL $LABEL=1" \
      --change 'CMD ["python3"]' \
      - "$LOCAL_BASE"
    rm -rf "$ROOTFS"
  fi
  docker tag "$LOCAL_BASE" "$BASE"
  echo "== $BASE is the stand-in $LOCAL_BASE ($(docker image inspect "$BASE" --format '{{.Id}}'))"
fi

echo "== build $IMAGE"
# DOCKER_BUILDKIT=0: the classic builder is part of the daemon; BuildKit through a current CLI needs the
# buildx plugin, which a bare docker.io install lacks. The classic builder never pulls an image it has.
# The context is a tar of just what the Dockerfile copies: the classic builder reads .dockerignore only at
# the context root, and the repository root holds .venv (hundreds of MB) and .git.
tar -c --exclude=__pycache__ --exclude='*.pyc' pyproject.toml README.md streamguard replay_data docker \
  | DOCKER_BUILDKIT=${DOCKER_BUILDKIT:-0} docker build --network=host -f docker/Dockerfile -t "$IMAGE" -
docker image inspect "$IMAGE" --format "built $IMAGE {{.Id}}: {{.Size}} bytes, user={{.Config.User}}"
