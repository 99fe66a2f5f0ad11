package sim

import (
	"context"
	"strings"
	"testing"

	"ripen/estimator"
)

// BenchmarkSimulateRun measures one closed-loop run of thompson-bayes on
// the slowBest scenario (two arms, 3 days, 6 refits); the cost is the fit
// and posterior of every arm at every update.
func BenchmarkSimulateRun(b *testing.B) {
	sc, err := ParseScenario(strings.NewReader(slowBest))
	if err != nil {
		b.Fatal(err)
	}
	for b.Loop() {
		if _, err := Run(context.Background(), *sc, Options{Policies: []string{estimator.PolicyThompsonBayes}, Runs: 1, Workers: 1}); err != nil {
			b.Fatal(err)
		}
	}
}
