// Package estimator holds Ripen's statistics: the compact per-arm state
// (pending-click sketch, delay histogram, matured totals), the EM fit of the
// eventual conversion probability times a delay distribution right-censored
// at the attribution window, the posteriors of that probability, and the
// allocation policies that turn posteriors into traffic weights.
//
// The package is pure. It must never do I/O, read a clock, or keep global
// mutable state: every function is a function of its arguments, and every
// random draw comes from a caller-supplied seed, so the same state and seed
// always give the same answer. Times are event times in Unix milliseconds;
// durations inside the model are float64 seconds.
package estimator
