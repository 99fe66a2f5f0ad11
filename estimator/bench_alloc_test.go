package estimator

import (
	"fmt"
	"math/rand/v2"
	"testing"
)

// benchAllocArms are ten burned-in arms with conversion rates 4.0% to 5.8%
// over 5,000 clicks each (an invented scenario).
func benchAllocArms() []ArmInput {
	arms := make([]ArmInput, 10)
	for i := range arms {
		conv := float64(200 + 10*i)
		arms[i] = ArmInput{
			Arm:         fmt.Sprintf("creative-%02d", i),
			Clicks:      5000,
			Conversions: conv,
			RipeClicks:  4600,
			Likelihood:  BetaPosterior{Alpha: conv + 1, Beta: 4600 - conv + 1},
		}
	}
	return arms
}

func BenchmarkProbBest(b *testing.B) {
	arms := benchAllocArms()
	posts := make([]Posterior, len(arms))
	for i, a := range arms {
		posts[i] = a.Likelihood
	}
	b.Run("arms=10/draws=10000", func(b *testing.B) {
		r := rand.New(rand.NewPCG(1, 2))
		for b.Loop() {
			ProbBest(posts, DefaultProbBestDraws, r)
		}
	})
}

func BenchmarkAllocate(b *testing.B) {
	arms := benchAllocArms()
	prev := make([]float64, len(arms))
	for i := range prev {
		prev[i] = 1 / float64(len(arms))
	}
	for _, name := range []string{PolicyThompsonBayes, PolicyTopTwo} {
		pol, err := ParsePolicy(name)
		if err != nil {
			b.Fatal(err)
		}
		opts := DefaultAllocationOptions()
		opts.Policy = pol
		b.Run(name+"/arms=10", func(b *testing.B) {
			for b.Loop() {
				if _, err := Allocate(arms, prev, opts, 42); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}
