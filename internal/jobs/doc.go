// Package jobs runs background jobs (evaluations and replays) queued in the
// database: job records, the store a runner claims them from, and the
// runner that does them with training's Evaluate and Replay.
package jobs
