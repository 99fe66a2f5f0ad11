// Package consumer owns everything between the event streams and the
// estimator: Kafka consumption, event decoding, the click/conversion join,
// batching, refit scheduling and publishing of traffic weights.
//
// For now only decoding (DecodeClick, DecodeConversion) and the offline join
// used by `ripen fit` (BuildOffline) exist. Bad events are never fatal and
// never retried: each is turned into a RejectError carrying a
// machine-readable Reason, so that callers can count and report them.
//
// All times are event times in Unix milliseconds (int64). Nothing in this
// package reads the wall clock; the offline join takes its as-of time from
// the caller.
package consumer
