package pgsync

import (
	"context"
	"math"
	"testing"

	"github.com/jackc/pgx/v5"

	"github.com/sidetrend/sidetrend/internal/pgtest"
)

// TestFloat8ArrayEncoder sends the same []float64 values through the
// sidecar's float8[] encoder and through pgx's own (a connection without
// registerCodecs) and checks that Postgres reads them alike: the same text
// (extra_float_digits = 3 prints every bit) and the same bits back.
func TestFloat8ArrayEncoder(t *testing.T) {
	t.Parallel()
	url := pgtest.NewDatabase(t)
	ctx := context.Background()
	plain, err := pgx.Connect(ctx, url)
	if err != nil {
		t.Fatal(err)
	}
	defer plain.Close(ctx)
	cfg, err := pgx.ParseConfig(url)
	if err != nil {
		t.Fatal(err)
	}
	fast, err := pgx.ConnectConfig(ctx, cfg)
	if err != nil {
		t.Fatal(err)
	}
	defer fast.Close(ctx)
	if err := registerCodecs(ctx, fast); err != nil {
		t.Fatal(err)
	}
	cases := map[string][]float64{
		"nil":     nil,
		"empty":   {},
		"one":     {1.5},
		"special": {math.NaN(), math.Inf(1), math.Inf(-1), math.Copysign(0, -1), 0, math.SmallestNonzeroFloat64, math.MaxFloat64, -math.MaxFloat64},
		"mixed":   {0.1, 0.2, 0.30000000000000004, -123456.789, 1e-300, 1e300},
	}
	long := make([]float64, 10000)
	for i := range long {
		long[i] = math.Sin(float64(i)) * 1e6
	}
	cases["long"] = long
	const q = `SELECT $1::float8[]::text, array_length($1::float8[], 1), $1::float8[]`
	for _, c := range []*pgx.Conn{plain, fast} {
		if _, err := c.Exec(ctx, `SET extra_float_digits = 3`); err != nil {
			t.Fatal(err)
		}
	}
	for name, xs := range cases {
		var wantText, gotText *string
		var wantLen, gotLen *int
		var back []float64
		if err := plain.QueryRow(ctx, q, xs).Scan(&wantText, &wantLen, new([]float64)); err != nil {
			t.Fatalf("%s through pgx's encoder: %v", name, err)
		}
		if err := fast.QueryRow(ctx, q, xs).Scan(&gotText, &gotLen, &back); err != nil {
			t.Fatalf("%s through the sidecar's encoder: %v", name, err)
		}
		if (wantText == nil) != (gotText == nil) || (wantText != nil && *wantText != *gotText) {
			t.Errorf("%s: text %v, pgx's encoder gives %v", name, textOf(gotText), textOf(wantText))
		}
		if (wantLen == nil) != (gotLen == nil) || (wantLen != nil && *wantLen != *gotLen) {
			t.Errorf("%s: length %v, pgx's encoder gives %v", name, gotLen, wantLen)
		}
		if len(back) != len(xs) || (xs == nil) != (back == nil) {
			t.Fatalf("%s: read back %d values (nil %v), sent %d (nil %v)", name, len(back), back == nil, len(xs), xs == nil)
		}
		for i := range xs {
			if math.Float64bits(back[i]) != math.Float64bits(xs[i]) && !(math.IsNaN(back[i]) && math.IsNaN(xs[i])) {
				t.Errorf("%s[%d]: read back %v (bits %x), sent %v (bits %x)", name, i, back[i], math.Float64bits(back[i]), xs[i], math.Float64bits(xs[i]))
			}
		}
	}
}

func textOf(s *string) string {
	if s == nil {
		return "NULL"
	}
	return *s
}
