package localpg

import (
	"errors"
	"fmt"
	"os"
	"os/exec"
	"os/user"
	"strconv"
	"syscall"
)

const (
	// serverUser is the account distribution packages run PostgreSQL as.
	serverUser = "postgres"
	// fallbackUser is created when serverUser does not exist.
	fallbackUser = "qtally-pg"
)

// account is the unprivileged user the server runs as when the caller is
// root, because initdb and postgres refuse to run as root.
type account struct {
	name     string
	uid, gid int
}

// serverAccount returns nil when the caller is not root: the server then
// runs as the caller.
func serverAccount() (*account, error) {
	if os.Geteuid() != 0 {
		return nil, nil
	}
	u, err := user.Lookup(serverUser)
	var unknown user.UnknownUserError
	if errors.As(err, &unknown) {
		u, err = ensureFallbackUser()
	}
	if err != nil {
		return nil, fmt.Errorf("look up the user to run PostgreSQL as: %w", err)
	}
	uid, err := strconv.Atoi(u.Uid)
	if err != nil {
		return nil, fmt.Errorf("user %s: uid %q: %w", u.Username, u.Uid, err)
	}
	gid, err := strconv.Atoi(u.Gid)
	if err != nil {
		return nil, fmt.Errorf("user %s: gid %q: %w", u.Username, u.Gid, err)
	}
	return &account{name: u.Username, uid: uid, gid: gid}, nil
}

func ensureFallbackUser() (*user.User, error) {
	out, addErr := exec.Command("useradd", "--system", "--user-group", "--no-create-home",
		"--shell", "/usr/sbin/nologin", fallbackUser).CombinedOutput()
	// Another test binary may have created it first; trust the lookup.
	u, err := user.Lookup(fallbackUser)
	if err != nil {
		if addErr != nil {
			return nil, fmt.Errorf("useradd %s: %w: %s", fallbackUser, addErr, out)
		}
		return nil, err
	}
	return u, nil
}

// credential is nil (run as the caller) for a nil account.
func (a *account) credential() *syscall.Credential {
	if a == nil {
		return nil
	}
	// An empty Groups drops root's supplementary groups.
	return &syscall.Credential{Uid: uint32(a.uid), Gid: uint32(a.gid), Groups: []uint32{}}
}

// own hands path to the account; without one the caller already owns it.
func (a *account) own(path string) error {
	if a == nil {
		return nil
	}
	if err := os.Lchown(path, a.uid, a.gid); err != nil {
		return fmt.Errorf("give %s to user %s: %w", path, a.name, err)
	}
	return nil
}
