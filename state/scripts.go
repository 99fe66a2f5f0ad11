package state

import (
	"context"
	_ "embed"

	"github.com/redis/go-redis/v9"
)

// The Lua scripts; each file documents its KEYS and ARGV.
var (
	//go:embed lua/apply.lua
	applySrc string
	//go:embed lua/load.lua
	loadSrc string
	//go:embed lua/compact.lua
	compactSrc string
	//go:embed lua/alloc.lua
	allocSrc string
	//go:embed lua/index_open.lua
	indexOpenSrc string
	//go:embed lua/dict.lua
	dictSrc string
	//go:embed lua/lookup.lua
	lookupSrc string
	//go:embed lua/claim.lua
	claimSrc string
	//go:embed lua/sweep.lua
	sweepSrc string
	//go:embed lua/legacy_claim.lua
	legacyClaimSrc string
	//go:embed lua/legacy_sweep.lua
	legacySweepSrc string

	applyScript       = redis.NewScript(applySrc)
	loadScript        = redis.NewScript(loadSrc)
	compactScript     = redis.NewScript(compactSrc)
	allocScript       = redis.NewScript(allocSrc)
	indexOpenScript   = redis.NewScript(indexOpenSrc)
	dictScript        = redis.NewScript(dictSrc)
	lookupScript      = redis.NewScript(lookupSrc)
	claimScript       = redis.NewScript(claimSrc)
	sweepScript       = redis.NewScript(sweepSrc)
	legacyClaimScript = redis.NewScript(legacyClaimSrc)
	legacySweepScript = redis.NewScript(legacySweepSrc)
)

// scriptCall is one script invocation of a pipelined batch.
type scriptCall struct {
	keys []string
	args []any
}

// runPipelined runs script once per call in one pipeline (EVALSHA) and
// returns the commands in call order. Calls that failed with NOSCRIPT (the
// server's script cache was empty, e.g. after a restart) did not run; the
// script is loaded and those calls are sent once more.
func runPipelined(ctx context.Context, rdb redis.UniversalClient, script *redis.Script, calls []scriptCall) ([]*redis.Cmd, error) {
	cmds := make([]*redis.Cmd, len(calls))
	send := func(idx []int) error {
		pipe := rdb.Pipeline()
		for _, i := range idx {
			cmds[i] = script.EvalSha(ctx, pipe, calls[i].keys, calls[i].args...)
		}
		_, err := pipe.Exec(ctx)
		return err
	}
	all := make([]int, len(calls))
	for i := range all {
		all[i] = i
	}
	err := send(all)
	if err == nil {
		return cmds, nil
	}
	var retry []int
	for i, c := range cmds {
		if c.Err() != nil && redis.HasErrorPrefix(c.Err(), "NOSCRIPT") {
			retry = append(retry, i)
		}
	}
	if len(retry) == 0 {
		return cmds, firstErr(cmds, err)
	}
	if err := script.Load(ctx, rdb).Err(); err != nil {
		return cmds, err
	}
	if err := send(retry); err != nil {
		return cmds, firstErr(cmds, err)
	}
	return cmds, nil
}

// firstErr returns the first command error, or fallback.
func firstErr(cmds []*redis.Cmd, fallback error) error {
	for _, c := range cmds {
		if c != nil && c.Err() != nil {
			return c.Err()
		}
	}
	return fallback
}
