package commands

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"time"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/training"
)

// dbObserver follows a policy's training straight from PostgreSQL for the
// load command: commit notifications give when each batch committed, and
// the backlog counts the episodes past the policy's training watermark
// rather than the status route's full counts.
type dbObserver struct {
	db     *storage.DB
	logger *slog.Logger
}

func openObserver(ctx context.Context, databaseURL string, stderr io.Writer) (*dbObserver, error) {
	db, err := storage.Open(ctx, databaseURL, 2, training.DefaultLimits())
	if err != nil {
		return nil, err
	}
	return &dbObserver{db: db, logger: slog.New(slog.NewTextHandler(stderr, nil))}, nil
}

func (o *dbObserver) Close() { o.db.Close() }

func (o *dbObserver) Backlog(ctx context.Context, policy string) (int64, error) {
	backlogs, err := o.db.Backlogs(ctx)
	if err != nil {
		return 0, err
	}
	for _, b := range backlogs {
		if b.Policy == policy {
			return b.Episodes, nil
		}
	}
	return 0, fmt.Errorf("no policy named %q", policy)
}

func (o *dbObserver) WatchCommits(ctx context.Context, policy string, fn func(int64, time.Time)) error {
	p, err := o.db.PolicyByName(ctx, policy)
	if err != nil {
		return err
	}
	return o.db.Listen(ctx, o.logger, map[string]storage.Subscription{storage.ChannelPolicy: {Notify: func(id int32) {
		at := time.Now()
		if id != p.ID {
			return
		}
		if p, err := o.db.PolicyByID(ctx, id); err == nil {
			fn(p.Revision, at)
		}
	}}})
}
