package consumer

import (
	"errors"
	"strings"
	"testing"
)

// daysFromCivil returns the number of days from 1970-01-01 to the proleptic
// Gregorian date y-m-d. It is an oracle independent of package time:
// H. Hinnant, "chrono-Compatible Low-Level Date Algorithms" (2013),
// algorithm days_from_civil.
func daysFromCivil(y, m, d int64) int64 {
	if m <= 2 {
		y--
	}
	era := y / 400
	if y < 0 && y%400 != 0 {
		era = (y - 399) / 400
	}
	yoe := y - era*400
	mp := (m + 9) % 12
	doy := (153*mp+2)/5 + d - 1
	doe := yoe*365 + yoe/4 - yoe/100 + doy
	return era*146097 + doe - 719468
}

// civilMs returns the Unix ms of a wall-clock time at UTC offset offMin
// minutes (local = UTC + offset, RFC 3339 section 4.2).
func civilMs(y, mo, d, h, mi, s, ms, offMin int64) int64 {
	sec := daysFromCivil(y, mo, d)*86400 + h*3600 + mi*60 + s - offMin*60
	return sec*1000 + ms
}

func TestCivilOracle(t *testing.T) {
	// Known anchors: 2000-01-01T00:00:00Z is 946684800 s after the epoch
	// (value recalled from memory; it is also MinEventTime), and the epoch
	// itself is day 0.
	if got := civilMs(1970, 1, 1, 0, 0, 0, 0, 0); got != 0 {
		t.Errorf("epoch = %d", got)
	}
	if got := civilMs(2000, 1, 1, 0, 0, 0, 0, 0); got != 946_684_800_000 || MinEventTime != 946_684_800_000 {
		t.Errorf("2000-01-01 = %d", got)
	}
	if got := civilMs(2200, 1, 1, 0, 0, 0, 0, 0); got != MaxEventTime {
		t.Errorf("2200-01-01 = %d, MaxEventTime %d", got, MaxEventTime)
	}
}

// The worked examples of G. Klyne and C. Newman, "Date and Time on the
// Internet: Timestamps", RFC 3339 (2002), section 5.8. They predate 2000,
// so they go through parseTimestamp, which skips the range check.
func TestParseTimestampRFC3339Examples(t *testing.T) {
	tests := []struct {
		in   string
		want int64
		bad  bool
	}{
		{in: "1985-04-12T23:20:50.52Z", want: civilMs(1985, 4, 12, 23, 20, 50, 520, 0)},
		// "This represents 39 minutes and 57 seconds after the 16th hour of
		// December 19th, 1996 with an offset of -08:00 from UTC".
		{in: "1996-12-19T16:39:57-08:00", want: civilMs(1996, 12, 20, 0, 39, 57, 0, 0)},
		{in: "1937-01-01T12:00:27.87+00:20", want: civilMs(1937, 1, 1, 12, 0, 27, 870, 20)},
		// The leap-second example is legal RFC 3339 but Go's time package
		// does not represent leap seconds; it is rejected as bad_timestamp.
		{in: "1990-12-31T23:59:60Z", bad: true},
		{in: "1990-12-31T15:59:60-08:00", bad: true},
	}
	for _, tt := range tests {
		t.Run(tt.in, func(t *testing.T) {
			got, err := parseTimestamp("ts", []byte(`"`+tt.in+`"`))
			if tt.bad {
				assertReason(t, err, ReasonBadTimestamp)
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			if got != tt.want {
				t.Errorf("got %d ms, want %d", got, tt.want)
			}
		})
	}
	// Cross-check of the 1996 example against its UTC form, computed with
	// Python 3 datetime.fromisoformat: 851042397000 ms.
	if got := civilMs(1996, 12, 19, 16, 39, 57, 0, -8*60); got != 851_042_397_000 {
		t.Errorf("oracle 1996 example = %d", got)
	}
}

func assertReason(t *testing.T, err error, want Reason) {
	t.Helper()
	var rej *RejectError
	if !errors.As(err, &rej) {
		t.Fatalf("error %v is not a *RejectError", err)
	}
	if rej.Reason != want {
		t.Fatalf("reason %q (%v), want %q", rej.Reason, err, want)
	}
}

// clickJSON builds a click object with the given ts literal and arm
// literal (both raw JSON).
func clickJSON(ts, arm string) string {
	return `{"click_id":"k-1","experiment":"hero-banner","arm":` + arm + `,"ts":` + ts + `}`
}

var base2024 = civilMs(2024, 3, 5, 10, 0, 0, 0, 0) // 2024-03-05T10:00:00Z

func TestDecodeClick(t *testing.T) {
	long := strings.Repeat("a", MaxFieldBytes)
	tests := []struct {
		name string
		in   string
		want Click
		rej  Reason
	}{
		{name: "rfc3339 Z", in: clickJSON(`"2024-03-05T10:00:00Z"`, `"blue"`),
			want: Click{"k-1", "hero-banner", "blue", base2024}},
		{name: "rfc3339 positive offset and fraction", in: clickJSON(`"2024-03-05T15:30:00.250+05:30"`, `"blue"`),
			want: Click{"k-1", "hero-banner", "blue", base2024 + 250}},
		{name: "rfc3339 negative offset", in: clickJSON(`"2024-03-05T02:00:00-08:00"`, `"blue"`),
			want: Click{"k-1", "hero-banner", "blue", base2024}},
		{name: "rfc3339 nanoseconds truncate", in: clickJSON(`"2024-03-05T10:00:00.123999999Z"`, `"blue"`),
			want: Click{"k-1", "hero-banner", "blue", base2024 + 123}},
		{name: "epoch ms", in: clickJSON(`1709632800000`, `"blue"`),
			want: Click{"k-1", "hero-banner", "blue", base2024}},
		{name: "whitespace and unknown fields", in: " \t{ \"ua\" : {\"x\":[1,\"}\"]}, \"click_id\":\"k-1\",\"experiment\":\"hero-banner\",\"arm\":\"blue\",\"ts\":1709632800000 , \"ua\":null }\r\n",
			want: Click{"k-1", "hero-banner", "blue", base2024}},
		{name: "escaped key", in: `{"click\u005fid":"k-1","experiment":"hero-banner","arm":"blue","ts":1709632800000}`,
			want: Click{"k-1", "hero-banner", "blue", base2024}},
		{name: "escaped value", in: clickJSON(`1709632800000`, `"bl\u00fce \"x\""`),
			want: Click{"k-1", "hero-banner", "blüe \"x\"", base2024}},
		{name: "name at length limit", in: clickJSON(`1709632800000`, `"`+long+`"`),
			want: Click{"k-1", "hero-banner", long, base2024}},
		{name: "first valid ms", in: clickJSON(`"2000-01-01T00:00:00Z"`, `"blue"`),
			want: Click{"k-1", "hero-banner", "blue", MinEventTime}},
		{name: "last valid ms", in: clickJSON(`"2199-12-31T23:59:59.999Z"`, `"blue"`),
			want: Click{"k-1", "hero-banner", "blue", MaxEventTime - 1}},

		{name: "lower-case t and z", in: clickJSON(`"2024-03-05t10:00:00z"`, `"blue"`),
			want: Click{"k-1", "hero-banner", "blue", base2024}},
		{name: "comma fraction", in: clickJSON(`"2024-03-05T10:00:00,5Z"`, `"blue"`), rej: ReasonBadTimestamp},
		{name: "dot without digits", in: clickJSON(`"2024-03-05T10:00:00.Z"`, `"blue"`), rej: ReasonBadTimestamp},
		{name: "offset hour 24", in: clickJSON(`"2024-03-05T10:00:00+24:00"`, `"blue"`), rej: ReasonBadTimestamp},
		{name: "offset minute 60", in: clickJSON(`"2024-03-05T10:00:00+05:60"`, `"blue"`), rej: ReasonBadTimestamp},
		{name: "offset without colon", in: clickJSON(`"2024-03-05T10:00:00+0530"`, `"blue"`), rej: ReasonBadTimestamp},
		{name: "hour 24", in: clickJSON(`"2024-03-05T24:00:00Z"`, `"blue"`), rej: ReasonBadTimestamp},
		{name: "february 30", in: clickJSON(`"2024-02-30T10:00:00Z"`, `"blue"`), rej: ReasonBadTimestamp},
		{name: "leap day", in: clickJSON(`"2024-02-29T10:00:00Z"`, `"blue"`),
			want: Click{"k-1", "hero-banner", "blue", civilMs(2024, 2, 29, 10, 0, 0, 0, 0)}},
		{name: "float ms", in: clickJSON(`1709632800000.0`, `"blue"`), rej: ReasonBadTimestamp},
		{name: "exponent ms", in: clickJSON(`1.7096328e12`, `"blue"`), rej: ReasonBadTimestamp},
		{name: "numeric string", in: clickJSON(`"1709632800000"`, `"blue"`), rej: ReasonBadTimestamp},
		{name: "no offset", in: clickJSON(`"2024-03-05T10:00:00"`, `"blue"`), rej: ReasonBadTimestamp},
		{name: "space separator", in: clickJSON(`"2024-03-05 10:00:00Z"`, `"blue"`), rej: ReasonBadTimestamp},
		{name: "date only", in: clickJSON(`"2024-03-05"`, `"blue"`), rej: ReasonBadTimestamp},
		{name: "month 13", in: clickJSON(`"2024-13-05T10:00:00Z"`, `"blue"`), rej: ReasonBadTimestamp},
		{name: "long ts string", in: clickJSON(`"`+strings.Repeat("9", 100)+`"`, `"blue"`), rej: ReasonBadTimestamp},
		{name: "ts bool", in: clickJSON(`true`, `"blue"`), rej: ReasonWrongType},
		{name: "ts object", in: clickJSON(`{"ms":1}`, `"blue"`), rej: ReasonWrongType},
		{name: "seconds not ms", in: clickJSON(`1709632800`, `"blue"`), rej: ReasonAbsurdTimestamp},
		{name: "microseconds not ms", in: clickJSON(`1709632800000000`, `"blue"`), rej: ReasonAbsurdTimestamp},
		{name: "negative ms", in: clickJSON(`-1`, `"blue"`), rej: ReasonAbsurdTimestamp},
		{name: "overflowing ms", in: clickJSON(`99999999999999999999999`, `"blue"`), rej: ReasonAbsurdTimestamp},
		{name: "year 1999", in: clickJSON(`"1999-12-31T23:59:59.999Z"`, `"blue"`), rej: ReasonAbsurdTimestamp},
		{name: "year 2200", in: clickJSON(`"2200-01-01T00:00:00Z"`, `"blue"`), rej: ReasonAbsurdTimestamp},
		{name: "year 0000", in: clickJSON(`"0000-01-01T00:00:00Z"`, `"blue"`), rej: ReasonAbsurdTimestamp},

		{name: "missing ts", in: `{"click_id":"k-1","experiment":"hero-banner","arm":"blue"}`, rej: ReasonMissingField},
		{name: "missing click_id", in: `{"experiment":"hero-banner","arm":"blue","ts":1709632800000}`, rej: ReasonMissingField},
		{name: "missing experiment", in: `{"click_id":"k-1","arm":"blue","ts":1709632800000}`, rej: ReasonMissingField},
		{name: "missing arm", in: `{"click_id":"k-1","experiment":"hero-banner","ts":1709632800000}`, rej: ReasonMissingField},
		{name: "null arm", in: clickJSON(`1709632800000`, `null`), rej: ReasonMissingField},
		{name: "key case differs", in: `{"Click_ID":"k-1","experiment":"hero-banner","arm":"blue","ts":1709632800000}`, rej: ReasonMissingField},
		{name: "empty object", in: `{}`, rej: ReasonMissingField},
		{name: "empty arm", in: clickJSON(`1709632800000`, `""`), rej: ReasonEmptyField},
		{name: "arm too long", in: clickJSON(`1709632800000`, `"`+long+`b"`), rej: ReasonFieldTooLong},
		{name: "escaped arm too long", in: clickJSON(`1709632800000`, `"`+strings.Repeat(`\u00e9`, MaxFieldBytes/2+1)+`"`), rej: ReasonFieldTooLong},
		{name: "arm number", in: clickJSON(`1709632800000`, `7`), rej: ReasonWrongType},
		{name: "arm array", in: clickJSON(`1709632800000`, `["blue"]`), rej: ReasonWrongType},
		{name: "arm control char", in: clickJSON(`1709632800000`, `"bl\u0007ue"`), rej: ReasonInvalidText},
		{name: "arm newline escape", in: clickJSON(`1709632800000`, `"blue\n"`), rej: ReasonInvalidText},
		{name: "arm C1 control", in: clickJSON(`1709632800000`, `"blue\u0085"`), rej: ReasonInvalidText},
		{name: "arm invalid utf8", in: clickJSON(`1709632800000`, "\"bl\xffue\""), rej: ReasonInvalidText},
		{name: "arm lone surrogate", in: clickJSON(`1709632800000`, `"bl\ud800ue"`), rej: ReasonInvalidText},
		{name: "arm replacement char", in: clickJSON(`1709632800000`, `"bl`+"\uFFFD"+`ue"`), rej: ReasonInvalidText},
		{name: "duplicate arm", in: `{"click_id":"k-1","experiment":"hero-banner","arm":"blue","arm":"red","ts":1709632800000}`, rej: ReasonDuplicateField},
		{name: "duplicate null ts", in: `{"click_id":"k-1","experiment":"hero-banner","arm":"blue","ts":null,"ts":1709632800000}`, rej: ReasonDuplicateField},

		{name: "empty input", in: ``, rej: ReasonMalformedJSON},
		{name: "truncated", in: `{"click_id":"k-1","experiment":"hero-banner"`, rej: ReasonMalformedJSON},
		{name: "trailing garbage", in: clickJSON(`1709632800000`, `"blue"`) + ` x`, rej: ReasonMalformedJSON},
		{name: "two objects", in: clickJSON(`1709632800000`, `"blue"`) + clickJSON(`1709632800000`, `"blue"`), rej: ReasonMalformedJSON},
		{name: "array", in: `[` + clickJSON(`1709632800000`, `"blue"`) + `]`, rej: ReasonMalformedJSON},
		{name: "string", in: `"click"`, rej: ReasonMalformedJSON},
		{name: "null", in: `null`, rej: ReasonMalformedJSON},
		{name: "raw tab in string", in: clickJSON(`1709632800000`, "\"bl\tue\""), rej: ReasonMalformedJSON},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, err := DecodeClick([]byte(tt.in))
			if tt.rej != "" {
				assertReason(t, err, tt.rej)
				if got != (Click{}) {
					t.Errorf("rejected click returned value %+v", got)
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			if got != tt.want {
				t.Errorf("got %+v, want %+v", got, tt.want)
			}
		})
	}
}

func TestDecodeConversion(t *testing.T) {
	click := civilMs(2024, 3, 5, 9, 0, 0, 0, 0)
	tests := []struct {
		name string
		in   string
		want Conversion
		rej  Reason
	}{
		{name: "minimal", in: `{"click_id":"k-1","ts":"2024-03-05T10:00:00Z"}`,
			want: Conversion{ClickID: "k-1", TS: base2024}},
		{name: "attributed", in: `{"click_id":"k-1","ts":1709632800000,"experiment":"hero-banner","arm":"blue","click_ts":"2024-03-05T09:00:00Z"}`,
			want: Conversion{ClickID: "k-1", TS: base2024, Experiment: "hero-banner", Arm: "blue", ClickTS: click, Attributed: true}},
		{name: "partial attribution", in: `{"click_id":"k-1","ts":1709632800000,"experiment":"hero-banner","arm":"blue"}`,
			want: Conversion{ClickID: "k-1", TS: base2024, Experiment: "hero-banner", Arm: "blue"}},
		{name: "null optional fields", in: `{"click_id":"k-1","ts":1709632800000,"experiment":null,"arm":null,"click_ts":null}`,
			want: Conversion{ClickID: "k-1", TS: base2024}},
		{name: "click_ts only", in: `{"click_id":"k-1","ts":1709632800000,"click_ts":1709629200000}`,
			want: Conversion{ClickID: "k-1", TS: base2024, ClickTS: click}},

		{name: "missing ts", in: `{"click_id":"k-1"}`, rej: ReasonMissingField},
		{name: "missing click_id", in: `{"ts":1709632800000}`, rej: ReasonMissingField},
		{name: "bad click_ts", in: `{"click_id":"k-1","ts":1709632800000,"click_ts":1709629200000.5}`, rej: ReasonBadTimestamp},
		{name: "absurd click_ts", in: `{"click_id":"k-1","ts":1709632800000,"click_ts":1709629200}`, rej: ReasonAbsurdTimestamp},
		{name: "empty experiment", in: `{"click_id":"k-1","ts":1709632800000,"experiment":""}`, rej: ReasonEmptyField},
		{name: "control char in experiment", in: `{"click_id":"k-1","ts":1709632800000,"experiment":"a\u001fb"}`, rej: ReasonInvalidText},
		{name: "duplicate click_ts", in: `{"click_id":"k-1","ts":1709632800000,"click_ts":1709629200000,"click_ts":1709629200001}`, rej: ReasonDuplicateField},
		{name: "click_id too long", in: `{"click_id":"` + strings.Repeat("x", MaxFieldBytes+1) + `","ts":1709632800000}`, rej: ReasonFieldTooLong},
		{name: "trailing comma", in: `{"click_id":"k-1","ts":1709632800000,}`, rej: ReasonMalformedJSON},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, err := DecodeConversion([]byte(tt.in))
			if tt.rej != "" {
				assertReason(t, err, tt.rej)
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			if got != tt.want {
				t.Errorf("got %+v, want %+v", got, tt.want)
			}
		})
	}
}

func TestRejectErrorMessage(t *testing.T) {
	_, err := DecodeClick([]byte(clickJSON(`1.5`, `"blue"`)))
	if err == nil || !strings.HasPrefix(err.Error(), "bad_timestamp: ") {
		t.Fatalf("error %v, want bad_timestamp prefix", err)
	}
	if got := (&RejectError{Reason: ReasonUnknownClick}).Error(); got != "unknown_click" {
		t.Errorf("detail-less error = %q", got)
	}
}

func TestMarshalRoundTrip(t *testing.T) {
	c := Click{ClickID: "k<&>\"1", Experiment: "hero-banner", Arm: "blüe", TS: base2024}
	b, err := c.MarshalJSON()
	if err != nil {
		t.Fatal(err)
	}
	if got, err := DecodeClick(b); err != nil || got != c {
		t.Fatalf("click round trip: %+v, %v (json %s)", got, err, b)
	}
	v := Conversion{ClickID: "k-1", TS: base2024, Arm: "blue"}
	b, err = v.MarshalJSON()
	if err != nil {
		t.Fatal(err)
	}
	if want := `{"click_id":"k-1","ts":1709632800000,"arm":"blue"}`; string(b) != want {
		t.Errorf("conversion json %s, want %s", b, want)
	}
	if got, err := DecodeConversion(b); err != nil || got != v {
		t.Fatalf("conversion round trip: %+v, %v", got, err)
	}
}

func BenchmarkDecodeClick(b *testing.B) {
	in := []byte(`{"click_id":"5f0c8a2e-94b1-4d7e-8d0a-1c2b3a4d5e6f","experiment":"checkout-copy","arm":"short-form","ts":"2025-02-10T09:05:00.500+01:00","ua":"Mozilla/5.0"}`)
	b.SetBytes(int64(len(in)))
	b.ReportAllocs()
	for b.Loop() {
		if _, err := DecodeClick(in); err != nil {
			b.Fatal(err)
		}
	}
}

func BenchmarkDecodeConversionEpoch(b *testing.B) {
	in := []byte(`{"click_id":"5f0c8a2e-94b1-4d7e-8d0a-1c2b3a4d5e6f","ts":1739178300500,"experiment":"checkout-copy","arm":"short-form","click_ts":1739178000000}`)
	b.SetBytes(int64(len(in)))
	b.ReportAllocs()
	for b.Loop() {
		if _, err := DecodeConversion(in); err != nil {
			b.Fatal(err)
		}
	}
}
