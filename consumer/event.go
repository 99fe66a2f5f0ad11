package consumer

import (
	"bytes"
	"encoding/json"
	"fmt"
	"strconv"
	"time"
	"unicode"
	"unicode/utf8"
)

// Limits applied to every decoded event.
const (
	// MaxFieldBytes is the longest click_id, experiment or arm accepted, in
	// bytes of UTF-8 after JSON unescaping.
	MaxFieldBytes = 256

	// MinEventTime is the earliest accepted event time,
	// 2000-01-01T00:00:00Z in Unix ms (inclusive). Anything earlier is taken
	// to be a unit mix-up (seconds instead of milliseconds) or a zero value.
	MinEventTime int64 = 946_684_800_000

	// MaxEventTime is the end of the accepted event times,
	// 2200-01-01T00:00:00Z in Unix ms (exclusive). Anything later is taken
	// to be a unit mix-up (microseconds or nanoseconds instead of ms).
	MaxEventTime int64 = 7_258_118_400_000

	// maxTimestampText bounds an RFC 3339 string before it is parsed; the
	// longest legal form ("2006-01-02T15:04:05.999999999-07:00") has 35 bytes.
	maxTimestampText = 64
)

// Reason is the machine-readable cause of a rejected event. Values are
// stable snake_case strings, suitable as metric labels.
type Reason string

// Rejection reasons. Decoding produces the first group, the joins the second.
const (
	// ReasonMalformedJSON: the input is not a single well-formed JSON object.
	ReasonMalformedJSON Reason = "malformed_json"
	// ReasonLineTooLong: a JSON Lines line exceeds the reader's limit.
	ReasonLineTooLong Reason = "line_too_long"
	// ReasonDuplicateField: a known field appears twice in one object
	// (JSON parsers disagree on which copy wins, so neither is trusted).
	ReasonDuplicateField Reason = "duplicate_field"
	// ReasonMissingField: a required field is absent or null.
	ReasonMissingField Reason = "missing_field"
	// ReasonWrongType: a field has the wrong JSON type (e.g. a number where
	// a string is required).
	ReasonWrongType Reason = "wrong_type"
	// ReasonEmptyField: a string field is the empty string.
	ReasonEmptyField Reason = "empty_field"
	// ReasonFieldTooLong: a string field exceeds MaxFieldBytes.
	ReasonFieldTooLong Reason = "field_too_long"
	// ReasonInvalidText: a string field holds invalid UTF-8, a control
	// character, or U+FFFD (the replacement character invalid input decays to).
	ReasonInvalidText Reason = "invalid_text"
	// ReasonBadTimestamp: a timestamp is neither an RFC 3339 string nor an
	// integer number of epoch milliseconds.
	ReasonBadTimestamp Reason = "bad_timestamp"
	// ReasonAbsurdTimestamp: a timestamp parses but lies outside
	// [MinEventTime, MaxEventTime).
	ReasonAbsurdTimestamp Reason = "absurd_timestamp"

	// ReasonDuplicateClick: a click_id already seen on the click stream; the
	// first click is kept.
	ReasonDuplicateClick Reason = "duplicate_click"
	// ReasonUnknownClick: a conversion whose click is not known and which
	// does not carry its own attribution.
	ReasonUnknownClick Reason = "unknown_click"
	// ReasonAttributionMismatch: a conversion's experiment, arm or click_ts
	// disagrees with the known click of the same click_id.
	ReasonAttributionMismatch Reason = "attribution_mismatch"
	// ReasonConversionBeforeClick: conversion time earlier than click time.
	ReasonConversionBeforeClick Reason = "conversion_before_click"
	// ReasonConversionAfterWindow: conversion delay exceeds the attribution
	// window.
	ReasonConversionAfterWindow Reason = "conversion_after_window"
	// ReasonDuplicateConversion: a click that already converted; a click
	// converts at most once and the first conversion is kept.
	ReasonDuplicateConversion Reason = "duplicate_conversion"
	// ReasonOrphanExpired: a conversion whose click never arrived within the
	// streaming join's waiting time (streaming join only).
	ReasonOrphanExpired Reason = "orphan_expired"
	// ReasonCapExceeded: an event dropped because a join buffer is at its
	// configured capacity (streaming join only).
	ReasonCapExceeded Reason = "cap_exceeded"
	// ReasonMissingAttribution: a conversion without experiment, arm or
	// click_ts where conversions must carry their attribution (streaming
	// join with attribution: carried only).
	ReasonMissingAttribution Reason = "missing_attribution"
)

// RejectError is a rejected event. Callers retrieve it with errors.As and
// branch on Reason; Detail is for people and may change between releases.
// Bad events are never retriable.
type RejectError struct {
	Reason Reason
	Detail string
}

// Error implements error as "reason: detail".
func (e *RejectError) Error() string {
	if e.Detail == "" {
		return string(e.Reason)
	}
	return string(e.Reason) + ": " + e.Detail
}

func reject(r Reason, format string, args ...any) *RejectError {
	return &RejectError{Reason: r, Detail: fmt.Sprintf(format, args...)}
}

// Click is one ad or page click that entered an experiment arm.
type Click struct {
	ClickID    string
	Experiment string
	Arm        string
	// TS is the click time in Unix ms.
	TS int64
}

// Conversion is one conversion, identified by the click it belongs to.
// Experiment, Arm and ClickTS are optional: producers that know the click
// may copy them in, which lets a conversion stand on its own when its click
// is not in the click stream.
type Conversion struct {
	ClickID string
	// TS is the conversion time in Unix ms.
	TS         int64
	Experiment string // "" when absent
	Arm        string // "" when absent
	ClickTS    int64  // 0 when absent (0 is never a valid event time)
	// Attributed is true when Experiment, Arm and ClickTS are all present.
	Attributed bool
}

// field bits, used to find missing and duplicated fields.
const (
	fClickID = 1 << iota
	fExperiment
	fArm
	fTS
	fClickTS
)

// event is the union of the click and conversion fields as found in one
// JSON object.
type event struct {
	keys       int // fields whose key appeared, null or not
	seen       int // fields with a non-null value
	clickID    string
	experiment string
	arm        string
	ts         int64
	clickTS    int64
}

// DecodeClick decodes one click from a JSON object. Required fields:
// click_id, experiment, arm (non-empty strings of at most MaxFieldBytes
// bytes of printable UTF-8) and ts (an RFC 3339 string or an integer of
// epoch milliseconds within [MinEventTime, MaxEventTime)). Unknown fields
// are ignored; a known field given twice is rejected; keys match exactly
// (case-sensitive). Every failure is a *RejectError.
func DecodeClick(b []byte) (Click, error) {
	var e event
	if err := decodeEvent(b, &e, fClickID|fExperiment|fArm|fTS); err != nil {
		return Click{}, err
	}
	for _, req := range []struct {
		bit  int
		name string
	}{{fClickID, "click_id"}, {fExperiment, "experiment"}, {fArm, "arm"}, {fTS, "ts"}} {
		if e.seen&req.bit == 0 {
			return Click{}, reject(ReasonMissingField, "%s is required", req.name)
		}
	}
	return Click{ClickID: e.clickID, Experiment: e.experiment, Arm: e.arm, TS: e.ts}, nil
}

// DecodeConversion decodes one conversion from a JSON object. Required:
// click_id and ts; optional: experiment, arm and click_ts, validated like
// the click fields when present. A conversion carrying only some of the
// optional fields is accepted with Attributed false. Rules as in
// DecodeClick; every failure is a *RejectError.
func DecodeConversion(b []byte) (Conversion, error) {
	var e event
	if err := decodeEvent(b, &e, fClickID|fExperiment|fArm|fTS|fClickTS); err != nil {
		return Conversion{}, err
	}
	if e.seen&fClickID == 0 {
		return Conversion{}, reject(ReasonMissingField, "click_id is required")
	}
	if e.seen&fTS == 0 {
		return Conversion{}, reject(ReasonMissingField, "ts is required")
	}
	const attr = fExperiment | fArm | fClickTS
	return Conversion{
		ClickID:    e.clickID,
		TS:         e.ts,
		Experiment: e.experiment,
		Arm:        e.arm,
		ClickTS:    e.clickTS,
		Attributed: e.seen&attr == attr,
	}, nil
}

// MarshalJSON encodes the click in the form DecodeClick reads, with ts as
// epoch milliseconds.
func (c Click) MarshalJSON() ([]byte, error) {
	return json.Marshal(struct {
		ClickID    string `json:"click_id"`
		Experiment string `json:"experiment"`
		Arm        string `json:"arm"`
		TS         int64  `json:"ts"`
	}{c.ClickID, c.Experiment, c.Arm, c.TS})
}

// MarshalJSON encodes the conversion in the form DecodeConversion reads,
// with times as epoch milliseconds; absent optional fields are left out.
func (c Conversion) MarshalJSON() ([]byte, error) {
	return json.Marshal(struct {
		ClickID    string `json:"click_id"`
		TS         int64  `json:"ts"`
		Experiment string `json:"experiment,omitempty"`
		Arm        string `json:"arm,omitempty"`
		ClickTS    int64  `json:"click_ts,omitempty"`
	}{c.ClickID, c.TS, c.Experiment, c.Arm, c.ClickTS})
}

// decodeEvent walks the top-level members of the JSON object in b and fills
// e with the fields whose bits are in allowed; other members are ignored.
// json.Valid runs first, so the scanner below only ever sees well-formed
// JSON and can stay small.
func decodeEvent(b []byte, e *event, allowed int) error {
	if !json.Valid(b) {
		return reject(ReasonMalformedJSON, "not valid JSON")
	}
	i := skipWS(b, 0)
	if b[i] != '{' {
		return reject(ReasonMalformedJSON, "event is not a JSON object")
	}
	i = skipWS(b, i+1)
	if b[i] == '}' {
		return nil
	}
	for {
		kEnd := scanString(b, i)
		key := b[i:kEnd]
		i = skipWS(b, kEnd)
		i = skipWS(b, i+1) // past ':'
		vEnd := scanValue(b, i)
		if err := e.setField(key, b[i:vEnd], allowed); err != nil {
			return err
		}
		i = skipWS(b, vEnd)
		if b[i] == '}' {
			return nil
		}
		i = skipWS(b, i+1) // past ','
	}
}

func (e *event) setField(rawKey, val []byte, allowed int) error {
	var bit int
	var name string
	switch {
	case keyIs(rawKey, "click_id"):
		bit, name = fClickID, "click_id"
	case keyIs(rawKey, "experiment"):
		bit, name = fExperiment, "experiment"
	case keyIs(rawKey, "arm"):
		bit, name = fArm, "arm"
	case keyIs(rawKey, "ts"):
		bit, name = fTS, "ts"
	case keyIs(rawKey, "click_ts"):
		bit, name = fClickTS, "click_ts"
	}
	if bit&allowed == 0 {
		return nil
	}
	if e.keys&bit != 0 {
		return reject(ReasonDuplicateField, "%s appears more than once", name)
	}
	e.keys |= bit
	if bytes.Equal(val, []byte("null")) {
		return nil // null counts as absent
	}
	e.seen |= bit
	var err error
	switch bit {
	case fClickID:
		e.clickID, err = decodeText(name, val)
	case fExperiment:
		e.experiment, err = decodeText(name, val)
	case fArm:
		e.arm, err = decodeText(name, val)
	case fTS:
		e.ts, err = decodeTimestamp(name, val)
	case fClickTS:
		e.clickTS, err = decodeTimestamp(name, val)
	}
	return err
}

// keyIs reports whether the JSON string literal raw (with quotes) equals
// want. Escaped keys are unescaped first, so "click\u005fid" matches.
func keyIs(raw []byte, want string) bool {
	inner := raw[1 : len(raw)-1]
	if bytes.IndexByte(inner, '\\') < 0 {
		return string(inner) == want
	}
	var s string
	if json.Unmarshal(raw, &s) != nil {
		return false
	}
	return s == want
}

// decodeText decodes a JSON string literal holding an id or a name and
// checks it against the text rules: non-empty, at most MaxFieldBytes bytes,
// valid UTF-8 with no control characters and no U+FFFD.
func decodeText(name string, val []byte) (string, error) {
	if val[0] != '"' {
		return "", reject(ReasonWrongType, "%s must be a string", name)
	}
	// encoding/json silently turns invalid UTF-8 into U+FFFD; check the raw
	// bytes so that two distinct invalid ids cannot collide.
	if !utf8.Valid(val) {
		return "", reject(ReasonInvalidText, "%s is not valid UTF-8", name)
	}
	inner := val[1 : len(val)-1]
	var s string
	if bytes.IndexByte(inner, '\\') < 0 {
		if len(inner) > MaxFieldBytes {
			return "", reject(ReasonFieldTooLong, "%s has %d bytes, limit %d", name, len(inner), MaxFieldBytes)
		}
		s = string(inner)
	} else if err := json.Unmarshal(val, &s); err != nil {
		return "", reject(ReasonMalformedJSON, "%s: %v", name, err)
	}
	switch {
	case s == "":
		return "", reject(ReasonEmptyField, "%s is empty", name)
	case len(s) > MaxFieldBytes:
		return "", reject(ReasonFieldTooLong, "%s has %d bytes, limit %d", name, len(s), MaxFieldBytes)
	}
	for _, r := range s {
		if r == utf8.RuneError || unicode.IsControl(r) {
			return "", reject(ReasonInvalidText, "%s contains character %U", name, r)
		}
	}
	return s, nil
}

// decodeTimestamp decodes a JSON value holding an RFC 3339 string or an
// integer of epoch milliseconds and checks the sane range.
func decodeTimestamp(name string, val []byte) (int64, error) {
	ms, err := parseTimestamp(name, val)
	if err != nil {
		return 0, err
	}
	if ms < MinEventTime || ms >= MaxEventTime {
		return 0, reject(ReasonAbsurdTimestamp, "%s %d ms is outside years 2000..2199", name, ms)
	}
	return ms, nil
}

// parseTimestamp converts a timestamp to Unix ms without the range check.
// Sub-millisecond digits of an RFC 3339 time are truncated (toward the past).
func parseTimestamp(name string, val []byte) (int64, error) {
	switch c := val[0]; {
	case c == '"':
		if len(val) > maxTimestampText+2 {
			return 0, reject(ReasonBadTimestamp, "%s string is too long for RFC 3339", name)
		}
		s := string(val[1 : len(val)-1])
		if bytes.IndexByte(val, '\\') >= 0 {
			if err := json.Unmarshal(val, &s); err != nil {
				return 0, reject(ReasonBadTimestamp, "%s: %v", name, err)
			}
		}
		s, ok := rfc3339Shape(s)
		if !ok {
			return 0, reject(ReasonBadTimestamp, "%s %q is not RFC 3339", name, s)
		}
		t, err := time.Parse(time.RFC3339Nano, s)
		if err != nil {
			return 0, reject(ReasonBadTimestamp, "%s %q is not RFC 3339", name, s)
		}
		return t.UnixMilli(), nil
	case c == '-' || (c >= '0' && c <= '9'):
		if bytes.ContainsAny(val, ".eE") {
			return 0, reject(ReasonBadTimestamp, "%s %s: epoch milliseconds must be an integer", name, val)
		}
		ms, err := strconv.ParseInt(string(val), 10, 64)
		if err != nil {
			// A valid JSON integer only fails to parse by overflowing int64.
			return 0, reject(ReasonAbsurdTimestamp, "%s %.40s overflows int64", name, val)
		}
		return ms, nil
	default:
		return 0, reject(ReasonWrongType, "%s must be an RFC 3339 string or epoch milliseconds", name)
	}
}

// rfc3339Shape checks what time.Parse leaves loose in the RFC 3339 grammar
// (RFC 3339 section 5.6): the fraction separator must be '.', not ',', and
// a numeric offset must have hours 00-23 and minutes 00-59. It returns s
// with a lower-case "t" or "z" (allowed by the section 5.6 note) in upper
// case, ready for time.Parse, which checks the date and time fields.
func rfc3339Shape(s string) (string, bool) {
	if len(s) < len("2006-01-02T15:04:05Z") {
		return s, false
	}
	if s[10] == 't' || s[len(s)-1] == 'z' {
		b := []byte(s)
		if b[10] == 't' {
			b[10] = 'T'
		}
		if b[len(b)-1] == 'z' {
			b[len(b)-1] = 'Z'
		}
		s = string(b)
	}
	i := 19
	if s[i] == '.' {
		for i++; i < len(s) && s[i] >= '0' && s[i] <= '9'; i++ {
		}
		if i == 20 {
			return s, false // "." without digits
		}
	}
	off := s[i:]
	switch {
	case off == "Z":
		return s, true
	case len(off) == 6 && (off[0] == '+' || off[0] == '-') && off[3] == ':':
		h, m := twoDigits(off[1:3]), twoDigits(off[4:6])
		return s, h >= 0 && h <= 23 && m >= 0 && m <= 59
	}
	return s, false
}

// twoDigits returns the value of a two-digit decimal string, or -1.
func twoDigits(s string) int {
	if s[0] < '0' || s[0] > '9' || s[1] < '0' || s[1] > '9' {
		return -1
	}
	return int(s[0]-'0')*10 + int(s[1]-'0')
}

// The scanners below assume b holds well-formed JSON (checked by json.Valid)
// and return the index just past the construct that starts at i.

func skipWS(b []byte, i int) int {
	for i < len(b) && (b[i] == ' ' || b[i] == '\t' || b[i] == '\n' || b[i] == '\r') {
		i++
	}
	return i
}

// scanString expects b[i] == '"'.
func scanString(b []byte, i int) int {
	for i++; i < len(b); i++ {
		switch b[i] {
		case '\\':
			i++
		case '"':
			return i + 1
		}
	}
	return len(b)
}

func scanValue(b []byte, i int) int {
	switch b[i] {
	case '"':
		return scanString(b, i)
	case '{', '[':
		depth := 0
		for i < len(b) {
			switch b[i] {
			case '"':
				i = scanString(b, i)
				continue
			case '{', '[':
				depth++
			case '}', ']':
				depth--
				if depth == 0 {
					return i + 1
				}
			}
			i++
		}
		return len(b)
	default: // number, true, false, null
		for i < len(b) {
			switch b[i] {
			case ',', '}', ']', ' ', '\t', '\n', '\r':
				return i
			}
			i++
		}
		return len(b)
	}
}
