package commands

// version and commit are stamped at build time (-ldflags "-X github.com/qtally/qtally/cmd/qtally/commands.version=...
// -X github.com/qtally/qtally/cmd/qtally/commands.commit=..."): `make release` takes them from `git describe --tags`
// and the commit, and deploy/Dockerfile from its VERSION and COMMIT build
// arguments. A plain `go build` leaves these defaults.
var (
	version = "dev"
	commit  = "unknown"
)

// versionLine is what `qtally --version` prints after the program's name.
func versionLine() string {
	return version + " (commit " + commit + ")"
}
