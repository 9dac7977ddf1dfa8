#!/bin/bash
# Container health probe: exits 0 when GET /healthz on the sidecar's metrics
# port answers 200. It uses bash's /dev/tcp so the runtime image needs no
# HTTP client (curl would add about a dozen shared libraries to the image
# for one request). The port is taken from APPORTION_METRICS__LISTEN when set.
set -euo pipefail

listen="${APPORTION_METRICS__LISTEN:-127.0.0.1:9464}"
port="${listen##*:}"

exec 3<>"/dev/tcp/127.0.0.1/${port}"
printf 'GET /healthz HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n' >&3
IFS= read -r -t 2 status_line <&3
exec 3>&-

case "${status_line}" in
  "HTTP/1."?" 200"*) exit 0 ;;
  *) echo "healthz answered: ${status_line%$'\r'}" >&2; exit 1 ;;
esac
