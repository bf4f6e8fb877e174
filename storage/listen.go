package storage

import (
	"context"
	"log/slog"
	"strconv"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"
	"github.com/jackc/pgxlisten"
)

// Listen delivers the policy ids notified on each channel to its handler
// until ctx ends, reconnecting after failures. Notifications are hints:
// after a reconnect, onReconnect runs so callers can catch up on any missed.
func (db *DB) Listen(ctx context.Context, logger *slog.Logger, handlers map[string]func(policyID int32), onReconnect func()) error {
	l := &pgxlisten.Listener{
		Connect: func(ctx context.Context) (*pgx.Conn, error) {
			conn, err := pgx.ConnectConfig(ctx, db.pool.Config().ConnConfig.Copy())
			if err == nil && onReconnect != nil {
				onReconnect()
			}
			return conn, err
		},
		LogError: func(ctx context.Context, err error) {
			if ctx.Err() == nil { // an ending listen is not a failure
				logger.Warn("notification listener", "error", err)
			}
		},
	}
	for channel, handle := range handlers {
		l.Handle(channel, pgxlisten.HandlerFunc(func(_ context.Context, n *pgconn.Notification, _ *pgx.Conn) error {
			id, err := strconv.ParseInt(n.Payload, 10, 32)
			if err != nil {
				logger.Warn("ignoring notification with a bad payload", "channel", n.Channel, "payload", n.Payload)
				return nil
			}
			handle(int32(id))
			return nil
		}))
	}
	err := l.Listen(ctx)
	if ctx.Err() != nil {
		return nil
	}
	return err
}
