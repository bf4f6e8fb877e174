// Package views holds read models: what the API and the status pages show
// of a policy (its status, states and their estimates, state listings, the
// report binned for charts), shaped from stored rows and training's rules.
package views
