package sqlwire

import (
	"bytes"
	"context"
	"github.com/sidetrend/sidetrend/sqlwire/livetables"
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
	h := livetables.Domain{Interval: true, Hi: ratOf(3), HiInc: true}
	for _, tab := range []*livetables.Table{livetables.Forecast, livetables.Backtest, livetables.Series} {
		ds := make([]livetables.Domain, len(tab.Columns))
		for i := range ds {
			ds[i] = livetables.Everything
		}
		if tab == livetables.Forecast {
			ds[fcHorizon] = h
		}
		if tab == livetables.Backtest {
			ds[2] = livetables.Domain{Nums: []*big.Rat{ratOf(0.9)}}
		}
		rs, err := tab.Scan(ctx, src, ds, nil, nil)
		if err != nil || rs.N == 0 {
			t.Fatalf("%s: %d rows, %v", tab.Name, rs.N, err)
		}
		for i, c := range tab.Columns {
			v := rs.Values(i)
			want, err := typeMap.Encode(arrayOID[c.SQL], pgtype.BinaryFormatCode, v, nil)
			if err != nil {
				t.Fatal(err)
			}
			if got := rs.EncodeArray(i, nil); !bytes.Equal(got, want) {
				t.Errorf("%s.%s: encoded %x, pgx encodes %x", tab.Name, c.Name, got[:min(len(got), 64)], want[:min(len(want), 64)])
			}
		}
	}
}
