// Package state owns the model equations of Bayesian Knowledge Tracing, the
// learner-skill records and their encoding, and the Pebble store.
package state
