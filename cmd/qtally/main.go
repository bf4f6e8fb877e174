// Command qtally serves learned policies: applications post finished
// episodes, a worker learns action values from them with a constant step
// size, and applications ask which action to take.
package main

import (
	"context"
	"fmt"
	"os"
	"os/signal"
	"syscall"

	"github.com/qtally/qtally/cmd/qtally/commands"
)

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	if err := commands.Run(ctx, os.Args, os.Getenv, os.Stdin, os.Stdout, os.Stderr); err != nil {
		fmt.Fprintln(os.Stderr, "qtally:", err)
		os.Exit(1)
	}
}
