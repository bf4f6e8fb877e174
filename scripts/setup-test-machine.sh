#!/usr/bin/env bash
# Installs the system packages the tests need (or those named as arguments),
# skipping what is already there.
# As root it uses apt-get; otherwise it says what to install.
set -euo pipefail

# Debian/Ubuntu packages the tests need. Add new ones here; a package without
# its own case in installed() counts as present when dpkg says it is.
packages=(postgresql prometheus chromium)
# Callers that need less (make dev) name their packages.
if (($#)); then
	packages=("$@")
fi

# The same search storage/localpg.FindBinaries does: initdb and postgres on
# PATH (symlinks resolved), else a Debian-style install.
have_postgresql() {
	local initdb dir
	if initdb=$(command -v initdb); then
		dir=$(dirname "$(readlink -f "$initdb")")
		if [[ -x $dir/initdb && -x $dir/postgres ]]; then
			return 0
		fi
	fi
	for dir in /usr/lib/postgresql/*/bin; do
		if [[ -x $dir/initdb && -x $dir/postgres ]]; then
			return 0
		fi
	done
	return 1
}

installed() {
	case $1 in
	postgresql) have_postgresql ;;
	*) dpkg-query -W -f='${Status}' "$1" 2>/dev/null | grep -q 'install ok installed' ;;
	esac
}

missing=()
for pkg in "${packages[@]}"; do
	if ! installed "$pkg"; then
		missing+=("$pkg")
	fi
done
if ((${#missing[@]} == 0)); then
	exit 0
fi

if [[ $(id -u) -ne 0 ]]; then
	echo "setup-test-machine: missing ${missing[*]}; install with: sudo apt-get install ${missing[*]}" >&2
	exit 1
fi
if ! command -v apt-get >/dev/null; then
	echo "setup-test-machine: missing ${missing[*]}, and there is no apt-get to install them with" >&2
	exit 1
fi
echo "setup-test-machine: installing ${missing[*]}" >&2
export DEBIAN_FRONTEND=noninteractive
apt-get update
apt-get install -y --no-install-recommends "${missing[@]}"
