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
	if err := writeURLFile(*urlFile, srv.URL()); err != nil {
		_ = srv.Stop()
		log.Fatalf("benchdb: %v", err)
	}
	fmt.Fprintln(os.Stderr, "benchdb: PostgreSQL is up")
	<-ctx.Done()
	if err := srv.Stop(); err != nil {
		log.Fatalf("benchdb: stop: %v", err)
	}
}

// writeURLFile writes url to path whole under a temporary name first, so a
// reader never sees half a URL.
func writeURLFile(path, url string) error {
	tmp := path + ".tmp"
	if err := os.WriteFile(tmp, []byte(url+"\n"), 0o600); err != nil {
		return fmt.Errorf("write url file: %w", err)
	}
	if err := os.Rename(tmp, path); err != nil {
		_ = os.Remove(tmp)
		return fmt.Errorf("write url file: %w", err)
	}
	return nil
}
