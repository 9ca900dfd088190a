#!/usr/bin/env bash
# Install or upgrade watcher as a hardened systemd service; or remove it, keeping the data.
#
#   sudo bash deploy/install.sh               install, or upgrade in place (safe to re-run)
#   sudo bash deploy/install.sh --uninstall   stop and remove the unit and the program;
#                                             /var/lib/watcher (database, reports) and
#                                             /etc/watcher (configuration, credentials) stay
#   bash deploy/install.sh --root DIR         the same into DIR, without systemctl (for tests)
#
# Layout: /opt/watcher/venv (the program), /opt/watcher/docs, /etc/watcher/watcher.toml
# (0644: no secrets in it), /etc/watcher/credentials/ (0700, secrets 0600, read by systemd's LoadCredential=),
# /etc/systemd/system/watcher.service. The service runs as a dynamic user with its state in
# /var/lib/watcher (StateDirectory=).
set -euo pipefail
SRC="$(cd "$(dirname "$0")/.." && pwd)"
ROOT=""
ACTION=install
while [ $# -gt 0 ]; do
  case "$1" in
    --root) ROOT="$2"; shift 2 ;;
    --uninstall) ACTION=uninstall; shift ;;
    *) echo "install.sh: unknown option $1 (see the header of this file)" >&2; exit 2 ;;
  esac
done
OPT="$ROOT/opt/watcher"
ETC="$ROOT/etc/watcher"
UNIT="$ROOT/etc/systemd/system/watcher.service"
systemd() { if [ -z "$ROOT" ]; then systemctl "$@"; else echo "install.sh: (skipped) systemctl $*"; fi; }

if [ "$ACTION" = uninstall ]; then
  systemd disable --now watcher.service || true
  rm -f "$UNIT"
  rm -rf "$OPT"
  systemd daemon-reload
  echo "install.sh: watcher removed; kept ${ROOT}/var/lib/watcher (data) and $ETC (configuration)"
  exit 0
fi

if [ -z "$ROOT" ] && [ "$(id -u)" != 0 ]; then
  echo "install.sh: run as root (or with --root DIR for a trial install)" >&2
  exit 2
fi
PY="${PYTHON:-python3}"
"$PY" -c 'import sys; sys.exit(sys.version_info < (3, 11))' || { echo "install.sh: needs Python 3.11 or newer" >&2; exit 2; }

mkdir -p "$OPT"
if [ ! -x "$OPT/venv/bin/python" ]; then
  "$PY" -m venv "$OPT/venv"
fi
# shellcheck disable=SC2086  # INSTALL_PIP_ARGS is a list of options (the tests pass --no-deps)
"$OPT/venv/bin/python" -m pip install --quiet --upgrade ${INSTALL_PIP_ARGS:-} "$SRC"
rm -rf "$OPT/docs" && cp -r "$SRC/docs" "$OPT/docs"

install -d -m 0755 "$ETC"
install -d -m 0700 "$ETC/credentials"
# 0644: the unit's DynamicUser is neither root nor in root's group, so a 0640 root:root file is
# unreadable to it. The file holds no secrets (they are credentials, below).
if [ ! -e "$ETC/watcher.toml" ]; then
  install -m 0644 "$SRC/config.example.toml" "$ETC/watcher.toml"
  echo "install.sh: wrote $ETC/watcher.toml from the example: edit it, then \`watcher check-config\` it"
else
  chmod 0644 "$ETC/watcher.toml"
  echo "install.sh: kept your $ETC/watcher.toml"
fi
if [ ! -e "$ETC/credentials/broker-password" ]; then
  install -m 0600 /dev/null "$ETC/credentials/broker-password"
  echo "install.sh: created an empty $ETC/credentials/broker-password (0600): put the password in it"
fi
# Notification URLs: one file per channel in credentials/notify/ (the unit loads the whole
# directory). Files of the older layout (credentials/notify-<name>) move in, keeping their
# names, so the url_credential lines that name them still work.
if [ ! -d "$ETC/credentials/notify" ]; then
  install -d -m 0700 "$ETC/credentials/notify"
  moved=0
  for old in "$ETC"/credentials/notify-*; do
    [ -f "$old" ] || continue
    mv "$old" "$ETC/credentials/notify/"
    moved=1
  done
  if [ "$moved" = 1 ]; then
    echo "install.sh: moved the notification credentials into $ETC/credentials/notify/ (same names)"
  else
    for name in qa-mail night-chat; do
      install -m 0600 /dev/null "$ETC/credentials/notify/$name"
    done
    echo "install.sh: created empty $ETC/credentials/notify/{qa-mail,night-chat} (0600): one channel URL each;" \
      "add a file per further channel and name it in watcher.toml (url_credential)"
  fi
fi
install -d -m 0755 "$(dirname "$UNIT")"
install -m 0644 "$SRC/deploy/watcher.service" "$UNIT"
systemd daemon-reload
if [ -z "$ROOT" ] && systemctl is-active --quiet watcher.service; then
  systemctl restart watcher.service
  echo "install.sh: upgraded and restarted"
else
  systemd enable watcher.service
  echo "install.sh: installed; start it with: systemctl start watcher (after editing the configuration)"
fi
