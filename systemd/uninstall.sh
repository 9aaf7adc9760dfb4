#!/usr/bin/env bash
# Remove the skidvib service and its venv. The config (/etc/skidvib) and the
# state (/var/lib/skidvib: baseline, snapshots, trend) are kept unless --purge.
#
#   sudo systemd/uninstall.sh            # keep config and state
#   sudo systemd/uninstall.sh --purge    # remove them too
#
# Options:
#   --prefix DIR     where the venv was installed (default /opt/skidvib)
#   --root DIR       uninstall below DIR instead of / (tests, image staging)
#   --purge          also remove /etc/skidvib and the state directory
#   --no-systemctl   do not run systemctl at all
set -euo pipefail

prefix=/opt/skidvib
root=
purge=0
use_systemctl=1

die() { echo "uninstall.sh: $*" >&2; exit 1; }
say() { echo "uninstall.sh: $*"; }

while [ $# -gt 0 ]; do
  case "$1" in
    --prefix) [ $# -ge 2 ] || die "--prefix needs a directory"; prefix=$2; shift 2 ;;
    --root) [ $# -ge 2 ] || die "--root needs a directory"; root=$2; shift 2 ;;
    --purge) purge=1; shift ;;
    --no-systemctl) use_systemctl=0; shift ;;
    -h|--help) sed -n '2,/^set -euo/p' "$0" | sed '$d; s/^# \{0,1\}//'; exit 0 ;;
    *) die "unknown option '$1' (see --help)" ;;
  esac
done

case "$prefix" in /*) ;; *) die "--prefix must be an absolute path, got '$prefix'" ;; esac
prefix=${prefix%/}
[ "$prefix" = "" ] && die "refusing to remove the root directory"
if [ -n "$root" ]; then
  [ -d "$root" ] || die "--root '$root' is not a directory"
  root=$(cd "$root" && pwd)
  [ "$root" = / ] && root=
fi

unit="$root/etc/systemd/system/skidvib.service"
live=0
if [ "$use_systemctl" = 1 ] && command -v systemctl >/dev/null; then
  if [ -n "$root" ]; then
    [ -e "$unit" ] && systemctl --root="$root" --quiet disable skidvib.service || true
  elif [ -d /run/systemd/system ]; then
    live=1
    systemctl --quiet disable --now skidvib.service 2>/dev/null || true
  fi
fi

if [ -e "$unit" ]; then
  rm -f "$unit"
  say "removed $unit"
fi
[ "$live" = 1 ] && systemctl daemon-reload && systemctl reset-failed skidvib.service 2>/dev/null || true

if [ -d "$root$prefix/venv" ]; then
  rm -rf "$root$prefix/venv"
  say "removed $root$prefix/venv"
fi
rmdir "$root$prefix" 2>/dev/null || true

if [ "$purge" = 1 ]; then
  # With DynamicUser= the state lives in /var/lib/private/skidvib and
  # /var/lib/skidvib is a symbolic link to it.
  for path in "$root/etc/skidvib" "$root/var/lib/skidvib" "$root/var/lib/private/skidvib"; do
    if [ -e "$path" ] || [ -L "$path" ]; then
      rm -rf "$path"
      say "purged $path"
    fi
  done
else
  say "kept config $root/etc/skidvib and state $root/var/lib/skidvib (use --purge to remove them)"
fi
