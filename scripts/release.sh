#!/bin/sh
# Builds the release binaries and archives into $DIST, reproducibly: the
# same source, toolchain, VERSION, COMMIT and SOURCE_DATE_EPOCH give the
# same bytes. `make release` sets the variables from git; see
# docs/operations.md ("Releases").
set -eu

: "${VERSION:?VERSION is required (make release takes it from git describe --tags)}"
: "${COMMIT:?COMMIT is required (make release takes it from git rev-parse HEAD)}"
: "${SOURCE_DATE_EPOCH:?SOURCE_DATE_EPOCH is required (make release takes the commit time)}"
DIST=${DIST:-dist}
PLATFORMS=${PLATFORMS:-linux/amd64 linux/arm64}

case $VERSION$COMMIT in
*[!A-Za-z0-9._+-]*) echo "release: VERSION and COMMIT may hold only letters, digits and . _ + -" >&2; exit 1 ;;
esac

# Only the stamped values vary between builds: no cgo (no C toolchain in the
# output), no paths of this machine (-trimpath), no VCS stamp of its own
# (-buildvcs=false: the commit is stamped explicitly, and an image build has
# no .git), no symbol table or DWARF (-s -w).
export CGO_ENABLED=0 GOFLAGS=-buildvcs=false
ldflags="-s -w -X github.com/qtally/qtally/cmd/qtally/commands.version=$VERSION -X github.com/qtally/qtally/cmd/qtally/commands.commit=$COMMIT"

mkdir -p "$DIST"
DIST=$(cd "$DIST" && pwd)
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

for platform in $PLATFORMS; do
	goos=${platform%/*}
	goarch=${platform#*/}
	name=qtally-$VERSION-$goos-$goarch
	mkdir -p "$work/$name"
	GOOS=$goos GOARCH=$goarch go build -trimpath -ldflags="$ldflags" -o "$work/$name/qtally" ./cmd/qtally
	cp LICENSE README.md CHANGELOG.md "$work/$name/"
	cp "$work/$name/qtally" "$DIST/$name"
	# The archive's entries carry fixed times, owners and order, and gzip
	# leaves out the name and time, so the archive is as reproducible as
	# the binary.
	find "$work/$name" -exec touch -h -d "@$SOURCE_DATE_EPOCH" {} +
	tar --sort=name --mtime="@$SOURCE_DATE_EPOCH" --owner=0 --group=0 --numeric-owner \
		--mode='u+rw,go+r,go-w' -C "$work" -cf - "$name" | gzip -n -9 >"$DIST/$name.tar.gz"
done

cd "$DIST"
rm -f sha256sums
# shellcheck disable=SC2046 # names hold no spaces (VERSION is checked above)
sha256sum $(ls | grep -v '^sha256sums$' | LC_ALL=C sort) >sha256sums
cat sha256sums
