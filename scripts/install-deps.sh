#!/usr/bin/env bash
# Installs what heed's build and tests need on Debian/Ubuntu, when it is missing:
# libhdf5-dev and pkg-config (HDF5 through cgo; make build links its static
# archives and those of libaec-dev and zlib1g-dev, which libhdf5-dev pulls in
# but which are named here because heed links them itself), tmux (end-to-end TUI tests),
# openssh-client (tests of `heed share`), and Debian's python3 with numpy, h5py,
# scipy, torch and matplotlib (the reference libraries the tests compare against).
# `install-deps.sh slurm` adds slurm-wlm and munge (make slurm-test: a one-node
# Slurm cluster, scripts/slurm-local.sh).
# As root (or with passwordless sudo) it installs them with apt-get; otherwise
# it lists what is missing and exits 1.
set -euo pipefail

need=()
extra=()
case ${1:-} in
"") ;;
slurm) extra=(slurm-wlm munge) ;;
*) echo "usage: $0 [slurm]" >&2; exit 2 ;;
esac
have_pkg() { dpkg-query -W -f='${Status}' "$1" 2>/dev/null | grep -q "install ok installed"; }
for p in libhdf5-dev libaec-dev zlib1g-dev pkg-config tmux openssh-client python3-numpy python3-h5py python3-scipy python3-torch python3-matplotlib python3-pil ${extra[@]+"${extra[@]}"}; do
  have_pkg "$p" || need+=("$p")
done
if ! command -v go >/dev/null 2>&1; then
  echo "install-deps: Go 1.26.8 or later is needed (https://go.dev/dl/), then run this again" >&2
  exit 1
fi
if [ ${#need[@]} -eq 0 ]; then
  exit 0
fi
if ! command -v apt-get >/dev/null 2>&1; then
  echo "install-deps: missing packages (${need[*]}) and no apt-get here; install HDF5, pkg-config, tmux, openssh and python3 with numpy h5py scipy torch by hand (see README)" >&2
  exit 1
fi
SUDO=""
if [ "$(id -u)" -ne 0 ]; then
  if sudo -n true 2>/dev/null; then SUDO="sudo -n"; else
    echo "install-deps: missing Debian packages; run as root or install them:" >&2
    echo "  sudo apt-get install -y ${need[*]}" >&2
    exit 1
  fi
fi
echo "install-deps: installing ${need[*]}" >&2
export DEBIAN_FRONTEND=noninteractive
$SUDO apt-get update -qq
$SUDO apt-get install -y -qq --no-install-recommends "${need[@]}" >/dev/null
