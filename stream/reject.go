package stream

import (
	"errors"
	"strconv"
)

// Reason is the machine-readable cause of a rejected input message. It is
// carried by RejectError, published in Reject payloads on RejectsSubject and
// used as a metric label, so the strings below are part of the wire contract
// and never change meaning.
type Reason string

// Reasons for rejecting an input message.
const (
	// ReasonMalformed: the payload is not JSON, is not an object or an array
	// of objects, is an empty batch, or a field has the wrong JSON type (a
	// string where a number belongs, a number where a time belongs...).
	ReasonMalformed Reason = "malformed"
	// ReasonMissingField: a required field is absent or null, or a weather
	// row gives no variable at all.
	ReasonMissingField Reason = "missing_field"
	// ReasonUnknownSite: the site is not in the registry.
	ReasonUnknownSite Reason = "unknown_site"
	// ReasonSiteMismatch: the site named in the payload differs from the site
	// of the subject the message came on.
	ReasonSiteMismatch Reason = "site_mismatch"
	// ReasonNotFinite: a number is NaN or infinite, written as a string
	// ("NaN", "Infinity"), as a bare non-standard JSON token, or as a JSON
	// number beyond the float64 range (1e400).
	ReasonNotFinite Reason = "not_finite"
	// ReasonOutOfRange: a finite value is physically implausible: power below
	// zero beyond a small tolerance or above the site's capacity times the
	// decoder's power factor, availability outside 0..1, or a known weather
	// variable outside its plausible range.
	ReasonOutOfRange Reason = "out_of_range"
	// ReasonBadInterval: an interval length is not a whole number of minutes
	// in 1..1440, an interval does not start on a multiple of its length
	// counted from 00:00 UTC, or the valid intervals of one weather run
	// overlap or repeat.
	ReasonBadInterval Reason = "bad_interval"
	// ReasonBadTime: a time is not RFC 3339, lies before 1990 or from 2200
	// on, a weather row is valid more than 10 days before or 16 days after
	// its issue time, or the readings of one message span more than 31 days.
	ReasonBadTime Reason = "bad_time"
	// ReasonTooLarge: the payload is over the decoder's MaxBytes or the batch
	// holds more than MaxRows rows.
	ReasonTooLarge Reason = "too_large"
	// ReasonDuplicate: the site actor already holds this input (reported by
	// the worker, not by the decoder).
	ReasonDuplicate Reason = "duplicate"
	// ReasonTooLate: the input arrived beyond the lateness window (reported
	// by the worker, not by the decoder).
	ReasonTooLate Reason = "too_late"
	// ReasonBadSubject: the message came on a subject that is not an input
	// subject, or whose site token is not a valid site id.
	ReasonBadSubject Reason = "bad_subject"
)

// Reasons returns every Reason, in a fixed order (for example to create one
// metric series per reason up front). The caller owns the returned slice.
func Reasons() []Reason {
	return []Reason{
		ReasonMalformed, ReasonMissingField, ReasonUnknownSite, ReasonSiteMismatch,
		ReasonNotFinite, ReasonOutOfRange, ReasonBadInterval, ReasonBadTime,
		ReasonTooLarge, ReasonDuplicate, ReasonTooLate, ReasonBadSubject,
	}
}

// RejectError reports why an input message was refused. Every error the
// input decoders return is a *RejectError; use RejectOf to get the reason of
// an error that may wrap one.
type RejectError struct {
	// Reason is the machine-readable cause.
	Reason Reason
	// Site is the site the message is about: the payload's site when it is
	// readable as a site id, else the subject's; empty when neither is known.
	Site string
	// Detail is a short human-readable explanation (the row, the field, the
	// offending value, truncated).
	Detail string
}

// Error returns a message such as `reject unknown_site: site "x": row 1: ...`.
func (e *RejectError) Error() string {
	s := "reject " + string(e.Reason)
	if e.Site != "" {
		s += ": site " + strconv.Quote(e.Site)
	}
	if e.Detail != "" {
		s += ": " + e.Detail
	}
	return s
}

// RejectOf returns the reason of the first *RejectError in err's chain, and
// false when there is none.
func RejectOf(err error) (Reason, bool) {
	var re *RejectError
	if errors.As(err, &re) {
		return re.Reason, true
	}
	return "", false
}

// Reject is the JSON payload published on RejectsSubject for every refused
// input message. It never holds the payload itself, only its size.
type Reject struct {
	// Subject is the subject the message came on.
	Subject string `json:"subject"`
	// Site is the site the message was about, or empty when unknown.
	Site string `json:"site"`
	// Reason is one of the Reason strings.
	Reason string `json:"reason"`
	// Detail is a short human-readable explanation.
	Detail string `json:"detail"`
	// Bytes is the size of the refused payload.
	Bytes int `json:"bytes"`
}

// NewReject builds the Reject payload for a message of size bytes received
// on subject and refused with err. When err holds no *RejectError, the
// reason is ReasonMalformed and the detail is err's message.
func NewReject(subject string, size int, err error) Reject {
	r := Reject{Subject: subject, Bytes: size}
	var re *RejectError
	if errors.As(err, &re) {
		r.Site, r.Reason, r.Detail = re.Site, string(re.Reason), re.Detail
	} else {
		r.Reason = string(ReasonMalformed)
		if err != nil {
			r.Detail = err.Error()
		}
	}
	return r
}

// maxQuoted bounds how much of an input string a reject detail repeats.
const maxQuoted = 64

// quote returns s quoted for a reject detail, truncated to maxQuoted bytes
// (never splitting a UTF-8 sequence) and marked with "..." when cut.
func quote(s string) string {
	if len(s) <= maxQuoted {
		return strconv.Quote(s)
	}
	cut := maxQuoted
	for cut > 0 && s[cut]&0xC0 == 0x80 {
		cut--
	}
	return strconv.Quote(s[:cut]) + "..."
}
