// Package commands is the qtally program: one function per subcommand,
// each reading its flags and the environment given to Run, and the wiring
// of storage, training and the API for the service roles.
package commands

import (
	"context"
	"io"

	"github.com/urfave/cli/v3"
)

// Run is the whole program, with its arguments, environment and standard
// streams passed in, so that tests can call it like a process.
func Run(ctx context.Context, args []string, getenv func(string) string, stdin io.Reader, stdout, stderr io.Writer) error {
	if err := refuseSecretArguments(args); err != nil {
		return err
	}
	env := newFlagEnv(getenv)
	app := &cli.Command{
		Name:      "qtally",
		Usage:     "learn which action to take from the outcomes of past decisions",
		Version:   versionLine(),
		Writer:    stdout,
		ErrWriter: stderr,
		Commands: []*cli.Command{
			serveCommand(env, stdout, stderr),
			workerCommand(env, stdout, stderr),
			migrateCommand(env, stdout),
			devCommand(env, stdout, stderr),
			loadCommand(env, getenv, stdout, stderr),
			demoCommand(env, stdout),
			exportCommand(env, stdout),
			importCommand(env, stdin, stdout),
			tokenCommand(env, stdout),
			healthcheckCommand(env, stdout),
		},
	}
	return app.Run(ctx, args)
}
