package sqlwire

import (
	"bytes"
	"context"
	"math/big"
	"testing"

	"github.com/jackc/pgx/v5/pgtype"
)

func ratOf(f float64) *big.Rat { return new(big.Rat).SetFloat64(f) }

// TestEncodeArray checks the tables' array encoder against pgx's own
// encoding of the same slices (pgtype.Map.Encode, binary format), NULLs
// included, on every column of the three tables.
func TestEncodeArray(t *testing.T) {
	ctx := context.Background()
	src := newMemSource(t, scenarioSeries())
	h := domain{nums: nil, interval: true, hi: ratOf(3), hiInc: true}
	for _, tab := range []*tableDef{forecastTable, backtestTable, seriesTable} {
		ds := make([]domain, len(tab.cols))
		for i := range ds {
			ds[i] = domainAll
		}
		if tab == forecastTable {
			ds[fcHorizon] = h
		}
		if tab == backtestTable {
			ds[2] = domain{nums: []*big.Rat{ratOf(0.9)}}
		}
		rs, err := tab.scan(ctx, &scanRequest{table: tab, src: src, domains: ds})
		if err != nil || rs.n == 0 {
			t.Fatalf("%s: %d rows, %v", tab.name, rs.n, err)
		}
		for i, c := range tab.cols {
			k := rs.slots[i]
			var v any
			switch c.sql {
			case "text":
				v = rs.text[k]
			case "float8":
				v = rs.f8[k]
			case "int4":
				v = rs.i4[k]
			case "int8":
				v = rs.i8[k]
			default:
				v = rs.ts[k]
			}
			want, err := typeMap.Encode(arrayOID[c.sql], pgtype.BinaryFormatCode, v, nil)
			if err != nil {
				t.Fatal(err)
			}
			if got := rs.encodeArray(tab, i, nil); !bytes.Equal(got, want) {
				t.Errorf("%s.%s: encoded %x, pgx encodes %x", tab.name, c.name, got[:min(len(got), 64)], want[:min(len(want), 64)])
			}
		}
	}
}
