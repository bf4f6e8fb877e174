package storage

import (
	"context"
	"log/slog"
	"strconv"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"
	"github.com/jackc/pgxlisten"
)

// Subscription is what a process does with one notification channel.
type Subscription struct {
	// Notify handles the policy id of one notification.
	Notify func(policyID int32)
	// CatchUp runs whenever the channel is listened to anew, after every
	// (re)connect, for changes notified while nobody listened.
	CatchUp func()
}

// listenRetryDelay is how long the listener waits before reconnecting. A
// database restart takes seconds; until the listener is back, changes
// reach a process only through its poll.
const listenRetryDelay = time.Second

// Listen delivers the policy ids notified on each channel to its
// subscription until ctx ends, reconnecting after failures.
func (db *DB) Listen(ctx context.Context, logger *slog.Logger, subs map[string]Subscription) error {
	l := &pgxlisten.Listener{
		Connect: func(ctx context.Context) (*pgx.Conn, error) {
			return pgx.ConnectConfig(ctx, db.pool.Config().ConnConfig.Copy())
		},
		LogError: func(ctx context.Context, err error) {
			if ctx.Err() == nil { // not the shutdown itself
				logger.Warn("notification listener", "error", err)
			}
		},
		ReconnectDelay: listenRetryDelay,
	}
	for channel, sub := range subs {
		l.Handle(channel, subscription{sub: sub, logger: logger})
	}
	err := l.Listen(ctx)
	if ctx.Err() != nil {
		return nil //nolint:nilerr // a cancelled context is a shutdown, not a failure
	}
	return err
}

// subscription adapts a Subscription to pgxlisten. The listener calls
// HandleBacklog after LISTEN, so nothing notified after CatchUp's reads
// begin can be missed.
type subscription struct {
	sub    Subscription
	logger *slog.Logger
}

func (s subscription) HandleNotification(_ context.Context, n *pgconn.Notification, _ *pgx.Conn) error {
	id, err := strconv.ParseInt(n.Payload, 10, 32)
	if err != nil {
		s.logger.Warn("ignoring notification with a bad payload", "channel", n.Channel, "payload", n.Payload)
		return nil //nolint:nilerr // an error would end the listener; the poll covers what this one meant
	}
	s.sub.Notify(int32(id))
	return nil
}

func (s subscription) HandleBacklog(context.Context, string, *pgx.Conn) error {
	if s.sub.CatchUp != nil {
		s.sub.CatchUp()
	}
	return nil
}
