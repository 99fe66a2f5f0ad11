package main

import (
	"context"
	"strings"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"

	"ripen/consumer/kafkatest"
)

// TestReplayDryRunChangesNothing runs `ripen replay --dry-run` against a
// broker holding a few clicks and a Redis holding live state: it must print
// the plan (groups, prefixes, partition offsets, the switch) and leave
// every key as it was.
func TestReplayDryRunChangesNothing(t *testing.T) {
	brokers := kafkatest.Start(t, 2)
	w := &kafka.Writer{Addr: kafka.TCP(brokers...), Topic: "clicks", Balancer: kafka.BalancerFunc(func(kafka.Message, ...int) int { return 1 })}
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	for i := range 4 {
		if err := w.WriteMessages(ctx, kafka.Message{Value: []byte(`{"click_id":"c` + string(rune('0'+i)) + `"}`)}); err != nil {
			t.Fatal(err)
		}
	}
	_ = w.Close()
	url, st, srv := newCmdStore(t, "shop")
	seedArm(t, st, "tea-banner", "green", 40, 3, 0, 7)
	rdb := srv.Client()
	before := rdb.DBSize(ctx).Val()

	out, err := runSub(t, newReplayCmd(), "--from", "earliest", "--dry-run", "--brokers", strings.Join(brokers, ","),
		"--redis", url, "--root", "shop", "--group", "teashop", "--prefix", "shop.next")
	if err != nil {
		t.Fatalf("dry run: %v\n%s", err, out)
	}
	for _, want := range []string{
		"dry run: nothing is changed",
		"source: group teashop, live prefix shop (root shop)",
		"replay: group teashop.replay.shop.next into prefix shop.next from earliest",
		"ripen replay --switch-to shop.next",
		"SET shop:live shop.next",
	} {
		if !strings.Contains(out, want) {
			t.Errorf("output lacks %q:\n%s", want, out)
		}
	}
	// clicks/1 holds the four clicks: start 0, end 4.
	found := false
	for _, line := range strings.Split(out, "\n") {
		if f := strings.Fields(line); len(f) == 5 && f[0] == "clicks" && f[1] == "1" {
			found = f[2] == "0" && f[3] == "4" && f[4] == "4"
		}
	}
	if !found {
		t.Errorf("no line for clicks/1 with start 0 and end 4:\n%s", out)
	}
	if after := rdb.DBSize(ctx).Val(); after != before {
		t.Errorf("dry run changed the key count from %d to %d", before, after)
	}
	if n := rdb.Exists(ctx, "shop:live").Val(); n != 0 {
		t.Error("dry run set the live pointer")
	}
}

// TestReplaySwitchTo switches the live pointer to a prefix and back with
// --switch-to: the pointer follows, and the target's allocation seq ends
// above the one live before.
func TestReplaySwitchTo(t *testing.T) {
	url, st, srv := newCmdStore(t, "shop")
	ctx := context.Background()
	for range 5 {
		if _, err := st.SaveAllocation(ctx, "tea-banner", []byte(`{"weights":{"green":1}}`)); err != nil {
			t.Fatal(err)
		}
	}
	next, err := st.WithPrefix("shop.r1")
	if err != nil {
		t.Fatal(err)
	}
	seedArm(t, next, "tea-banner", "green", 40, 3, 0, 7)
	if _, err := next.SaveAllocation(ctx, "tea-banner", []byte(`{"weights":{"green":1}}`)); err != nil {
		t.Fatal(err)
	}
	out, err := runSub(t, newReplayCmd(), "--switch-to", "shop.r1", "--redis", url, "--root", "shop")
	if err != nil {
		t.Fatalf("switch: %v\n%s", err, out)
	}
	if !strings.Contains(out, "to switch back: ripen replay --switch-to shop") {
		t.Errorf("no switch-back hint:\n%s", out)
	}
	if v := srv.Client().Get(ctx, "shop:live").Val(); v != "shop.r1" {
		t.Fatalf("live pointer %q after switch", v)
	}
	if seq, err := next.SaveAllocation(ctx, "tea-banner", []byte(`{}`)); err != nil || seq != 6 {
		t.Errorf("next publication under shop.r1 has seq %d (%v), want 6", seq, err)
	}
	if _, err := runSub(t, newReplayCmd(), "--switch-to", "shop", "--redis", url, "--root", "shop"); err != nil {
		t.Fatal(err)
	}
	if v := srv.Client().Get(ctx, "shop:live").Val(); v != "shop" {
		t.Errorf("live pointer %q after switching back", v)
	}
	if seq, err := st.SaveAllocation(ctx, "tea-banner", []byte(`{}`)); err != nil || seq != 7 {
		t.Errorf("next publication under shop after switching back has seq %d (%v), want 7", seq, err)
	}
	if _, err := runSub(t, newReplayCmd(), "--redis", url); exitCode(err) != 2 {
		t.Errorf("neither --from nor --switch-to: %v, want exit code 2", err)
	}
}
