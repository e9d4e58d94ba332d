package livetables

import (
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"math/big"
	"slices"
	"sort"
	"strconv"
	"time"

	"github.com/jackc/pgx/v5/pgtype"

	"github.com/sidetrend/sidetrend/calendar"
	"github.com/sidetrend/sidetrend/estimator"
)

// Schema is the schema the endpoint's tables live in, on both sides.
const Schema = "sidetrend_live"

// MaxHorizon is the longest forecast the forecast table gives.
const MaxHorizon = 10000

// Column is one column of a table. Parameter columns are never NULL and
// their domains decide which rows the table computes.
type Column struct {
	Name  string
	SQL   string // the column's type, as the computed rows are sent
	Kind  Kind
	Param bool // a parameter column: never NULL, its domain decides what is computed
}

// Kind is how a parameter column compares.
type Kind uint8

const (
	Text Kind = iota
	Float
	Int
)

// Table is one of the endpoint's tables.
type Table struct {
	Name    string
	Columns []Column
	// RowBytes is about what one computed row holds until Postgres has it.
	RowBytes int64
	scan     func(ctx context.Context, req *scanRequest) (*Rows, error)
}

// Column is the position of a column, or -1.
func (t *Table) Column(name string) int {
	for i, c := range t.Columns {
		if c.Name == name {
			return i
		}
	}
	return -1
}

// scanRequest is what a table scan gets: the source and the Domain of each
// column (meaningful for parameter columns).
type scanRequest struct {
	table   *Table
	src     Source
	domains []Domain
	used    []int  // the columns to fill; nil: all
	budget  Budget // nil: unbounded
}

// Rows holds computed rows column by column, as they are sent to
// Postgres: one array per column.
type Rows struct {
	N     int // rows
	table *Table
	text  [][]string
	f8    [][]pgtype.Float8
	i4    [][]int32
	i8    [][]int64
	ts    [][]pgtype.Timestamptz
	slots []int // per column: its index in the slice of its type
}

func newRows(t *Table) *Rows {
	rs := &Rows{table: t}
	for _, c := range t.Columns {
		switch c.SQL {
		case "text":
			rs.slots = append(rs.slots, len(rs.text))
			rs.text = append(rs.text, nil)
		case "float8":
			rs.slots = append(rs.slots, len(rs.f8))
			rs.f8 = append(rs.f8, nil)
		case "int4":
			rs.slots = append(rs.slots, len(rs.i4))
			rs.i4 = append(rs.i4, nil)
		case "int8":
			rs.slots = append(rs.slots, len(rs.i8))
			rs.i8 = append(rs.i8, nil)
		case "timestamptz":
			rs.slots = append(rs.slots, len(rs.ts))
			rs.ts = append(rs.ts, nil)
		}
	}
	return rs
}

// grow makes room for n more rows in every column.
func (rs *Rows) grow(n int) {
	for i := range rs.text {
		rs.text[i] = slices.Grow(rs.text[i], n)
	}
	for i := range rs.f8 {
		rs.f8[i] = slices.Grow(rs.f8[i], n)
	}
	for i := range rs.i4 {
		rs.i4[i] = slices.Grow(rs.i4[i], n)
	}
	for i := range rs.i8 {
		rs.i8[i] = slices.Grow(rs.i8[i], n)
	}
	for i := range rs.ts {
		rs.ts[i] = slices.Grow(rs.ts[i], n)
	}
}

// encodeArray appends column i in the binary format of a Postgres array
// (array_send: dimensions, null flag, element type, then each element as
// its length and its binary form; -1 for NULL).
func (rs *Rows) EncodeArray(i int, buf []byte) []byte {
	t := rs.table
	k := rs.slots[i]
	sql := t.Columns[i].SQL
	nulls := int32(0)
	switch sql {
	case "float8":
		for _, v := range rs.f8[k] {
			if !v.Valid {
				nulls = 1
			}
		}
	case "timestamptz":
		for _, v := range rs.ts[k] {
			if !v.Valid {
				nulls = 1
			}
		}
	}
	be := binary.BigEndian
	buf = be.AppendUint32(buf, 1)
	buf = be.AppendUint32(buf, uint32(nulls))
	buf = be.AppendUint32(buf, elemOID[sql])
	buf = be.AppendUint32(buf, uint32(rs.N))
	buf = be.AppendUint32(buf, 1)
	switch sql {
	case "text":
		for _, v := range rs.text[k] {
			buf = be.AppendUint32(buf, uint32(len(v)))
			buf = append(buf, v...)
		}
	case "float8":
		for _, v := range rs.f8[k] {
			if !v.Valid {
				buf = be.AppendUint32(buf, 0xffffffff)
				continue
			}
			buf = be.AppendUint32(buf, 8)
			buf = be.AppendUint64(buf, math.Float64bits(v.Float64))
		}
	case "int4":
		for _, v := range rs.i4[k] {
			buf = be.AppendUint32(buf, 4)
			buf = be.AppendUint32(buf, uint32(v))
		}
	case "int8":
		for _, v := range rs.i8[k] {
			buf = be.AppendUint32(buf, 8)
			buf = be.AppendUint64(buf, uint64(v))
		}
	case "timestamptz":
		for _, v := range rs.ts[k] {
			if !v.Valid {
				buf = be.AppendUint32(buf, 0xffffffff)
				continue
			}
			buf = be.AppendUint32(buf, 8)
			buf = be.AppendUint64(buf, uint64(v.Time.UnixMicro()-postgresEpoch.UnixMicro()))
		}
	}
	return buf
}

// postgresEpoch is where timestamptz's binary form counts microseconds from.
var postgresEpoch = time.Date(2000, 1, 1, 0, 0, 0, 0, time.UTC)

// elemOID is the element type of each column type.
var elemOID = map[string]uint32{"text": pgtype.TextOID, "float8": pgtype.Float8OID, "int4": pgtype.Int4OID,
	"int8": pgtype.Int8OID, "timestamptz": pgtype.TimestamptzOID}

func f8(v float64) pgtype.Float8 { return pgtype.Float8{Float64: v, Valid: !math.IsNaN(v)} }

var byName = map[string]*Table{}

func init() {
	for _, t := range []*Table{Forecast, Backtest, Series} {
		byName[t.Name] = t
	}
}

// Lookup returns the table of a name in schema sidetrend_live.
func Lookup(name string) (*Table, bool) {
	t, ok := byName[name]
	return t, ok
}

// Scan computes the rows the domains (one per column, meaningful for the
// parameter columns) allow, counting them against b before it computes.
// Only the columns in used (positions, nil for all) need be filled: a
// table may leave the others empty.
func (t *Table) Scan(ctx context.Context, src Source, domains []Domain, used []int, b Budget) (*Rows, error) {
	return t.scan(ctx, &scanRequest{table: t, src: src, domains: domains, used: used, budget: b})
}

// wants reports whether column i is to be filled.
func (req *scanRequest) wants(i int) bool {
	if req.used == nil {
		return true
	}
	for _, j := range req.used {
		if j == i {
			return true
		}
	}
	return false
}

// Budget bounds what a statement computes: Expect is asked, before a scan
// computes anything, for its rows (an upper bound, described by what) of
// about rowBytes each, and refuses with an error the client can act on.
type Budget interface {
	Expect(rows, rowBytes int64, what string) error
}

func expect(b Budget, rows, rowBytes int64, what string) error {
	if b == nil {
		return nil
	}
	return b.Expect(rows, rowBytes, what)
}

// Values is column i as a Go slice ([]string, []pgtype.Float8, []int32,
// []int64 or []pgtype.Timestamptz).
func (rs *Rows) Values(i int) any {
	k := rs.slots[i]
	switch rs.table.Columns[i].SQL {
	case "text":
		return rs.text[k]
	case "float8":
		return rs.f8[k]
	case "int4":
		return rs.i4[k]
	case "int8":
		return rs.i8[k]
	}
	return rs.ts[k]
}

// Forecast is sidetrend_live.forecast.
var Forecast = &Table{
	Name: "forecast",
	Columns: []Column{
		{"tracker", "text", Text, true}, {"series_key", "text", Text, true}, {"lambda", "float8", Float, true},
		{"horizon", "int4", Int, true}, {"period_start", "timestamptz", 0, false},
		{"forecast", "float8", 0, false}, {"lower80", "float8", 0, false}, {"upper80", "float8", 0, false},
		{"lower95", "float8", 0, false}, {"upper95", "float8", 0, false},
		{"cum_forecast", "float8", 0, false}, {"cum_lower95", "float8", 0, false}, {"cum_upper95", "float8", 0, false},
		// How far a horizon reaches beyond the series' own history (as in
		// sidetrend.forecasts): buckets from the first to the newest, and
		// horizon / data_buckets; above 1 the forecast extrapolates past
		// the span of the data.
		{"data_buckets", "int8", 0, false}, {"reach", "float8", 0, false},
	},
	RowBytes: 15 * 16,
	scan:     scanForecast,
}

// Backtest is sidetrend_live.backtest.
var Backtest = &Table{
	Name: "backtest",
	Columns: []Column{
		{"tracker", "text", Text, true}, {"series_key", "text", Text, true}, {"lambda", "float8", Float, true},
		{"n_errors", "int8", 0, false}, {"mae", "float8", 0, false}, {"rmse", "float8", 0, false},
		{"mape", "float8", 0, false}, {"coverage95", "float8", 0, false},
	},
	RowBytes: 8 * 16,
	scan:     scanBacktest,
}

// Series is sidetrend_live.series.
var Series = &Table{
	Name: "series",
	Columns: []Column{
		{"tracker", "text", Text, true}, {"series_key", "text", Text, true}, {"points", "int8", 0, false},
		{"first_bucket", "timestamptz", 0, false}, {"last_bucket", "timestamptz", 0, false},
		{"lambda", "float8", 0, false}, {"degree", "int4", 0, false}, {"period", "float8", 0, false},
		{"harmonics", "int4", 0, false}, {"state", "text", 0, false},
	},
	RowBytes: 10 * 16,
	scan:     scanSeries,
}

// listSeries asks the source for the series the tracker and series_key
// domains allow: one call per value when they are short lists, one call
// for everything otherwise.
func listSeries(ctx context.Context, req *scanRequest) ([]SeriesInfo, error) {
	const maxCalls = 256
	trackers, tOK := req.domains[0].TextSet()
	keys, kOK := req.domains[1].TextSet()
	if tOK && len(trackers) == 0 || kOK && len(keys) == 0 {
		return nil, nil
	}
	var calls [][2]*string
	switch {
	case tOK && kOK && len(trackers)*len(keys) <= maxCalls:
		for i := range trackers {
			for j := range keys {
				calls = append(calls, [2]*string{&trackers[i], &keys[j]})
			}
		}
	case tOK && len(trackers) <= maxCalls:
		for i := range trackers {
			calls = append(calls, [2]*string{&trackers[i], nil})
		}
	case kOK && len(keys) <= maxCalls:
		for j := range keys {
			calls = append(calls, [2]*string{nil, &keys[j]})
		}
	default:
		calls = append(calls, [2]*string{nil, nil})
	}
	var out []SeriesInfo
	for _, c := range calls {
		infos, err := req.src.Series(ctx, c[0], c[1])
		if err != nil {
			return nil, sourceError(ctx, "list series", err)
		}
		out = append(out, infos...)
	}
	if len(calls) > 1 && !tOK {
		// Calls per key return each key's series sorted by tracker; merge.
		sort.SliceStable(out, func(i, j int) bool {
			if out[i].Tracker != out[j].Tracker {
				return out[i].Tracker < out[j].Tracker
			}
			return out[i].Key < out[j].Key
		})
	}
	// Drop what the text sets rule out, so nothing is computed for it.
	kept := out[:0]
	for _, s := range out {
		if tOK && !containsString(trackers, s.Tracker) || kOK && !containsString(keys, s.Key) {
			continue
		}
		kept = append(kept, s)
	}
	return kept, nil
}

// sourceError wraps an error of the Source; a cancelled statement reads as
// a cancelled statement, whatever the source made of it.
func sourceError(ctx context.Context, what string, err error) error {
	if ctx.Err() != nil {
		return canceled(ctx)
	}
	var e *Error
	if errors.As(err, &e) {
		return e
	}
	return errorf(codeInternal, "%s: %v", what, err)
}

// canceled is the error of a scan whose statement was cancelled; the
// query handling reports the cause.
func canceled(ctx context.Context) error { return context.Cause(ctx) }

// SQLSTATEs of the tables' errors.
const (
	codeFeatureNotSupported = "0A000"
	codeInvalidParameter    = "22023"
	codeInternal            = "XX000"
)

// Error is an error with a SQLSTATE, for the client: Message says what went
// wrong, Hint what to change.
type Error struct {
	Code, Message, Hint string
}

func (e *Error) Error() string {
	if e.Hint != "" {
		return e.Message + " (" + e.Hint + ")"
	}
	return e.Message
}

func errorf(code, format string, args ...any) *Error {
	return &Error{Code: code, Message: fmt.Sprintf(format, args...)}
}

func notSupported(format string, args ...any) *Error {
	return errorf(codeFeatureNotSupported, format, args...)
}

func (e *Error) withHint(format string, args ...any) *Error {
	e.Hint = fmt.Sprintf(format, args...)
	return e
}

// plural is "1 lambda", "3 lambdas".
func plural(n int, word string) string {
	if n == 1 {
		return "1 " + word
	}
	return strconv.Itoa(n) + " " + word + "s"
}

// Lambdas returns the lambdas a Domain pins down, validated, or ok=false
// when the Domain does not pin lambda to a list.
func Lambdas(d Domain) (out []float64, ok bool, err error) {
	if d.All || d.Interval {
		return nil, false, nil
	}
	for _, r := range d.Nums {
		f, _ := r.Float64()
		spec := estimator.Spec{Lambda: f}
		if err := spec.Validate(); err != nil {
			return nil, true, errorf(codeInvalidParameter, "%v", err)
		}
		out = append(out, f)
	}
	return out, true, nil
}

// Horizons returns the horizons a Domain allows, 1..MaxHorizon, or an
// error saying what condition to add.
func Horizons(d Domain) ([]int, error) {
	need := notSupported("sidetrend_live.forecast needs a condition that bounds horizon, such as WHERE horizon <= 30").
		withHint("any horizon from 1 to %d buckets ahead can be asked for; use <=, <, =, IN or BETWEEN on horizon", MaxHorizon)
	if d.All {
		return nil, need
	}
	if !d.Interval {
		var out []int
		for _, r := range d.Nums {
			if !r.IsInt() {
				continue // no integer horizon equals a fraction
			}
			n := r.Num()
			if !n.IsInt64() || n.Int64() < 1 || n.Int64() > MaxHorizon {
				return nil, errorf(codeInvalidParameter, "horizon %s is out of range: forecasts run from horizon 1 to %d", r.RatString(), MaxHorizon)
			}
			out = append(out, int(n.Int64()))
		}
		return out, nil
	}
	if d.Hi == nil {
		return nil, need
	}
	hi := floorRat(d.Hi, d.HiInc)
	if hi.Cmp(big.NewInt(MaxHorizon)) > 0 {
		return nil, errorf(codeInvalidParameter, "horizon up to %s is beyond the longest forecast: use a bound of at most %d, such as WHERE horizon <= %d",
			hi.String(), MaxHorizon, MaxHorizon)
	}
	lo := big.NewInt(1)
	if d.Lo != nil {
		if l := ceilRat(d.Lo, d.LoInc); l.Cmp(lo) > 0 {
			lo = l
		}
	}
	var out []int
	for h := lo.Int64(); h <= hi.Int64(); h++ {
		out = append(out, int(h))
	}
	return out, nil
}

// floorRat is the largest integer <= r (< r when !inclusive).
func floorRat(r *big.Rat, inclusive bool) *big.Int {
	q, m := new(big.Int).DivMod(r.Num(), r.Denom(), new(big.Int))
	if m.Sign() == 0 && !inclusive {
		q.Sub(q, big.NewInt(1))
	}
	return q
}

// ceilRat is the smallest integer >= r (> r when !inclusive).
func ceilRat(r *big.Rat, inclusive bool) *big.Int {
	q, m := new(big.Int).DivMod(r.Num(), r.Denom(), new(big.Int))
	if m.Sign() != 0 || !inclusive {
		q.Add(q, big.NewInt(1))
	}
	return q
}

// Column positions of the forecast table.
const (
	fcTracker = iota
	fcKey
	fcLambda
	fcHorizon
	fcPeriodStart
	fcForecast
	// fcDataBuckets and fcReach follow the eight forecast and bound columns.
	fcDataBuckets = fcForecast + 8
	fcReach       = fcForecast + 9
)

// scanForecast computes the forecasts the domains allow, one (series,
// lambda) at a time: the stored state, or a what-if refit over the values.
func scanForecast(ctx context.Context, req *scanRequest) (*Rows, error) {
	rs := newRows(req.table)
	hs, err := Horizons(req.domains[fcHorizon])
	if err != nil {
		return nil, err
	}
	ls, pinned, err := Lambdas(req.domains[fcLambda])
	if err != nil {
		return nil, err
	}
	if len(hs) == 0 || pinned && len(ls) == 0 {
		return rs, nil
	}
	infos, err := listSeries(ctx, req)
	if err != nil {
		return nil, err
	}
	nl := 1
	if pinned {
		nl = len(ls)
	}
	if err := expect(req.budget, int64(len(infos))*int64(nl)*int64(len(hs)), req.table.RowBytes,
		fmt.Sprintf("%d series x %s x %s", len(infos), plural(nl, "lambda"), plural(len(hs), "horizon"))); err != nil {
		return nil, err
	}
	maxH := hs[len(hs)-1]
	rs.grow(len(infos) * nl * len(hs))
	want := make([]bool, len(req.table.Columns))
	for i := range want {
		want[i] = req.wants(i)
	}
	for i := range infos {
		info := &infos[i]
		var values []float64
		for li := 0; li < nl; li++ {
			if ctx.Err() != nil {
				return nil, canceled(ctx)
			}
			var st *estimator.State
			lambda := info.Spec.Lambda
			if !pinned {
				s, err := req.src.State(ctx, info.Tracker, info.Key)
				if err != nil {
					return nil, sourceError(ctx, fmt.Sprintf("read the state of series %q/%q", info.Tracker, info.Key), err)
				}
				if s == nil {
					continue
				}
				st = s
			} else {
				if values == nil {
					if values, err = req.src.Values(ctx, info.Tracker, info.Key); err != nil {
						return nil, sourceError(ctx, fmt.Sprintf("read the values of series %q/%q", info.Tracker, info.Key), err)
					}
				}
				spec := info.Spec
				spec.Lambda, lambda = ls[li], ls[li]
				if st, err = estimator.Fit(spec, values); err != nil {
					return nil, errorf(codeInvalidParameter, "refit series %q/%q with lambda %v: %v", info.Tracker, info.Key, spec.Lambda, err)
				}
			}
			if !st.Ready() {
				continue // a series still warming up has no forecast
			}
			fc, err := st.Forecast(maxH)
			if err != nil {
				return nil, errorf(codeInternal, "forecast series %q/%q: %v", info.Tracker, info.Key, err)
			}
			hasCal := info.Calendar.Width() != (calendar.Width{})
			values := [...][]float64{fc.Forecast, fc.Lower80, fc.Upper80, fc.Lower95, fc.Upper95,
				fc.CumForecast, fc.CumLower95, fc.CumUpper95}
			for _, h := range hs {
				k := h - 1
				rs.text[0] = append(rs.text[0], info.Tracker)
				rs.text[1] = append(rs.text[1], info.Key)
				rs.i4[0] = append(rs.i4[0], int32(h))
				rs.f8[0] = append(rs.f8[0], pgtype.Float8{Float64: lambda, Valid: true})
				if want[fcPeriodStart] {
					var ts pgtype.Timestamptz
					if hasCal {
						ts = pgtype.Timestamptz{Time: info.Calendar.Start(info.LastIndex + int64(h)), Valid: true}
					}
					rs.ts[0] = append(rs.ts[0], ts)
				}
				for j, v := range values {
					if want[fcForecast+j] {
						rs.f8[1+j] = append(rs.f8[1+j], f8(v[k]))
					}
				}
				if want[fcDataBuckets] || want[fcReach] {
					var n int64
					var reach pgtype.Float8
					if hasCal && !info.FirstBucket.IsZero() {
						n = info.LastIndex - info.Calendar.Index(info.FirstBucket) + 1
						reach = pgtype.Float8{Float64: float64(h) / float64(n), Valid: n > 0}
					}
					if want[fcDataBuckets] {
						rs.i8[0] = append(rs.i8[0], n)
					}
					if want[fcReach] {
						rs.f8[9] = append(rs.f8[9], reach)
					}
				}
				rs.N++
			}
		}
	}
	return rs, nil
}

// scanBacktest runs estimator.Backtest for each series and lambda: the
// pinned lambdas, or the default grid within the lambda Domain.
func scanBacktest(ctx context.Context, req *scanRequest) (*Rows, error) {
	rs := newRows(req.table)
	ls, pinned, err := Lambdas(req.domains[2])
	if err != nil {
		return nil, err
	}
	if !pinned {
		for _, l := range estimator.DefaultGrid() {
			if req.domains[2].All || req.domains[2].Contains(new(big.Rat).SetFloat64(l)) {
				ls = append(ls, l)
			}
		}
	}
	if len(ls) == 0 {
		return rs, nil
	}
	infos, err := listSeries(ctx, req)
	if err != nil {
		return nil, err
	}
	if err := expect(req.budget, int64(len(infos))*int64(len(ls)), req.table.RowBytes,
		fmt.Sprintf("%d series x %s", len(infos), plural(len(ls), "lambda"))); err != nil {
		return nil, err
	}
	for _, info := range infos {
		var values []float64
		for _, l := range ls {
			if ctx.Err() != nil {
				return nil, canceled(ctx)
			}
			if values == nil {
				if values, err = req.src.Values(ctx, info.Tracker, info.Key); err != nil {
					return nil, sourceError(ctx, fmt.Sprintf("read the values of series %q/%q", info.Tracker, info.Key), err)
				}
			}
			spec := info.Spec
			spec.Lambda = l
			es, err := estimator.Backtest(spec, values)
			if err != nil {
				return nil, errorf(codeInvalidParameter, "backtest series %q/%q with lambda %v: %v", info.Tracker, info.Key, l, err)
			}
			rs.text[0] = append(rs.text[0], info.Tracker)
			rs.text[1] = append(rs.text[1], info.Key)
			rs.i8[0] = append(rs.i8[0], es.N)
			for j, v := range [...]float64{l, es.MAE, es.RMSE, es.MAPE, es.Cov95} {
				rs.f8[j] = append(rs.f8[j], f8(v))
			}
			rs.N++
		}
	}
	return rs, nil
}

func scanSeries(ctx context.Context, req *scanRequest) (*Rows, error) {
	rs := newRows(req.table)
	infos, err := listSeries(ctx, req)
	if err != nil {
		return nil, err
	}
	if err := expect(req.budget, int64(len(infos)), req.table.RowBytes, fmt.Sprintf("%d series", len(infos))); err != nil {
		return nil, err
	}
	for _, s := range infos {
		period := math.NaN()
		if s.Spec.Period != 0 {
			period = s.Spec.Period
		}
		rs.text[0] = append(rs.text[0], s.Tracker)
		rs.text[1] = append(rs.text[1], s.Key)
		rs.text[2] = append(rs.text[2], s.State)
		rs.i8[0] = append(rs.i8[0], s.Points)
		rs.ts[0] = append(rs.ts[0], pgtype.Timestamptz{Time: s.FirstBucket, Valid: !s.FirstBucket.IsZero()})
		rs.ts[1] = append(rs.ts[1], pgtype.Timestamptz{Time: s.LastBucket, Valid: !s.LastBucket.IsZero()})
		rs.f8[0] = append(rs.f8[0], f8(s.Spec.Lambda))
		rs.f8[1] = append(rs.f8[1], f8(period))
		rs.i4[0] = append(rs.i4[0], int32(s.Spec.Degree))
		rs.i4[1] = append(rs.i4[1], int32(s.Spec.Harmonics))
		rs.N++
	}
	return rs, nil
}
