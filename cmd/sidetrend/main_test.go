package main

import (
	"bytes"
	"context"
	"io"
	"math"
	"math/rand/v2"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/urfave/cli/v2"

	"github.com/sidetrend/sidetrend/internal/pgtest"
	"github.com/sidetrend/sidetrend/pgsync"
)

func TestMain(m *testing.M) { pgtest.Main(m) }

// testApp is the CLI with this package's commands, writing to out. It adds
// the commands app.go does not wire (yet), so that the tests do not depend
// on the order in which they are wired.
func testApp(out io.Writer) *cli.App {
	app := newApp()
	have := map[string]bool{}
	for _, c := range app.Commands {
		have[c.Name] = true
	}
	for _, c := range []*cli.Command{demoCommand(), plotCommand(), statusCommand()} {
		if !have[c.Name] {
			app.Commands = append(app.Commands, c)
		}
	}
	app.Writer, app.ErrWriter = out, out
	app.ExitErrHandler = func(*cli.Context, error) {}
	return app
}

// runCLI runs the CLI with args and returns what it wrote.
func runCLI(t *testing.T, ctx context.Context, args ...string) (string, error) {
	t.Helper()
	var out bytes.Buffer
	err := testApp(&out).RunContext(ctx, append([]string{"sidetrend"}, args...))
	return out.String(), err
}

// salesFirstDay is the first day of the test table sales.
var salesFirstDay = time.Date(2025, 1, 6, 0, 0, 0, 0, time.UTC)

// salesDB makes a migrated database with a table public.sales of two shops
// ("north", "south") over days days, tracked as "sales" (daily sums, linear
// trend plus a weekly harmonic, horizon 10), and catches the sidecar up.
// The values are 100 + 0.5 t + 10 sin(2 pi t / 7) + Gaussian noise of sd 3,
// seeded; day 30 has no row for north (an empty bucket, a zero sum).
func salesDB(t *testing.T) (string, *pgxpool.Pool) {
	t.Helper()
	ctx := context.Background()
	url := pgtest.NewDatabase(t)
	if _, err := pgsync.Migrate(ctx, url, nil); err != nil {
		t.Fatal(err)
	}
	pool, err := pgsync.Connect(ctx, url)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(pool.Close)
	if _, err := pool.Exec(ctx, `CREATE TABLE public.sales (shop text, sold_at date, amount float8)`); err != nil {
		t.Fatal(err)
	}
	rng := rand.New(rand.NewPCG(1, 1))
	var rows [][]any
	for d := range salesDays {
		for _, shop := range []string{"north", "south"} {
			if shop == "north" && d == 30 {
				continue
			}
			y := 100 + 0.5*float64(d) + 10*math.Sin(2*math.Pi*float64(d)/7) + 3*rng.NormFloat64()
			rows = append(rows, []any{shop, salesFirstDay.AddDate(0, 0, d), y})
		}
	}
	if _, err := pool.CopyFrom(ctx, pgx.Identifier{"public", "sales"}, []string{"shop", "sold_at", "amount"}, pgx.CopyFromRows(rows)); err != nil {
		t.Fatal(err)
	}
	if _, err := pool.Exec(ctx, `SELECT sidetrend.track('public.sales', 'sold_at', 'amount', '{shop}',
		period => 7, harmonics => 1, horizon => 10)`); err != nil {
		t.Fatal(err)
	}
	if err := pgsync.NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	return url, pool
}

// salesDays is how many days salesDB loads.
const salesDays = 120
