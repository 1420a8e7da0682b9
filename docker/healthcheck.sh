#!/bin/bash
# The image's HEALTHCHECK: GET /healthz on the port befit listens on
# (BEFIT_LISTEN's port, else 7878 as /etc/befit/serve.toml sets it). bash's
# /dev/tcp does the HTTP, so the image needs no HTTP client.
port="${BEFIT_LISTEN##*:}"
port="${port:-7878}"
exec 3<>"/dev/tcp/127.0.0.1/${port}" || exit 1
printf 'GET /healthz HTTP/1.0\r\nHost: 127.0.0.1\r\n\r\n' >&3
read -r -t 5 status_line <&3 || exit 1
[[ "$status_line" == HTTP/1.?" 200 "* ]]
