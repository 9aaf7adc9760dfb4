#!/usr/bin/env bash
# Install skidvib as a systemd service from this checkout. Safe to run again:
# it upgrades the package and the unit, and never overwrites an existing config.
#
#   sudo systemd/install.sh                  # venv in /opt/skidvib, unit, config, enable
#   systemd/install.sh --root /tmp/img --no-venv   # lay the files into a staging root
#
# Options:
#   --prefix DIR       where the venv goes (default /opt/skidvib); the unit's
#                      ExecStart is rewritten to match
#   --root DIR         install below DIR instead of / (tests, image staging);
#                      systemd is then told nothing except `systemctl --root=DIR enable`
#   --python PY        interpreter that creates the venv (default python3)
#   --system-site-packages
#                      let the venv see the system's packages (e.g. Debian's
#                      python3-numpy and python3-scipy instead of PyPI builds)
#   --pip-args "ARGS"  extra arguments for `pip install` (e.g. "--no-index
#                      --find-links /media/usb/wheels" on a box without internet)
#   --no-venv          do not create the venv nor install the package
#   --config FILE      the config to install if none exists (default:
#                      config/template.toml of this checkout, with its
#                      [store] state_dir set to /var/lib/skidvib)
#   --no-systemctl     do not run systemctl at all
#   --start            also (re)start the service after enabling it
set -euo pipefail

prefix=/opt/skidvib
root=
python=python3
site_packages=
pip_args=
make_venv=1
config_src=
use_systemctl=1
start=0

die() { echo "install.sh: $*" >&2; exit 1; }
say() { echo "install.sh: $*"; }

while [ $# -gt 0 ]; do
  case "$1" in
    --prefix) [ $# -ge 2 ] || die "--prefix needs a directory"; prefix=$2; shift 2 ;;
    --root) [ $# -ge 2 ] || die "--root needs a directory"; root=$2; shift 2 ;;
    --python) [ $# -ge 2 ] || die "--python needs an interpreter"; python=$2; shift 2 ;;
    --system-site-packages) site_packages=--system-site-packages; shift ;;
    --pip-args) [ $# -ge 2 ] || die "--pip-args needs a string"; pip_args=$2; shift 2 ;;
    --no-venv) make_venv=0; shift ;;
    --config) [ $# -ge 2 ] || die "--config needs a file"; config_src=$2; shift 2 ;;
    --no-systemctl) use_systemctl=0; shift ;;
    --start) start=1; shift ;;
    -h|--help) sed -n '2,/^set -euo/p' "$0" | sed '$d; s/^# \{0,1\}//'; exit 0 ;;
    *) die "unknown option '$1' (see --help)" ;;
  esac
done

case "$prefix" in /*) ;; *) die "--prefix must be an absolute path, got '$prefix'" ;; esac
prefix=${prefix%/}
if [ -n "$root" ]; then
  mkdir -p "$root"
  root=$(cd "$root" && pwd)
  [ "$root" = / ] && root=
fi

checkout=$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)
[ -f "$checkout/pyproject.toml" ] && [ -f "$checkout/systemd/skidvib.service" ] ||
  die "run me from a skidvib checkout (no pyproject.toml / systemd/skidvib.service near $0)"

if [ -z "$config_src" ]; then
  if [ -f "$checkout/config/template.toml" ]; then config_src="$checkout/config/template.toml"; fi
elif [ ! -f "$config_src" ]; then
  die "config '$config_src' does not exist"
fi

# 1. The package, in its own venv.
venv="$root$prefix/venv"
if [ "$make_venv" = 1 ]; then
  command -v "$python" >/dev/null || die "interpreter '$python' not found (use --python)"
  if [ ! -x "$venv/bin/python" ]; then
    say "creating venv $venv"
    mkdir -p "$(dirname "$venv")"
    "$python" -m venv $site_packages "$venv"
  else
    say "venv $venv exists, reusing it"
  fi
  say "installing the package from $checkout"
  # shellcheck disable=SC2086  # pip_args is a list of words on purpose
  "$venv/bin/python" -m pip install --quiet --disable-pip-version-check --upgrade $pip_args "$checkout"
  [ -x "$venv/bin/skidvib" ] || die "the venv has no skidvib command after pip install"
else
  say "--no-venv: leaving $venv alone"
fi

# 2. The unit (ours: overwritten on every install; local changes belong in a drop-in).
unit_dir="$root/etc/systemd/system"
mkdir -p "$unit_dir"
tmp_unit=$(mktemp)
tmp_conf=$(mktemp)
trap 'rm -f "$tmp_unit" "$tmp_conf"' EXIT
sed "s#/opt/skidvib/#$prefix/#g" "$checkout/systemd/skidvib.service" >"$tmp_unit"
if cmp -s "$tmp_unit" "$unit_dir/skidvib.service"; then
  say "unit $unit_dir/skidvib.service is up to date"
else
  install -m 0644 "$tmp_unit" "$unit_dir/skidvib.service"
  say "installed unit $unit_dir/skidvib.service"
fi

# 3. The config: never overwritten.
conf_dir="$root/etc/skidvib"
mkdir -p "$conf_dir"
if [ -e "$conf_dir/skidvib.toml" ]; then
  say "kept existing config $conf_dir/skidvib.toml"
elif [ -n "$config_src" ]; then
  # The service may write only its StateDirectory= (/var/lib/skidvib).
  sed 's#^state_dir = "[^"]*"#state_dir = "/var/lib/skidvib"#' "$config_src" >"$tmp_conf"
  install -m 0644 "$tmp_conf" "$conf_dir/skidvib.toml"
  say "installed config $conf_dir/skidvib.toml from $config_src: edit it for this machine"
else
  say "WARNING: no config installed (no example in $checkout/config, no --config); write $conf_dir/skidvib.toml"
fi

if [ -x "$venv/bin/skidvib" ] && [ -f "$conf_dir/skidvib.toml" ]; then
  if "$venv/bin/skidvib" check-config "$conf_dir/skidvib.toml" >"$tmp_conf" 2>&1; then
    say "config $conf_dir/skidvib.toml is valid"
  else
    say "WARNING: config $conf_dir/skidvib.toml is not valid yet; fix it before starting:"
    sed 's/^/    /' "$tmp_conf"
  fi
fi

# 4. Tell systemd.
if [ "$use_systemctl" = 0 ]; then
  say "--no-systemctl: not enabling the service"
elif ! command -v systemctl >/dev/null; then
  say "systemctl not found: not enabling the service"
elif [ -n "$root" ]; then
  systemctl --root="$root" --quiet enable skidvib.service
  say "enabled skidvib.service in $root"
elif [ -d /run/systemd/system ]; then
  systemctl daemon-reload
  systemctl --quiet enable skidvib.service
  say "enabled skidvib.service"
  if [ "$start" = 1 ]; then
    systemctl restart skidvib.service
    say "started skidvib.service (see: systemctl status skidvib; journalctl -u skidvib)"
  elif systemctl --quiet is-active skidvib.service; then
    say "skidvib.service is running the previous version: systemctl restart skidvib"
  else
    say "start it with: systemctl start skidvib"
  fi
else
  say "systemd is not running here: not enabling the service"
fi
