#!/usr/bin/env bash
# Installs what the tests need (or the parts named as arguments), skipping
# what is already there: golangci-lint at a pinned version into bin/, and
# system packages. For packages, as root it uses apt-get; otherwise it says
# what to install.
set -euo pipefail

# The linter `make test` runs, pinned so that every machine reports the same
# findings; built from the Go module proxy (go.sum-checked by the checksum
# database) into the git-ignored bin/, with the Go toolchain that builds the
# project, so that it understands the module's Go version. Raise it here.
golangci_lint_version=v2.15.0
root=$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)

# Debian/Ubuntu packages the tests need, and golangci-lint. Add new packages
# here; a package without its own case in installed() counts as present when
# dpkg says it is.
packages=(golangci-lint postgresql prometheus chromium)
# Callers that need less (make dev) name their packages.
if (($#)); then
	packages=("$@")
fi

# Installs bin/golangci-lint unless it is already the pinned version built
# by the current Go toolchain.
install_golangci_lint() {
	local bin=$root/bin/golangci-lint want have
	want="has version ${golangci_lint_version#v} built with $(go env GOVERSION)"
	if [[ -x $bin ]] && have=$("$bin" version 2>/dev/null) && [[ $have == *"$want"* ]]; then
		return 0
	fi
	echo "setup-test-machine: installing golangci-lint $golangci_lint_version into bin/" >&2
	GOBIN=$root/bin go install "github.com/golangci/golangci-lint/v2/cmd/golangci-lint@$golangci_lint_version"
}

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
	if [[ $pkg == golangci-lint ]]; then
		install_golangci_lint
	elif ! installed "$pkg"; then
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
