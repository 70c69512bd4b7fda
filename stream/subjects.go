package stream

import (
	"strconv"
	"strings"

	"github.com/plumb-forecast/plumb/model"
)

// Subjects of the wire contract (DESIGN.md, "Wire contracts"). Every
// per-site subject ends with one token holding the site id, which
// model.ValidID keeps free of '.', '*' and '>'.
//
//	plumb.in.weather.<site>     weather runs, JSON (Decoder.Weather)
//	plumb.in.meter.<site>       meter readings, JSON (Decoder.Meter)
//	plumb.out.quantiles.<site>  quantile bundles, Arrow IPC stream (BundleEncoder)
//	plumb.out.alarms.<site>     coverage and input alarms, JSON
//	plumb.out.rejects           refused inputs, JSON (Reject)
const (
	// InputsWildcard matches every input subject, weather and meter.
	InputsWildcard = "plumb.in.>"
	// RejectsSubject carries one Reject payload per refused input message.
	RejectsSubject = "plumb.out.rejects"
	// QuantilesWildcard matches the quantile bundles of every site.
	QuantilesWildcard = "plumb.out.quantiles.>"
	// AlarmsWildcard matches the alarms of every site.
	AlarmsWildcard = "plumb.out.alarms.>"
)

const (
	weatherPrefix   = "plumb.in.weather."
	meterPrefix     = "plumb.in.meter."
	quantilesPrefix = "plumb.out.quantiles."
	alarmsPrefix    = "plumb.out.alarms."
)

// WeatherSubject returns the subject weather runs of site are published on.
// It panics if site is not a valid site id (model.ValidID): ids come from the
// validated registry, so an invalid one is a programming error.
func WeatherSubject(site string) string { return siteSubject(weatherPrefix, site) }

// MeterSubject returns the subject meter readings of site are published on.
// It panics if site is not a valid site id.
func MeterSubject(site string) string { return siteSubject(meterPrefix, site) }

// QuantilesSubject returns the subject the quantile bundles of site are
// published on. It panics if site is not a valid site id.
func QuantilesSubject(site string) string { return siteSubject(quantilesPrefix, site) }

// AlarmsSubject returns the subject the alarms of site are published on. It
// panics if site is not a valid site id.
func AlarmsSubject(site string) string { return siteSubject(alarmsPrefix, site) }

func siteSubject(prefix, site string) string {
	if !model.ValidID(site) {
		panic("stream: invalid site id " + quote(site) + " in a subject")
	}
	return prefix + site
}

// InputKind tells weather runs from meter readings. The zero value is no
// kind.
type InputKind int

// Input kinds.
const (
	InputWeather InputKind = iota + 1
	InputMeter
)

// String returns "weather", "meter", or "InputKind(n)" for other values.
func (k InputKind) String() string {
	switch k {
	case InputWeather:
		return "weather"
	case InputMeter:
		return "meter"
	}
	return "InputKind(" + strconv.Itoa(int(k)) + ")"
}

// ParseInputSubject splits an input subject into its kind and site id. Any
// other subject, or one whose site token is not a valid site id, gives a
// *RejectError with reason ReasonBadSubject. It does not
// consult the site registry (the decoders do) and does not allocate on
// success.
func ParseInputSubject(subject string) (kind InputKind, site string, err error) {
	if rest, ok := strings.CutPrefix(subject, weatherPrefix); ok {
		kind, site = InputWeather, rest
	} else if rest, ok := strings.CutPrefix(subject, meterPrefix); ok {
		kind, site = InputMeter, rest
	} else {
		return 0, "", &RejectError{Reason: ReasonBadSubject,
			Detail: "subject " + quote(subject) + " is not plumb.in.weather.<site> or plumb.in.meter.<site>"}
	}
	if !model.ValidID(site) {
		return 0, "", &RejectError{Reason: ReasonBadSubject,
			Detail: "subject " + quote(subject) + ": site token is not a valid site id"}
	}
	return kind, site, nil
}
