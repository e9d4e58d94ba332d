package sqlwire

import "github.com/sidetrend/sidetrend/sqlwire/livetables"

// The forecast tables themselves live in package livetables; these names
// keep the endpoint's API in one place for the sidecar.

// Source is the read-only view of the sidecar's stored state the tables
// are computed from (livetables.Source).
type Source = livetables.Source

// SeriesInfo describes one tracked series (livetables.SeriesInfo).
type SeriesInfo = livetables.SeriesInfo

// Schema is the schema the endpoint's tables live in, on both sides.
const Schema = livetables.Schema

// MaxHorizon is the longest forecast the forecast table gives.
const MaxHorizon = livetables.MaxHorizon
