package commands

import (
	"context"
	"io"
	"strings"
	"testing"
)

// Every problem of every component's configuration is reported in one run,
// before anything is started: an operator fixes them all at once.
func TestConfigurationProblemsAreReportedTogether(t *testing.T) {
	t.Parallel()
	env := map[string]string{
		"DATABASE_URL":        "postgres://127.0.0.1:1/unreachable",
		"QTALLY_TOKEN_PEPPER": "a-pepper-long-enough-for-the-check-0123456789",
	}
	err := Run(context.Background(), []string{"qtally", "serve",
		"--poll-interval", "0s", // worker and API
		"--db-max-conns", "0", // storage
		"--max-body-bytes", "10", // API
		"--prune-batch", "0", // worker
		"--shutdown-grace", "0s", // process
		"--token-refresh", "0s", // tokens
	}, func(k string) string { return env[k] }, strings.NewReader(""), io.Discard, io.Discard)
	if err == nil {
		t.Fatal("serve started with six bad settings")
	}
	for _, want := range []string{"--poll-interval must be positive", "--db-max-conns must be at least 1", "--max-body-bytes must be at least 1024",
		"--prune-batch must be at least 1", "--shutdown-grace must be positive", "--token-refresh must be positive"} {
		if n := strings.Count(err.Error(), want); n != 1 {
			t.Errorf("the error says %q %d times, want once:\n%v", want, n, err)
		}
	}
}
