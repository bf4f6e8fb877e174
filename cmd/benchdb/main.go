// Command benchdb runs a private, durable PostgreSQL for scripts/bench.sh:
// started from the installed server binaries in a temporary directory, not
// pinned to a CPU (the service and the load generator are), stopped and
// removed on SIGINT or SIGTERM. It writes the server's URL to -url-file
// once the server accepts connections.
package main

import (
	"context"
	"flag"
	"fmt"
	"log"
	"os"
	"os/signal"
	"syscall"
	"time"

	"github.com/qtally/qtally/storage/localpg"
)

func main() {
	urlFile := flag.String("url-file", "", "write the database URL to this file when ready")
	flag.Parse()
	if *urlFile == "" {
		log.Fatal("benchdb: -url-file is required")
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	startCtx, cancel := context.WithTimeout(ctx, 2*time.Minute)
	defer cancel()
	srv, err := localpg.Start(startCtx, localpg.Options{Durable: true, Port: -1, Log: os.Stderr})
	if err != nil {
		log.Fatalf("benchdb: %v", err)
	}
	// Written whole under a temporary name, so a reader never sees half a URL.
	tmp := *urlFile + ".tmp"
	if err := os.WriteFile(tmp, []byte(srv.URL()+"\n"), 0o600); err == nil {
		err = os.Rename(tmp, *urlFile)
	}
	if err != nil {
		_ = srv.Stop()
		log.Fatalf("benchdb: %v", err)
	}
	fmt.Fprintln(os.Stderr, "benchdb: PostgreSQL is up")
	<-ctx.Done()
	if err := srv.Stop(); err != nil {
		log.Fatalf("benchdb: stop: %v", err)
	}
}
