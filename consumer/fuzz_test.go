package consumer

import (
	"encoding/json"
	"errors"
	"strconv"
	"testing"
	"time"
	"unicode/utf8"
)

// decodeReasons are the reasons a decoder may return.
var decodeReasons = map[Reason]bool{
	ReasonMalformedJSON: true, ReasonDuplicateField: true, ReasonMissingField: true,
	ReasonWrongType: true, ReasonEmptyField: true, ReasonFieldTooLong: true,
	ReasonInvalidText: true, ReasonBadTimestamp: true, ReasonAbsurdTimestamp: true,
}

var fuzzSeeds = []string{
	`{"click_id":"k-1","experiment":"hero-banner","arm":"blue","ts":"2024-03-05T10:00:00Z"}`,
	`{"click_id":"k-1","experiment":"hero-banner","arm":"blue","ts":"2024-03-05T15:30:00.250+05:30"}`,
	`{"click_id":"k-1","experiment":"hero-banner","arm":"blue","ts":1709632800000}`,
	`{"click_id":"k-1","ts":1709632800000,"experiment":"hero-banner","arm":"blue","click_ts":"2024-03-05T09:00:00-01:00"}`,
	`{"click_id":"k-1","ts":1709632800000.5}`,
	`{"click_id":"k\u005f1","ts":1709632800000,"arm":"bl\u00fc\"e","x":[{"}":"{"}]}`,
	`{"click_id":"k-1","ts":1709632800000,"ts":1}`,
	`{"click_id":null,"ts":-0}`,
	`{"click_id":"\ud800","ts":99999999999999999999}`,
	"{\"click_id\":\"\xff\",\"ts\":1709632800000}",
	`[]`, `{}`, `{"a":1} x`, ``,
}

// checkDecoded asserts the invariants every successfully decoded text field
// and time must satisfy.
func checkDecoded(t *testing.T, name, s string, optional bool) {
	t.Helper()
	if s == "" && optional {
		return
	}
	if s == "" || len(s) > MaxFieldBytes || !utf8.ValidString(s) {
		t.Fatalf("%s %q violates the text rules", name, s)
	}
}

func checkTime(t *testing.T, name string, ms int64, optional bool) {
	t.Helper()
	if ms == 0 && optional {
		return
	}
	if ms < MinEventTime || ms >= MaxEventTime {
		t.Fatalf("%s %d outside the sane range", name, ms)
	}
}

func checkRejection(t *testing.T, err error) {
	t.Helper()
	var rej *RejectError
	if !errors.As(err, &rej) || !decodeReasons[rej.Reason] {
		t.Fatalf("error %v is not a decoder rejection", err)
	}
}

// rfc3339 renders ms as RFC 3339 at a UTC offset of offMin minutes.
func rfc3339(ms int64, offMin int) string {
	return time.UnixMilli(ms).In(time.FixedZone("", offMin*60)).Format(time.RFC3339Nano)
}

func quote(s string) string {
	b, _ := json.Marshal(s)
	return string(b)
}

func FuzzDecodeClick(f *testing.F) {
	for _, s := range fuzzSeeds {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, b []byte) {
		c, err := DecodeClick(b)
		if err != nil {
			checkRejection(t, err)
			return
		}
		checkDecoded(t, "click_id", c.ClickID, false)
		checkDecoded(t, "experiment", c.Experiment, false)
		checkDecoded(t, "arm", c.Arm, false)
		checkTime(t, "ts", c.TS, false)

		enc, err := c.MarshalJSON()
		if err != nil {
			t.Fatal(err)
		}
		if got, err := DecodeClick(enc); err != nil || got != c {
			t.Fatalf("epoch round trip of %+v: %+v, %v (json %s)", c, got, err, enc)
		}
		// The same click with its time as RFC 3339 at another offset.
		alt := `{"ts":"` + rfc3339(c.TS, -150) + `","arm":` + quote(c.Arm) +
			`,"experiment":` + quote(c.Experiment) + `,"click_id":` + quote(c.ClickID) + `}`
		if got, err := DecodeClick([]byte(alt)); err != nil || got != c {
			t.Fatalf("RFC 3339 round trip of %+v: %+v, %v (json %s)", c, got, err, alt)
		}
	})
}

func FuzzDecodeConversion(f *testing.F) {
	for _, s := range fuzzSeeds {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, b []byte) {
		v, err := DecodeConversion(b)
		if err != nil {
			checkRejection(t, err)
			return
		}
		checkDecoded(t, "click_id", v.ClickID, false)
		checkDecoded(t, "experiment", v.Experiment, true)
		checkDecoded(t, "arm", v.Arm, true)
		checkTime(t, "ts", v.TS, false)
		checkTime(t, "click_ts", v.ClickTS, true)
		if want := v.Experiment != "" && v.Arm != "" && v.ClickTS != 0; v.Attributed != want {
			t.Fatalf("Attributed %v for %+v", v.Attributed, v)
		}

		enc, err := v.MarshalJSON()
		if err != nil {
			t.Fatal(err)
		}
		if got, err := DecodeConversion(enc); err != nil || got != v {
			t.Fatalf("epoch round trip of %+v: %+v, %v (json %s)", v, got, err, enc)
		}
		alt := `{"click_id":` + quote(v.ClickID) + `,"ts":"` + rfc3339(v.TS, 330) + `"`
		if v.Experiment != "" {
			alt += `,"experiment":` + quote(v.Experiment)
		}
		if v.Arm != "" {
			alt += `,"arm":` + quote(v.Arm)
		}
		if v.ClickTS != 0 {
			alt += `,"click_ts":` + strconv.Quote(rfc3339(v.ClickTS, 0))
		}
		alt += `}`
		if got, err := DecodeConversion([]byte(alt)); err != nil || got != v {
			t.Fatalf("RFC 3339 round trip of %+v: %+v, %v (json %s)", v, got, err, alt)
		}
	})
}
