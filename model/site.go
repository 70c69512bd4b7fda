// Package model holds what plumb knows about sites and their inputs, the
// forecasters that turn weather runs and meter readings into quantile
// forecasts, and the quantile bundle they produce.
//
// # Event time
//
// Nothing in this package reads the wall clock: every time comes from the
// data (issue times, valid intervals, meter intervals).
//
// # Units
//
// Power is in MW, times are UTC, intervals are in whole minutes. Weather
// variables are named <quantity>_<unit> as in the canonical history layout
// (ghi_wm2, wind_ms, temp_c, ...).
package model

import (
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"os"
	"strings"
)

// Kind is the technology of a site.
type Kind string

// Site kinds.
const (
	KindPV   Kind = "pv"
	KindWind Kind = "wind"
)

// Site is one plant in the registry. Only ID, Kind and CapacityMW are
// required; the rest improve the physical layer when known.
type Site struct {
	ID         string  `json:"id"`
	Kind       Kind    `json:"kind"`
	CapacityMW float64 `json:"capacity_mw"`
	// Lat and Lon in degrees (north and east positive); nil when unknown.
	Lat        *float64 `json:"lat,omitempty"`
	Lon        *float64 `json:"lon,omitempty"`
	ElevationM *float64 `json:"elevation_m,omitempty"`
	// TiltDeg and AzimuthDeg describe a PV plane (azimuth east of north).
	TiltDeg    *float64 `json:"tilt_deg,omitempty"`
	AzimuthDeg *float64 `json:"azimuth_deg,omitempty"`
	// HubHeightM is a wind turbine's hub height.
	HubHeightM *float64 `json:"hub_height_m,omitempty"`
	Note       string   `json:"note,omitempty"`
}

// HasLocation reports whether the site's latitude and longitude are known.
func (s *Site) HasLocation() bool { return s.Lat != nil && s.Lon != nil }

// ErrBadSite is wrapped by every site validation error.
var ErrBadSite = errors.New("bad site")

// Validate checks one site object.
func (s *Site) Validate() error {
	if s.ID == "" {
		return fmt.Errorf("%w: missing id", ErrBadSite)
	}
	if !ValidID(s.ID) {
		return fmt.Errorf("%w: id %q: use letters, digits, '-' and '_' only (it becomes a subject token)", ErrBadSite, s.ID)
	}
	if s.Kind != KindPV && s.Kind != KindWind {
		return fmt.Errorf("%w: site %s: kind %q is not %q or %q", ErrBadSite, s.ID, s.Kind, KindPV, KindWind)
	}
	if !(s.CapacityMW > 0) || math.IsInf(s.CapacityMW, 0) {
		return fmt.Errorf("%w: site %s: capacity_mw %v must be a positive finite number", ErrBadSite, s.ID, s.CapacityMW)
	}
	if s.Lat != nil && (math.IsNaN(*s.Lat) || *s.Lat < -90 || *s.Lat > 90) {
		return fmt.Errorf("%w: site %s: lat %v outside [-90, 90]", ErrBadSite, s.ID, *s.Lat)
	}
	if s.Lon != nil && (math.IsNaN(*s.Lon) || *s.Lon < -180 || *s.Lon > 180) {
		return fmt.Errorf("%w: site %s: lon %v outside [-180, 180]", ErrBadSite, s.ID, *s.Lon)
	}
	if (s.Lat == nil) != (s.Lon == nil) {
		return fmt.Errorf("%w: site %s: give both lat and lon, or neither", ErrBadSite, s.ID)
	}
	return nil
}

// ValidID reports whether id can be used as a site id: 1 to 64 characters
// from letters, digits, '-' and '_' (it is used as a NATS subject token).
func ValidID(id string) bool {
	if len(id) == 0 || len(id) > 64 {
		return false
	}
	for _, r := range id {
		switch {
		case r >= 'a' && r <= 'z', r >= 'A' && r <= 'Z', r >= '0' && r <= '9', r == '-', r == '_':
		default:
			return false
		}
	}
	return true
}

// ParseSites decodes and validates a JSON array of sites. Ids must be unique.
func ParseSites(data []byte) ([]Site, error) {
	dec := json.NewDecoder(strings.NewReader(string(data)))
	dec.DisallowUnknownFields()
	var sites []Site
	if err := dec.Decode(&sites); err != nil {
		return nil, fmt.Errorf("%w: %w", ErrBadSite, err)
	}
	if len(sites) == 0 {
		return nil, fmt.Errorf("%w: the registry holds no site", ErrBadSite)
	}
	seen := make(map[string]bool, len(sites))
	for i := range sites {
		if err := sites[i].Validate(); err != nil {
			return nil, fmt.Errorf("site #%d: %w", i+1, err)
		}
		if seen[sites[i].ID] {
			return nil, fmt.Errorf("%w: site id %q appears twice", ErrBadSite, sites[i].ID)
		}
		seen[sites[i].ID] = true
	}
	return sites, nil
}

// LoadSites reads a sites.json file (an array of site objects).
func LoadSites(path string) ([]Site, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("load sites: %w", err)
	}
	sites, err := ParseSites(data)
	if err != nil {
		return nil, fmt.Errorf("load sites %s: %w", path, err)
	}
	return sites, nil
}
