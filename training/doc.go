// Package training is qtally's domain: policies, episodes, Monte Carlo
// returns, constant-step action-value updates, epsilon-soft choosing and the
// worker loop that turns stored episodes into Q. It imports nothing else of
// qtally's; storage and api depend on it, never the other way.
package training
