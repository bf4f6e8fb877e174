// Command qtally serves learned policies: applications post finished
// episodes, a worker learns action values from them with a constant step
// size, and applications ask which action to take.
package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"os/signal"
	"syscall"
)

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	if err := run(ctx, os.Args, os.Getenv, os.Stdout, os.Stderr); err != nil {
		fmt.Fprintln(os.Stderr, "qtally:", err)
		os.Exit(1)
	}
}

// run is the whole program, with its environment passed in so that tests
// can call it like a process.
func run(ctx context.Context, args []string, getenv func(string) string, stdout, stderr io.Writer) error {
	if err := refuseSecretArguments(args); err != nil {
		return err
	}
	return newApp(getenv, stdout, stderr).Run(ctx, args)
}
