package main

import (
	"fmt"
	"strings"

	"github.com/spf13/cobra"

	"ripen/consumer/kafkatest"
)

func newDevbrokerCmd() *cobra.Command {
	var addr string
	var partitions int
	cmd := &cobra.Command{
		Use:   "devbroker [--addr HOST:PORT] [--partitions N]",
		Short: "Run an in-process Kafka-compatible broker for development",
		Long: `devbroker runs a single in-memory Kafka-compatible broker with the default
topics (` + strings.Join(kafkatest.DefaultTopics, ", ") + `) until interrupted.
Nothing is persisted. For development and demos only.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			if partitions < 1 {
				return &exitError{code: 2, err: fmt.Errorf("--partitions %d must be at least 1", partitions)}
			}
			c, err := kafkatest.New(kafkatest.Options{Addr: addr, Partitions: partitions})
			if err != nil {
				return err
			}
			defer c.Close()
			fmt.Fprintf(cmd.OutOrStdout(), "devbroker listening on %s with topics %s (%d partitions each); interrupt to stop\n",
				strings.Join(c.ListenAddrs(), ","), strings.Join(kafkatest.DefaultTopics, ", "), partitions)
			<-cmd.Context().Done()
			return nil
		},
	}
	cmd.Flags().StringVar(&addr, "addr", "127.0.0.1:9092", "listen address")
	cmd.Flags().IntVar(&partitions, "partitions", 3, "partitions per topic")
	return cmd
}
