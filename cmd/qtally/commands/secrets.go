package commands

import (
	"fmt"
	"net"
	"net/url"
	"os"
	"strings"

	"github.com/urfave/cli/v3"
)

// refuseSecretArguments refuses secrets on the command line, where process
// listings, shell histories and profiles show them: the token pepper, and
// a password inside --database-url. Both come from the environment or a
// file instead.
func refuseSecretArguments(args []string) error {
	for i, a := range args {
		name, value, hasValue := strings.Cut(strings.TrimLeft(a, "-"), "=")
		if !strings.HasPrefix(a, "-") || a == "--" {
			continue
		}
		switch name {
		case flagTokenPepper:
			return fmt.Errorf("--%s on the command line shows the secret in process listings: set QTALLY_TOKEN_PEPPER, or name a file with --%s",
				flagTokenPepper, flagTokenPepperFile)
		case flagDatabaseURL:
			if !hasValue && i+1 < len(args) {
				value = args[i+1]
			}
			if databaseURLHasPassword(value) {
				return fmt.Errorf("--%s holds a password, which process listings show: set DATABASE_URL in the environment, "+
					"or keep the password in a file named by PGPASSFILE or passfile=... in the URL", flagDatabaseURL)
			}
		}
	}
	return nil
}

func databaseURLHasPassword(dsn string) bool {
	if u, err := url.Parse(dsn); err == nil && (u.Scheme == "postgres" || u.Scheme == "postgresql") {
		_, has := u.User.Password()
		return has || u.Query().Has("password")
	}
	return strings.Contains(dsn, "password=")
}

// placeholderSecrets are values that deployment examples and habit put
// where a secret belongs; anyone can guess them.
var placeholderSecrets = []string{"change-me", "changeme", "change_me", "replace-me", "replaceme", "your-secret",
	"secret", "pepper", "password", "qtally", "test", "example", "default", "xxx"}

// readPepper reads the token pepper from QTALLY_TOKEN_PEPPER or the file
// --token-pepper-file names, and refuses an empty or placeholder one: with
// a guessable pepper a copy of the database is enough to test guesses.
func readPepper(cmd *cli.Command) (string, error) {
	pepper, file := cmd.String(flagTokenPepper), cmd.String(flagTokenPepperFile)
	if pepper != "" && file != "" {
		return "", fmt.Errorf("both QTALLY_TOKEN_PEPPER and --%s are set; keep one", flagTokenPepperFile)
	}
	if file != "" {
		data, err := os.ReadFile(file)
		if err != nil {
			return "", fmt.Errorf("read the token pepper: %w", err)
		}
		pepper = string(data)
	}
	pepper = strings.TrimSpace(pepper)
	if pepper == "" {
		return "", fmt.Errorf("tokens need a pepper: set QTALLY_TOKEN_PEPPER or --%s to a long random secret (openssl rand -hex 32), "+
			"the same for every process and token command; for local development only, serve --no-auth on a loopback address", flagTokenPepperFile)
	}
	lower := strings.ToLower(pepper)
	for _, p := range placeholderSecrets {
		if lower == p || (len(p) > 6 && strings.Contains(lower, p)) {
			return "", fmt.Errorf("the token pepper is a placeholder (%q); set a long random secret (openssl rand -hex 32)", p)
		}
	}
	return pepper, nil
}

// requireLoopback refuses to serve without tokens anywhere but on a
// loopback address: there any client may read and change every policy.
func requireLoopback(listen string) error {
	host, _, err := net.SplitHostPort(listen)
	if err != nil {
		return fmt.Errorf("listen address %q: %w", listen, err)
	}
	if host == "localhost" {
		return nil
	}
	if ip := net.ParseIP(host); ip != nil && ip.IsLoopback() {
		return nil
	}
	return fmt.Errorf("without authentication qtally listens only on a loopback address (127.0.0.1:8080, [::1]:8080), not %q: "+
		"any client there could read and change every policy; create tokens and drop --%s to serve others", listen, flagNoAuth)
}
